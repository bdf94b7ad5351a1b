"""The 5-seed table of README "Meeting issue 26's targets", from runs of deploy/measure-posteriors.sh.

Usage: python deploy/posterior_table.py [--seeds 0,1,2,3,4] [--baseline DIR] DIR[:SCORE] ...

Each DIR holds s{SEED}/evaluation/evaluation.json (``demur evaluate --holdout-class 9``) and
s{SEED}/time.txt (``/usr/bin/time -f "%U %S %e"`` of ``demur train``). A row per DIR: the mean
over the seeds of accuracy, NLL, ECE, accuracy at 10% referred ranked by the served score (the
bundle's calibrated rule, or SCORE), and the AUROC of the served score on inverted digits (16 - x),
uniform-noise digits and the unseen class (digit 9 left out of training); then, for reference,
the same three AUROCs of predictive entropy / mutual information / joint rank, and the training
CPU seconds (user + sys). ``--baseline DIR``: also the plain 5-member ensemble that
``demur evaluate --baseline`` trained in DIR's runs (ranked by 1 - max probability). Targets
(issue 26) are printed under the table with met / missed.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

import numpy as np

TARGETS = {"accuracy": (">=", 0.975), "nll": ("<=", 0.09), "ece": ("<=", 0.03), "acc10": (">=", 0.995),
           "inv": (">=", 0.97), "uni": (">=", 0.97), "unseen": (">=", 0.95)}


def _row(ev: dict, model: str, score: str | None = None) -> dict[str, float]:
    b = ev["models"][model]
    score = score or b["rule"]["score"]
    ref = b["referral"]
    out = {"accuracy": ref["accuracy"], "nll": ref["nll"], "ece": ref["ece"],
           "acc10": ref["rankings"][score]["accuracy_at_referral"]["0.10"],
           "inv": b["shift"]["inversion"]["auroc"][score], "uni": b["shift"]["uniform_noise"]["auroc"][score],
           "unseen": b["holdout"]["auroc"][score]}
    for short, name in (("pe", "predictive_entropy"), ("mi", "mutual_information"), ("jr", "joint_rank")):
        for col, value in (("inv", b["shift"]["inversion"]["auroc"].get(name)),
                           ("uni", b["shift"]["uniform_noise"]["auroc"].get(name)),
                           ("unseen", b["holdout"]["auroc"].get(name))):
            out[f"{col}_{short}"] = np.nan if value is None else value
    out["score"] = score
    return out


def table(dirs: list[str], seeds: list[int], baseline: Path | None) -> list[dict]:
    rows = []
    sources = [(*_named(d), "bundle") for d in dirs] + ([(baseline, None, "ensemble")] if baseline else [])
    for d, score, model in sources:
        per = []
        for s in seeds:
            f = d / f"s{s}" / "evaluation" / "evaluation.json"
            if not f.exists():
                continue
            r = _row(json.loads(f.read_text()), model, score)
            if model == "bundle":
                user, sys_, _ = (float(v) for v in (d / f"s{s}" / "time.txt").read_text().split()[-3:])
                r["cpu"] = user + sys_
            per.append(r)
        if not per:
            continue
        keys = [k for k in per[0] if k != "score"]
        mean = {k: float(np.nanmean([p.get(k, np.nan) for p in per])) for k in keys}
        spread = {k: (float(np.min([p[k] for p in per])), float(np.max([p[k] for p in per])))
                  for k in ("inv", "uni", "unseen", "nll")}
        rows.append({"name": d.name + (f" ({score})" if score else "") if model == "bundle" else "plain 5-member ensemble", "score": per[0]["score"],
                     "seeds": len(per), "mean": mean, "range": spread})
    return rows


def _named(arg: str) -> tuple[Path, str | None]:
    """``DIR`` or ``DIR:score``: the score read as the served one (default: the calibrated rule's)."""
    path, _, score = arg.partition(":")
    return Path(path), score or None


def _met(v: float, rule: tuple[str, float]) -> bool:
    return v >= rule[1] if rule[0] == ">=" else v <= rule[1]


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("dirs", nargs="+", help="DIR, or DIR:SCORE to read SCORE as the served score")
    p.add_argument("--seeds", default="0,1,2,3,4")
    p.add_argument("--baseline", type=Path)
    a = p.parse_args()
    rows = table(a.dirs, [int(s) for s in a.seeds.split(",")], a.baseline)
    print("| candidate | served score | seeds | accuracy | NLL | ECE | acc. at 10% referred | far-off AUROC "
          "inverted / uniform (served) | unseen 9 AUROC (served) | PE: inv / uni / unseen | MI: inv / uni / unseen "
          "| joint rank: inv / uni / unseen | training CPU s | targets missed |")
    print("|" + "---|" * 14)
    for r in rows:
        m = r["mean"]
        missed = [k for k, rule in TARGETS.items() if not _met(m[k], rule)]
        trip = lambda s: " / ".join("" if np.isnan(m[f"{c}_{s}"]) else f"{m[f'{c}_{s}']:.3f}" for c in ("inv", "uni", "unseen"))  # noqa: E731
        cpu = f"{m['cpu']:.0f}" if "cpu" in m else ""
        print(f"| {r['name']} | {r['score']} | {r['seeds']} | {m['accuracy']:.3f} | {m['nll']:.3f} | {m['ece']:.3f} | "
              f"{m['acc10']:.4f} | {m['inv']:.3f} / {m['uni']:.3f} | {m['unseen']:.3f} | {trip('pe')} | {trip('mi')} | "
              f"{trip('jr')} | {cpu} | {', '.join(missed) or 'none'} |")
    print("\nranges over seeds (min-max): " + "; ".join(
        f"{r['name']}: " + ", ".join(f"{k} {lo:.3f}-{hi:.3f}" for k, (lo, hi) in r["range"].items()) for r in rows))


if __name__ == "__main__":
    main()
