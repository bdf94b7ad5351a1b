"""``demur score``: a whole file of cases decided offline by the rule the server serves.

Why here and not a script posting rows to the server: backlogs (yesterday's parcels, a
month of claims) and evaluation sets are files, often bigger than memory. The file is
read in chunks (serve/offline/tables.py: CSV or Parquet, columns by name), each chunk's
good rows become one ``PredictRequest`` and go through ``Runtime.answer_request``
(serve/core/pipeline.py): the same engine run, summaries, support check, decision rule
and review hook as ``POST /v1/predict``, so a row scored here gets the decision the
server gives it. Nothing is decided in this module.

One output row per input row, in order::

    [id]  row  decision  reason  prediction
    classification: p_<label> ... p_<label>_lower ... p_<label>_upper ...
    regression:     mean  lower  upper  epistemic_variance  aleatoric_variance
    predictive_entropy  expected_entropy  mutual_information  score  threshold  model_checksum
    [review]   (--enqueue: the review item id, or why the abstention was not queued)

``decision`` is ``accept``, ``abstain`` or ``invalid``; an invalid row (a cell that is not a
finite number, a missing value, a line of the wrong width, an id the review store cannot
hold) carries its reason naming the row and the column, its numbers are empty, and the run
goes on. Entropies and mutual information are in nats, as the server reports them.

Memory is bounded by the chunk (``--chunk-rows``, default 1,024 rows: the server's
``max_cases``), not by the file. The output is written beside ``--out`` and moved into
place at the end, so an interrupted run leaves no half file under the final name.

demur's answers support, never replace, qualified human judgement: abstained rows must be
decided by a person (``--enqueue`` puts them in the review queue with the row's id).

Example::

    demur score build/demo/bundle --data parcels.csv --id parcel_id --out scored.parquet
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from demur.serve.adapters.compute import engine_loader
from demur.serve.config import ServeConfig, build_config
from demur.serve.core.pipeline import CAUTION, Live, ReviewHook, Runtime
from demur.serve.core.summary import ClassificationSummary
from demur.serve.core.validation import MAX_CASE_ID_CHARS, PredictRequest, client_text
from demur.serve.errors import ConfigError, InvalidInput, OutputNotFinite
from demur.serve.offline.tables import Rows, open_reader, open_writer

__all__ = ["DEFAULT_CHUNK_ROWS", "ScoreReport", "Scorer", "output_columns", "register",
           "score_file"]

DEFAULT_CHUNK_ROWS = 1024
"""Rows per graph run: the server's default ``max_cases``, the batch it is measured at."""


def output_columns(manifest: Any, id_column: str | None = None, review: bool = False) -> dict[str, str]:
    """Output column name -> kind ("id", "int", "text", "number"), in file order, for a
    bundle's ``Manifest`` (no engine needed: the cluster scorer declares its schema with it)."""
    cols: dict[str, str] = {"row": "int", "decision": "text", "reason": "text"}
    if manifest.task == "classification":
        cols["prediction"] = "text"
        for suffix in ("", "_lower", "_upper"):
            cols.update({f"p_{label}{suffix}": "number" for label in manifest.labels})
    else:
        cols.update({name: "number" for name in ("prediction", "mean", "lower", "upper", "epistemic_variance",
                                                  "aleatoric_variance")})
    cols.update({name: "number" for name in ("predictive_entropy", "expected_entropy", "mutual_information",
                                             "score", "threshold")})
    cols["model_checksum"] = "text"
    if review:
        cols["review"] = "text"
    if not id_column:
        return cols
    if id_column in cols:
        raise ConfigError(f"the id column {id_column!r} has the name of an output column; rename it", field="id")
    return {id_column: "id", **cols}


class Scorer:
    """Scores chunks of ``Rows`` with one server ``Runtime``: build, ``start()`` (opens the
    onnxruntime sessions: call it after any fork, in the process that scores), then
    ``score(rows)`` per chunk.

    Example::

        scorer = Scorer(ServeConfig(bundle="build/demo/bundle")).start()
        columns, valid = scorer.score(rows)
    """

    def __init__(self, config: ServeConfig, *, review: ReviewHook | None = None, id_column: str | None = None
                 ) -> None:
        if not config.bundle:
            raise ConfigError("no bundle given: pass the bundle directory", field="bundle")
        self.config = config
        self.enqueue = review is not None
        self.id_column = id_column
        self.runtime = Runtime(config, load_engine=engine_loader(config), review=review)
        self.columns: dict[str, str] = {}
        self.queued = 0
        """Abstentions the review store took (rows whose ``review`` is an item id)."""

    def start(self) -> Scorer:
        """Load the bundle (checksums verified, smoke prediction) and fix the output columns."""
        live = self.runtime.start()
        self.columns = output_columns(live.manifest, self.id_column, self.enqueue)
        return self

    @property
    def live(self) -> Live:
        return self.runtime.slot.live

    def score(self, rows: Rows) -> tuple[dict[str, Any], np.ndarray]:
        """Decide one chunk: (output columns, valid: bool[n]). Rows with a reason in
        ``rows.bad`` (or, with a review queue, an id it cannot hold) are ``invalid``; the
        rest go through the server's pipeline in one graph run."""
        n = rows.size
        bad = list(rows.bad)
        case_ids = self._case_ids(rows, bad)
        every = bad.count(None) == n    # the common chunk: no bad row, no gathering
        good = np.ones(n, dtype=bool) if every else np.array([b is None for b in bad], dtype=bool)
        live = self.live
        out = self._empty(rows, bad, live)
        idx = np.flatnonzero(good)
        if idx.size:
            spec = live.manifest.inputs
            x = (rows.x if every else rows.x[idx]).astype(np.float32).reshape((idx.size, *spec.shape))
            at: Any = slice(None) if every else idx
            try:
                answered = self.runtime.answer_request(
                    PredictRequest(x=x, case_ids=case_ids if every else [case_ids[i] for i in idx.tolist()]),
                    live=live, rendered=self.enqueue)
            except OutputNotFinite as exc:  # those rows get their reason; the rest of the chunk is scored
                for j in exc.cases:
                    i = int(idx[j])
                    out["reason"][i] = f"row {int(rows.row[i])}: {exc.message.split(': ', 1)[0]}"
                    good[i] = False
                keep = np.ones(idx.size, dtype=bool)
                keep[exc.cases] = False
                at, x = idx[keep], x[keep]
                answered = self.runtime.answer_request(
                    PredictRequest(x=x, case_ids=[case_ids[i] for i in at.tolist()]), live=live,
                    rendered=self.enqueue) if at.size else None
            if answered is not None:
                self._fill(out, at, answered, live)
        return out, good

    def _case_ids(self, rows: Rows, bad: list[str | None]) -> list[str | None]:
        """The pipeline's case ids: the id column as text; with a review queue, an id the
        store cannot hold (control characters, over 200 characters) makes its row invalid,
        as the server refuses such a ``case_ids`` entry."""
        if rows.ids is None:
            return [None] * rows.size
        ids = [None if v is None or v == "" else str(v) for v in rows.ids]
        if self.enqueue:
            for i, cid in enumerate(ids):
                if cid is not None and bad[i] is None:
                    try:
                        client_text(cid, str(self.id_column), max_chars=MAX_CASE_ID_CHARS)
                    except InvalidInput as exc:
                        bad[i] = f"row {int(rows.row[i])}: {exc.message}"
        return ids

    def _empty(self, rows: Rows, bad: list[str | None], live: Live) -> dict[str, Any]:
        n = rows.size
        out: dict[str, Any] = {}
        for name, kind in self.columns.items():
            if kind == "number":
                out[name] = np.full(n, np.nan)
            elif kind == "text":
                out[name] = np.full(n, None, dtype=object)
        if self.id_column:
            out[self.id_column] = rows.ids
        out["row"] = rows.row
        out["decision"][:] = "invalid"
        out["reason"][:] = bad
        out["model_checksum"][:] = live.model["checksum"]
        return {name: out[name] for name in self.columns}

    def _fill(self, out: dict[str, Any], idx: np.ndarray | slice, answered: Any, live: Live) -> None:
        s, d = answered.summary, answered.decisions
        out["decision"][idx] = np.where(d.abstain, "abstain", "accept")
        out["reason"][idx] = d.reason
        out["score"][idx] = d.score
        out["threshold"][idx] = live.rule.threshold
        if isinstance(s, ClassificationSummary):
            out["prediction"][idx] = np.asarray(live.manifest.labels, dtype=object)[s.prediction]
            for k, label in enumerate(live.manifest.labels):
                out[f"p_{label}"][idx] = s.mean_probs[:, k]
                out[f"p_{label}_lower"][idx] = s.lower[:, k]
                out[f"p_{label}_upper"][idx] = s.upper[:, k]
        else:
            for name, values in (("prediction", s.mean), ("mean", s.mean), ("lower", s.lower), ("upper", s.upper),
                                 ("epistemic_variance", s.epistemic_var), ("aleatoric_variance", s.aleatoric_var)):
                out[name][idx] = values
        for name in ("predictive_entropy", "expected_entropy", "mutual_information"):
            out[name][idx] = getattr(s, name)
        if self.enqueue:
            notes = [_review_note(r) for r in answered.results]
            out["review"][idx] = [text for text, _ in notes]
            self.queued += sum(queued for _, queued in notes)


def _review_note(result: dict[str, Any]) -> tuple[str | None, bool]:
    """(the ``review`` cell, whether the item was queued) from a rendered result's annotation."""
    if "review_id" in result:
        return str(result["review_id"]), True
    note = result.get("review")
    return (str(note.get("reason", "not queued")) if isinstance(note, dict) else None), False


@dataclass(frozen=True)
class ScoreReport:
    """What a run did: row counts by decision, review items queued, seconds, rows/s; the
    output file (or, on a cluster, the directory of its ``partitions`` files)."""

    rows: int
    accepted: int
    abstained: int
    invalid: int
    queued: int
    seconds: float
    out: str
    partitions: int = 1

    @property
    def rows_per_s(self) -> float:
        return self.rows / self.seconds if self.seconds > 0 else float("inf")


def score_file(config: ServeConfig, data: str | os.PathLike[str], out: str | os.PathLike[str], *,
               id_column: str | None = None, ignore: Sequence[str] = (), review: ReviewHook | None = None,
               chunk_rows: int = DEFAULT_CHUNK_ROWS, progress: bool = False) -> ScoreReport:
    """Score every row of ``data`` (CSV or Parquet) into ``out`` (CSV or Parquet) with the
    bundle ``config.bundle`` and the rule the server would serve under ``config``.

    ``review``: a ``ReviewHook`` (``ReviewRouter``) that receives the abstentions, with the
    row's id as case id. ``progress``: show a progress line on stderr (the CLI does so only
    on a terminal). Raises ``DemurError`` for what stops the whole file (no bundle, a header
    that does not match the bundle); a bad row only gets its reason.
    """
    if chunk_rows < 1:
        raise ConfigError(f"--chunk-rows must be at least 1; got {chunk_rows}", field="chunk_rows")
    if Path(out).resolve() == Path(data).resolve():
        raise ConfigError("--out must not be the --data file", field="out")
    t0 = time.perf_counter()
    scorer = Scorer(config, review=review, id_column=id_column).start()
    reader = open_reader(data, scorer.live.manifest.inputs.names, id_column=id_column, ignore=ignore,
                         chunk_rows=chunk_rows)
    try:
        writer = open_writer(out)
    except BaseException:
        reader.close()
        raise
    counts = {"accept": 0, "abstain": 0, "invalid": 0}
    bar = _Progress(reader) if progress else None
    try:
        for rows in reader:
            columns, valid = scorer.score(rows)
            writer.write(columns, valid, scorer.columns)
            decided = columns["decision"].tolist()
            for name in counts:
                counts[name] += decided.count(name)
            if bar is not None:
                bar.update(sum(counts.values()))
        if not sum(counts.values()):  # a header and no rows: an output with its header and no rows
            columns, valid = scorer.score(Rows(row=np.zeros(0, dtype=np.int64), x=np.zeros((0, 0)), bad=[],
                                               ids=[] if id_column else None))
            writer.write(columns, valid, scorer.columns)
        writer.commit()
    except BaseException:
        writer.abort()
        raise
    finally:
        reader.close()
        if bar is not None:
            bar.close()
    total = counts["accept"] + counts["abstain"] + counts["invalid"]
    return ScoreReport(rows=total, accepted=counts["accept"], abstained=counts["abstain"], invalid=counts["invalid"],
                       queued=scorer.queued, seconds=time.perf_counter() - t0, out=str(out))


class _Progress:
    """One line on stderr, redrawn at most 4 times a second: rows scored, rows/s and the
    share of the file read (bytes for CSV, rows for Parquet)."""

    def __init__(self, reader: Any) -> None:
        self._reader = reader
        self._t0 = self._last = time.monotonic()

    def update(self, rows: int) -> None:
        now = time.monotonic()
        if now - self._last < 0.25:
            return
        self._last = now
        total = self._reader.total_rows or self._reader.total_bytes
        share = f" {100.0 * self._reader.done() / total:5.1f}%" if total else ""
        rate = rows / max(now - self._t0, 1e-9)
        sys.stderr.write(f"\rdemur score:{share} {rows:,} rows ({rate:,.0f} rows/s)")
        sys.stderr.flush()

    def close(self) -> None:
        sys.stderr.write("\n")
        sys.stderr.flush()


# --- the command ------------------------------------------------------------------------


def register(subparsers: Any) -> None:
    """Add ``demur score`` to the ``demur`` command."""
    p = subparsers.add_parser(
        "score",
        help="decide every row of a CSV or Parquet file offline with the served rule",
        description="Score a file of cases with a bundle: one output row per input row with the decision, "
                    "reason, prediction, probabilities or mean, interval, entropies, score and threshold, "
                    "decided exactly as the server decides. demur supports, never replaces, qualified human "
                    "judgement.",
    )
    p.add_argument("bundle", help="bundle directory (demur export's output)")
    p.add_argument("--data", required=True, help="input file: .csv or .parquet, columns named like the features")
    p.add_argument("--out", required=True, help="output file: .csv or .parquet")
    p.add_argument("--id", dest="id_column", default=None, help="column to pass through as each row's id")
    p.add_argument("--ignore", action="append", default=[], metavar="COLUMN",
                   help="a column of the input to skip (repeat for several)")
    p.add_argument("--enqueue", default=None, metavar="STORE_URL",
                   help="send abstentions to this review store (sqlite:///PATH or postgresql://...), with the id")
    p.add_argument("--config", default=None, help="the server's TOML config (graph, score, threshold, ...): "
                                                  "the rule it sets is the rule applied")
    p.add_argument("--chunk-rows", type=int, default=DEFAULT_CHUNK_ROWS,
                   help=f"rows per graph run; bounds memory (default {DEFAULT_CHUNK_ROWS})")
    p.add_argument("--cluster", default=None, metavar="ADDRESS",
                   help="score on a Dask cluster: tcp://HOST:PORT, or local:N for N worker processes here; "
                        "--data is then a Parquet or CSV path or glob the workers read, --out a directory of "
                        "Parquet files (pip install 'demur[cluster]')")
    p.add_argument("--quiet", action="store_true", help="no progress line even on a terminal")
    p.set_defaults(func=_main)


def _main(args: argparse.Namespace) -> int:
    flags: dict[str, Any] = {"bundle": args.bundle}
    if args.enqueue:
        flags["review_store"] = args.enqueue
    config = build_config(file=args.config, env=os.environ, flags=flags)
    if args.cluster:
        return _on_cluster(args, config)
    review = None
    if args.enqueue:
        review = _review_router(config)
    try:
        report = score_file(config, args.data, args.out, id_column=args.id_column, ignore=args.ignore,
                            review=review, chunk_rows=args.chunk_rows,
                            progress=not args.quiet and sys.stderr.isatty())
    finally:
        if review is not None:
            review.close()
    _print(report, queued=f", {report.queued:,} queued for review" if review is not None else "")
    return 0


def _on_cluster(args: argparse.Namespace, config: ServeConfig) -> int:
    """``--cluster``: the same scorer in every worker (demur.serve.offline.cluster)."""
    if args.enqueue:
        raise ConfigError("--enqueue works on one machine only; score on the cluster, then send the abstained "
                          "rows' file through demur score --enqueue", field="enqueue")
    from demur.serve.offline.cluster import connect, score_to_parquet

    with connect(args.cluster) as client:
        report = score_to_parquet(args.data, args.bundle, args.out, id_column=args.id_column, config=config,
                                  client=client)
    _print(report, queued="")
    return 0


def _print(report: ScoreReport, queued: str) -> None:
    where = f"{report.out} ({report.partitions} files)" if report.partitions > 1 else report.out
    print(f"demur score: {report.rows:,} rows -> {where}: {report.accepted:,} accepted, "
          f"{report.abstained:,} abstained, {report.invalid:,} invalid{queued} "
          f"({report.seconds:.1f} s, {report.rows_per_s:,.0f} rows/s)", file=sys.stderr)
    if report.abstained:
        print(f"demur score: {CAUTION}", file=sys.stderr)


def _review_router(config: ServeConfig) -> Any:
    """The review queue at ``config.review_store_url``: every abstention, no audit sample
    (accepted rows of a backlog are not the live traffic an audit estimates), the server's
    backlog ceiling. No spool: an abstention the store does not take says so in ``review``;
    a store that does not answer at the start stops the run (``ReviewStoreUnavailable``)."""
    from demur.serve.review.router import ReviewRouter
    from demur.serve.review.store import open_store

    store = open_store(config.review_store_url, lease_s=config.review_lease_s)
    try:
        store.ping()  # a store that cannot be reached is refused before the first row, not row by row
    except BaseException:
        store.close()
        raise
    return ReviewRouter(store, None, audit_fraction=0.0, max_pending=config.review_max_pending)
