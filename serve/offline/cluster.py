"""Scoring on a Dask cluster: the same ``Scorer`` as ``demur score``, once per worker process.

Why Dask (README, "Scoring files", has the measurement): it is pure Python, installs from
PyPI in seconds (``pip install 'demur[cluster]'``), reads Parquet natively (through the
pyarrow that the Parquet extra brings anyway) and runs on the Python platforms teams
already have (a laptop's ``LocalCluster``, Kubernetes, YARN, HPC batch queues), with no
JVM. Each partition is scored by ``Scorer.score`` (serve/offline/scoring.py), which
decides with ``Runtime.answer_request``: the server's pipeline, so a row scored on the
cluster gets the decision the server gives it.

Each worker process loads the bundle once: a per-process cache keyed by (process id,
bundle path, bundle checksum, settings), filled inside the first task, so the
onnxruntime sessions open in the worker process after any fork or spawn, never in the
client. The bundle directory must be readable at the same path on every worker (a
shared volume); a worker that finds a different bundle there (another checksum) fails
its task instead of scoring with another model.

Output (``score_to_parquet``): one Parquet file per input partition, ``part-00000.parquet``
..., written to a temporary name and renamed, so a partition that is retried after its
worker died overwrites its own file and every row appears exactly once. Columns are
those of ``demur score`` with ``partition`` first; ``row`` counts from 1 within the
partition, and a bad row's reason reads ``partition 3 row 17 column 'px_r0c3' ...``.

Example::

    from dask.distributed import Client
    client = Client("tcp://scheduler:8786")
    report = score_to_parquet("s3-mounted/parcels/", "/shared/bundles/depot-digits", "/shared/scored/",
                              id_column="parcel_id")
"""

from __future__ import annotations

import os
import threading
import time
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np

from demur.serve.config import ServeConfig
from demur.serve.core.bundle import load_bundle
from demur.serve.errors import BundleError, ConfigError
from demur.serve.offline.scoring import DEFAULT_CHUNK_ROWS, Scorer, ScoreReport, output_columns
from demur.serve.offline.tables import arrow_rows, arrow_table

__all__ = ["CLUSTER_EXTRA", "connect", "score_frame", "score_partition", "score_to_parquet"]

CLUSTER_EXTRA = "pip install 'demur[cluster]'"

_SCORERS: dict[tuple[Any, ...], Scorer] = {}
_LOCK = threading.Lock()


def _dask() -> tuple[Any, Any]:
    try:
        import dask
        import dask.dataframe as dd
    except ImportError:
        raise ConfigError(f"scoring on a cluster needs dask, which is not installed; {CLUSTER_EXTRA}",
                          field="dask") from None
    return dask, dd


def _scorer(config: ServeConfig, checksum: str, id_column: str | None) -> Scorer:
    """This process's scorer for the bundle, loaded on first use (after any fork)."""
    key = (os.getpid(), config, checksum, id_column)
    with _LOCK:
        scorer = _SCORERS.get(key)
        if scorer is None:
            scorer = Scorer(config, id_column=id_column).start()
            found = scorer.live.model["checksum"]
            if found != checksum:
                raise BundleError(f"the bundle at {config.bundle} on this worker has checksum {found[:12]}; the "
                                  f"client scored with {checksum[:12]}: every worker must see the same bundle",
                                  field="bundle")
            _SCORERS[key] = scorer
    return scorer


@contextmanager
def connect(address: str) -> Iterator[Any]:
    """A Dask client for ``address``: ``tcp://host:port`` (an existing scheduler) or
    ``local:N`` (a cluster of N worker processes on this machine, one thread each, on
    127.0.0.1; closed on exit)."""
    _dask()
    from dask.distributed import Client, LocalCluster

    if address.startswith("local:"):
        try:
            workers = int(address[len("local:"):])
        except ValueError:
            workers = 0
        if workers < 1:
            raise ConfigError(f"--cluster local:N needs a number of workers N >= 1; got {address!r}", field="cluster")
        with LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                          dashboard_address="127.0.0.1:0") as local, Client(local) as client:
            yield client
        return
    try:
        client = Client(address, timeout=30)
    except (OSError, TimeoutError, ValueError) as exc:
        raise ConfigError(f"cannot reach the Dask scheduler at {address!r}: {exc}", field="cluster") from None
    with client:
        yield client


def score_partition(frame: Any, number: int, config: ServeConfig, checksum: str,
                    id_column: str | None = None) -> Any:
    """Score one pandas partition (number ``number``) -> a pandas DataFrame of the output
    columns with ``partition`` first, in graph runs of ``demur score``'s 1,024 rows (the
    summaries and the support check slow down on much larger batches: measured 2.6x per
    row at 2,500). Runs in the worker; public so a user can map it over partitions of
    another engine's frames."""
    import pyarrow as pa

    scorer = _scorer(config, checksum, id_column)
    names = scorer.live.manifest.inputs.names
    table = pa.Table.from_pandas(frame, preserve_index=False)
    kinds = {"partition": "int", **scorer.columns}
    pieces = []
    for start in range(0, max(table.num_rows, 1), DEFAULT_CHUNK_ROWS):  # demur score's batches
        rows = arrow_rows(table.slice(start, DEFAULT_CHUNK_ROWS), names, id_column, start + 1,
                          label=f"partition {number}")
        columns, valid = scorer.score(rows)
        columns = {"partition": np.full(rows.size, number, dtype=np.int64), **columns}
        pieces.append(arrow_table(columns, valid, kinds))
    return pa.concat_tables(pieces).to_pandas()


def _meta(config: ServeConfig, id_column: str | None, id_dtype: Any) -> Any:
    import pandas as pd

    manifest = load_bundle(config.bundle).manifest
    dtypes = {"int": "int64", "number": "float64", "text": "object", "id": id_dtype}
    kinds = {"partition": "int", **output_columns(manifest, id_column)}
    return pd.DataFrame({name: pd.Series([], dtype=dtypes[k]) for name, k in kinds.items()})


def _frame(data: Any, names: Sequence[str], id_column: str | None) -> Any:
    """A Dask DataFrame of the feature and id columns (other columns are not read): ``data``
    itself, or read from a Parquet path (file, directory or glob) or a CSV path or glob
    (cells read as text, so a bad cell makes a bad row, not a failed partition)."""
    _, dd = _dask()
    columns = [*names, *([id_column] if id_column else [])]
    if not isinstance(data, (str, os.PathLike)):
        missing = [c for c in columns if c not in data.columns]
        if missing:
            raise ConfigError(f"the frame lacks column(s) {', '.join(map(repr, missing[:8]))}", field="data")
        return data[columns]
    path = str(data)
    if path.lower().endswith(".csv"):
        return dd.read_csv(path, dtype=str, keep_default_na=False, usecols=columns)
    return dd.read_parquet(path, columns=columns)


def score_frame(data: Any, bundle: str | os.PathLike[str], *, id_column: str | None = None,
                config: ServeConfig | None = None) -> Any:
    """A lazy Dask DataFrame of scored rows (``map_partitions``; compute, persist or write
    it as any Dask frame). ``data``: a Dask DataFrame or a Parquet / CSV path."""
    config = (config or ServeConfig()).replace(bundle=str(bundle))
    loaded = load_bundle(config.bundle)
    frame = _frame(data, loaded.manifest.inputs.names, id_column)
    id_dtype = frame[id_column].dtype if id_column else "object"
    meta = _meta(config, id_column, id_dtype)
    return frame.map_partitions(_mapped, config=config, checksum=loaded.checksum, id_column=id_column, meta=meta)


def _mapped(frame: Any, partition_info: dict[str, Any] | None = None, **kw: Any) -> Any:
    number = int(partition_info["number"]) if partition_info else 0
    return score_partition(frame, number, kw["config"], kw["checksum"], kw["id_column"])


def _write(frame: Any, number: int, out: str, config: ServeConfig, checksum: str,
           id_column: str | None) -> tuple[int, int, int, int]:
    """Score partition ``number`` into ``out/part-NNNNN.parquet`` (temporary name, then an
    atomic rename: a retry overwrites). Returns (rows, accepted, abstained, invalid)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    scored = score_partition(frame, number, config, checksum, id_column)
    target = Path(out) / f"part-{number:05d}.parquet"
    tmp = target.with_name(f".{target.name}.partial-{os.getpid()}-{threading.get_ident()}")
    pq.write_table(pa.Table.from_pandas(scored, preserve_index=False), tmp)
    os.replace(tmp, target)
    decisions = scored["decision"]
    return (len(scored), int((decisions == "accept").sum()), int((decisions == "abstain").sum()),
            int((decisions == "invalid").sum()))


def score_to_parquet(data: Any, bundle: str | os.PathLike[str], out: str | os.PathLike[str], *,
                     id_column: str | None = None, config: ServeConfig | None = None,
                     client: Any = None) -> ScoreReport:
    """Score ``data`` (a Dask DataFrame, or a Parquet / CSV path the workers can read) with
    ``bundle`` on the Dask cluster of ``client`` (default: the current client), writing
    one Parquet file per partition into the directory ``out``. Files ``part-*.parquet``
    left there by an earlier run with more partitions, and the partial files of workers that
    died while writing, are removed at the end."""
    dask, _ = _dask()
    t0 = time.perf_counter()
    config = (config or ServeConfig()).replace(bundle=str(bundle))
    loaded = load_bundle(config.bundle)
    output_columns(loaded.manifest, id_column)  # an id named like an output column is refused here
    frame = _frame(data, loaded.manifest.inputs.names, id_column)
    target = Path(out)
    target.mkdir(parents=True, exist_ok=True)
    parts = frame.to_delayed()
    write = dask.delayed(_write, pure=False)
    tasks = [write(part, i, str(target), config, loaded.checksum, id_column) for i, part in enumerate(parts)]
    if client is None:
        from dask.distributed import get_client

        client = get_client()
    counts = client.gather(client.compute(tasks))
    for stale in target.glob("part-*.parquet"):
        if int(stale.stem.split("-")[1]) >= len(parts):
            stale.unlink()
    for partial in target.glob(".part-*.partial-*"):  # left by a worker that died while writing
        partial.unlink(missing_ok=True)
    rows, acc, abst, inv = (int(sum(c[k] for c in counts)) for k in range(4))
    return ScoreReport(rows=rows, accepted=acc, abstained=abst, invalid=inv, queued=0,
                       seconds=time.perf_counter() - t0, out=str(target), partitions=len(parts))
