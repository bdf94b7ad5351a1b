"""Make the README's monitoring picture from a demo run (matplotlib, no Prometheus needed).

Serves BUNDLE in-process (the real app and metrics), sends the parcel depot's
held-out digits (scikit-learn's bundled 8x8 digits, demur's test split), then
the same digits drifted (the left half 4 grey levels brighter, Gaussian noise
of sd 2, clipped to 0..16), and after every batch reads ``/metrics`` the way
``demur status`` does. Plots abstention rate, largest feature PSI and score KS
against cases served, with the alert lines of deploy/prometheus/rules.

    python deploy/prometheus/make_dashboard.py build/demo/bundle --out docs/monitoring-dashboard.png

The drift figures are printed too. The PSI reading (< 0.1 stable, > 0.25
major) is common practice, a rule of thumb.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from demur.export.datasets import load_dataset  # noqa: E402
from demur.serve.web.app import create_app  # noqa: E402
from demur.serve.core.bundle import load_bundle  # noqa: E402
from demur.serve.config import ServeConfig  # noqa: E402
from demur.serve.adapters.engine import Engine  # noqa: E402
from demur.serve.adapters.metrics import Metrics  # noqa: E402
from demur.serve.offline.status import read_status  # noqa: E402

PSI_ALERT = 0.25
MIN_WINDOW = 200
"""The drift alerts in deploy/prometheus/rules wait for this many cases in the window."""


def drift(x: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Brighter left half (+4 grey levels) and noise (sd 2), clipped to the 0..16 scanner range."""
    left = np.array([c < 4 for r in range(8) for c in range(8)])
    out = x.copy()
    out[:, left] += 4.0
    return np.clip(out + rng.normal(scale=2.0, size=out.shape), 0.0, 16.0)


def run(bundle_path: str, window: int, batch: int, seed: int) -> dict[str, np.ndarray]:
    bundle = load_bundle(bundle_path)
    config = ServeConfig(bundle=bundle_path, seed=seed, drift_window=window, abstain_window=window)
    metrics = Metrics(config)
    client = create_app(config, engine=Engine(bundle, seed=seed), metrics=metrics).test_client()
    x_test, _ = load_dataset("digits").split("test")
    rng = np.random.default_rng(seed)
    clean = np.concatenate([x_test, x_test[rng.permutation(len(x_test))]])
    drifted = np.concatenate([drift(x_test, rng), drift(x_test[rng.permutation(len(x_test))], rng)])
    rows = []
    served = 0
    for phase, x in ((0, clean), (1, drifted)):
        for start in range(0, len(x), batch):
            r = client.post("/v1/predict", json={"cases": x[start:start + batch].tolist()})
            if r.status_code != 200:
                raise SystemExit(f"predict failed: {r.status_code} {r.get_data(as_text=True)[:300]}")
            served += len(r.get_json()["results"])
            s = read_status(client.get("/metrics").get_data(as_text=True), top=1)
            rows.append((served, phase, s["abstain_ratio"], s["psi_max"], s["score_ks"],
                         s["calibrated_abstain_ratio"] or np.nan, s["score_ks_critical"] or np.nan,
                         s["drift_window_cases"] or 0))
    a = np.array(rows, dtype=float)
    return {"cases": a[:, 0], "phase": a[:, 1], "abstain": a[:, 2], "psi": a[:, 3], "ks": a[:, 4],
            "calibrated": a[:, 5], "ks_critical": a[:, 6], "window": a[:, 7], "drift_start": np.array([len(clean)])}


def plot(d: dict[str, np.ndarray], out: Path, window: int) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(3, 1, figsize=(9, 7.5), sharex=True, constrained_layout=True)
    start = float(d["drift_start"][0])
    x = d["cases"]
    filling = x[d["window"] < MIN_WINDOW]
    for ax in axes:
        if filling.size:
            ax.axvspan(0, filling.max(), color="#e6e6e6", label=f"window < {MIN_WINDOW} cases (alerts wait)")
        ax.axvspan(start, x.max(), color="#f3d9d9", label="drifted traffic")
        ax.grid(alpha=0.3)
    a0, a1, a2 = axes
    a0.plot(x, d["abstain"], color="#1f4e79", lw=1.8, label="abstention rate")
    a0.plot(x, d["calibrated"], color="#555555", lw=1, ls=":", label="calibrated rate")
    a0.plot(x, 2.0 * d["calibrated"], color="#b03030", lw=1.2, ls="--", label="alert: 2 x calibrated")
    a0.set_ylabel(f"abstention rate\n(last {window} decisions)")
    a1.plot(x, np.maximum(d["psi"], 1e-3), color="#1f4e79", lw=1.8, label="largest feature PSI")
    a1.axhline(0.1, color="#c08020", ls=":", lw=1.2, label="0.1: moderate shift")
    a1.axhline(PSI_ALERT, color="#b03030", ls="--", lw=1.2, label="alert: 0.25, major shift (common practice)")
    a1.set_yscale("log")
    a1.set_ylabel(f"largest feature PSI\n(last {window} cases, log scale)")
    a2.plot(x, d["ks"], color="#1f4e79", lw=1.8, label="KS statistic")
    a2.plot(x, d["ks_critical"], color="#b03030", lw=1.2, ls="--", label="alert: noise level (alpha 0.001)")
    a2.set_ylabel("score KS vs\ncalibration scores")
    for ax, where in zip(axes, ("upper left", "upper left", "lower right")):
        ax.legend(loc=where, fontsize=7.5, frameon=where != "upper left")
    axes[-1].set_xlabel("cases served (held-out postcode digits, then the same digits brighter on the left "
                        "and noisy)")
    fig.suptitle("demur monitoring: parcel-depot digits, clean then drifted", fontsize=12)
    out.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(out, dpi=110)
    plt.close(fig)


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("bundle")
    p.add_argument("--out", default=str(ROOT / "docs" / "monitoring-dashboard.png"))
    p.add_argument("--window", type=int, default=300, help="drift and abstention window, cases (default 300)")
    p.add_argument("--batch", type=int, default=20, help="cases per request (default 20)")
    p.add_argument("--seed", type=int, default=0)
    args = p.parse_args(argv)
    d = run(args.bundle, args.window, args.batch, args.seed)
    plot(d, Path(args.out), args.window)
    clean, drifted = d["phase"] == 0, d["phase"] == 1
    print(f"wrote {args.out}")
    print(f"clean   (end): abstain {d['abstain'][clean][-1]:.3f}  PSI max {d['psi'][clean][-1]:.3f}  "
          f"KS {d['ks'][clean][-1]:.3f}")
    print(f"drifted (end): abstain {d['abstain'][drifted][-1]:.3f}  PSI max {d['psi'][drifted][-1]:.3f}  "
          f"KS {d['ks'][drifted][-1]:.3f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
