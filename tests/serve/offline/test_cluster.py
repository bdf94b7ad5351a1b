"""serve/offline/cluster.py: scoring on a local Dask cluster of 2 worker processes, one of
them killed mid-run, gives every row exactly once and the decisions ``demur score`` gives.

External references: scikit-learn's bundled digits (``load_digits``) are the rows; Dask's
own ``LocalCluster`` (dask.distributed) is the cluster, on 127.0.0.1; pyarrow reads the
output back. The worker killed is a process this test started (its PID from
``Client.run(os.getpid)``).
"""

from __future__ import annotations

import os
import signal
import threading
import time
from pathlib import Path
from typing import Any

import pytest
from sklearn.datasets import load_digits

from demur.serve.config import ServeConfig
from demur.serve.offline.scoring import score_file

pa = pytest.importorskip("pyarrow")
pq = pytest.importorskip("pyarrow.parquet")
distributed = pytest.importorskip("dask.distributed")

from demur.serve.offline.cluster import score_frame, score_to_parquet  # noqa: E402

PARTITIONS = 16


def _write_parts(root: Path, names: list[str]) -> list[str]:
    """PARTITIONS Parquet files of the digits, each row with a unique id; partition 2 row 5
    has a null pixel. Returns every id."""
    x = load_digits().data
    root.mkdir()
    ids: list[str] = []
    for p in range(PARTITIONS):
        cols = {n: pa.array(x[:, j]) for j, n in enumerate(names)}
        if p == 2:
            cols[names[9]] = pa.array([None if i == 4 else float(v) for i, v in enumerate(x[:, 9])])
        part_ids = [f"p{p:02d}-{i:04d}" for i in range(len(x))]
        cols["parcel_id"] = pa.array(part_ids)
        pq.write_table(pa.table(cols), root / f"parcels-{p:02d}.parquet")
        ids += part_ids
    return ids


@pytest.fixture(scope="module")
def cluster() -> Any:
    """One local cluster for the module (the killed worker's nanny starts a new process)."""
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  dashboard_address="127.0.0.1:0") as local, distributed.Client(local) as client:
        yield client


def test_killed_worker_loses_and_duplicates_no_row(cluster: Any, tiny_bundle_factory: Any, tmp_path: Path) -> None:
    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    names = list(bundle.manifest.inputs.names)
    ids = _write_parts(tmp_path / "in", names)
    out = tmp_path / "scored"
    config = ServeConfig(seed=0)
    result: dict[str, Any] = {}

    def run() -> None:
        try:
            result["report"] = score_to_parquet(str(tmp_path / "in"), bundle.path, out, id_column="parcel_id",
                                                config=config, client=cluster)
        except BaseException as exc:  # reported below, in the test's thread
            result["error"] = exc

    runner = threading.Thread(target=run)
    runner.start()
    pids = cluster.run(os.getpid)
    killed = None
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and killed is None and runner.is_alive():
        busy = [addr for addr, keys in cluster.processing().items() if keys]
        if busy and len(list(out.glob("part-*.parquet"))) >= 1:
            killed = pids[busy[0]]
            os.kill(killed, signal.SIGKILL)
        time.sleep(0.01)
    runner.join(timeout=120)
    assert not runner.is_alive(), "the cluster run did not finish"
    assert "error" not in result, result.get("error")
    assert killed is not None, "the run ended before a worker could be killed; give it more rows"
    assert cluster.run(os.getpid).values() != pids.values()  # the nanny started a new process
    report = result["report"]
    assert report.partitions == PARTITIONS and report.rows == len(ids) and report.invalid == 1
    table = pq.read_table(sorted(out.glob("part-*.parquet")))
    got = table.column("parcel_id").to_pylist()
    assert len(got) == len(ids) and sorted(got) == sorted(ids)  # every row exactly once
    assert not list(out.glob(".*partial*"))
    bad = [r for r in table.to_pylist() if r["decision"] == "invalid"]
    assert [r["reason"] for r in bad] == [f"partition 2 row 5 column '{names[9]}' is empty; expected a number"]

    # the same rows through demur score on one machine: the same decisions and scores
    single = tmp_path / "single.parquet"
    score_file(config.replace(bundle=str(bundle.path)), tmp_path / "in" / "parcels-00.parquet", single,
               id_column="parcel_id")
    one = pq.read_table(single).to_pylist()
    first = [r for r in table.to_pylist() if r["partition"] == 0]
    assert [r["parcel_id"] for r in first] == [r["parcel_id"] for r in one]
    assert [r["decision"] for r in first] == [r["decision"] for r in one]
    assert [r["score"] for r in first] == [r["score"] for r in one]  # same 1,024-row graph runs: equal


def test_score_frame_is_a_lazy_dask_frame(cluster: Any, tiny_bundle_factory: Any, tmp_path: Path) -> None:
    import dask.dataframe as dd
    import pandas as pd

    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    names = list(bundle.manifest.inputs.names)
    x = load_digits().data[:100]
    frame = dd.from_pandas(pd.DataFrame(x, columns=names).assign(parcel_id=range(100)), npartitions=3)
    scored = score_frame(frame, bundle.path, id_column="parcel_id", config=ServeConfig(seed=0))
    assert list(scored.columns[:4]) == ["partition", "parcel_id", "row", "decision"]
    done = scored.compute()
    assert len(done) == 100 and done["parcel_id"].tolist() == list(range(100))
    assert set(done["decision"]) <= {"accept", "abstain"}
    # each worker process loaded the bundle once, however many partitions it scored
    loaded = cluster.run(lambda: [key[1:] for key in __import__("demur.serve.offline.cluster",
                                                                fromlist=["_SCORERS"])._SCORERS])
    per_worker = [sum(1 for key in keys if key[0].bundle == str(bundle.path)) for keys in loaded.values()]
    assert max(per_worker) == 1


def test_csv_on_the_cluster_reads_cells_as_text_so_a_bad_cell_is_a_bad_row(cluster: Any, tiny_bundle_factory: Any,
                                                                         tmp_path: Path) -> None:
    import csv

    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    names = list(bundle.manifest.inputs.names)
    x = load_digits().data[:60]
    (tmp_path / "in").mkdir()
    for p in range(2):
        with (tmp_path / "in" / f"parcels-{p}.csv").open("w", newline="") as fh:
            w = csv.writer(fh)
            w.writerow(["parcel_id", *names, "depot"])
            for i, row in enumerate(x[p * 30:(p + 1) * 30]):
                cells = [repr(float(v)) for v in row]
                if p == 1 and i == 2:
                    cells[5] = "seven"
                w.writerow([f"p{p}-{i}", *cells, "north"])
    report = score_to_parquet(str(tmp_path / "in" / "*.csv"), bundle.path, tmp_path / "out", id_column="parcel_id",
                              config=ServeConfig(seed=0), client=cluster)
    assert report.rows == 60 and report.invalid == 1 and report.partitions == 2
    table = pq.read_table(sorted((tmp_path / "out").glob("part-*.parquet")))
    bad = [r for r in table.to_pylist() if r["decision"] == "invalid"]
    assert [r["reason"] for r in bad] == [f"partition 1 row 3 column '{names[5]}' holds 'seven'; expected a number"]
    assert sorted(table.column("parcel_id").to_pylist()) == sorted(f"p{p}-{i}" for p in range(2) for i in range(30))


def test_cli_scores_on_a_local_cluster(tiny_bundle_factory: Any, tmp_path: Path, capsys: Any) -> None:
    from demur.serve.cli import main

    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    names = list(bundle.manifest.inputs.names)
    x = load_digits().data[:50]
    (tmp_path / "in").mkdir()
    cols = {n: pa.array(x[:, j]) for j, n in enumerate(names)} | {"parcel_id": pa.array(range(50))}
    pq.write_table(pa.table(cols), tmp_path / "in" / "parcels.parquet")
    out = tmp_path / "scored"
    assert main(["score", str(bundle.path), "--data", str(tmp_path / "in"), "--out", str(out), "--id", "parcel_id",
                 "--cluster", "local:1"]) == 0
    assert "50 rows" in capsys.readouterr().err
    assert pq.read_table(out).column("parcel_id").to_pylist() == list(range(50))
    assert main(["score", str(bundle.path), "--data", "x", "--out", "y", "--cluster", "local:zero"]) == 1
    assert "local:N needs a number of workers" in capsys.readouterr().err
    assert main(["score", str(bundle.path), "--data", "x", "--out", "y", "--cluster", "local:1",
                 "--enqueue", "sqlite:///q.sqlite3"]) == 1
    assert "--enqueue works on one machine only" in capsys.readouterr().err
