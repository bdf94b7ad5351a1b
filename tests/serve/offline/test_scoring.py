"""serve/offline/scoring.py: ``demur score`` decides a file's rows exactly as the server does.

External references: scikit-learn's bundled digits (``sklearn.datasets.load_digits``, the
UCI optical digits test set) and diabetes (``load_diabetes``) are the rows scored; the
server is the reference for every decision (``POST /v1/predict`` through the Flask test
client, the code path ``demur serve`` answers with); pyarrow's Parquet reader reads back
what the scorer wrote; scipy.stats.entropy (natural log) checks the entropy column.
"""

from __future__ import annotations

import csv
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from scipy.stats import entropy
from sklearn.datasets import load_diabetes, load_digits

from demur.serve.cli import main
from demur.serve.config import ServeConfig
from demur.serve.errors import ConfigError, InvalidInput
from demur.serve.offline.scoring import Scorer, output_columns, score_file
from demur.serve.review.store import open_store

pa = pytest.importorskip("pyarrow")
pq = pytest.importorskip("pyarrow.parquet")


def _digits_csv(path: Path, names: list[str], n: int, *, breakage: bool = True) -> list[str]:
    """load_digits rows as a CSV with an id column, the features in reverse order and an
    extra column; with ``breakage``, five rows are damaged and one is far outside the
    training range. Returns the ids."""
    data = load_digits().data[:n]
    ids = [f"parcel-{i:04d}" for i in range(n)]
    with path.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["parcel_id", *names[::-1], "depot"])
        for i, row in enumerate(data):
            cells = [repr(float(v)) for v in row[::-1]]
            if breakage:
                if i == 5:
                    cells[3] = "abc"
                elif i == 7:
                    cells[10] = ""
                elif i == 9:
                    cells = cells[:-1]
                elif i == 11:
                    cells[0] = "nan"
                elif i == 13:
                    cells[2] = "1e39"
                elif i == 15:
                    cells[1] = "1000.0"  # a number, but far outside the training range (0..16)
            w.writerow([ids[i], *cells, "north"])
    return ids


def _read(path: Path) -> list[dict[str, Any]]:
    if path.suffix == ".csv":
        with path.open(newline="") as fh:
            return list(csv.DictReader(fh))
    return pq.read_table(path).to_pylist()


def _server_results(make_app: Any, bundle: Any, cases: list[list[float]], chunk: int) -> list[dict[str, Any]]:
    """The server's answers for ``cases``, posted in the scorer's batches (stacked draws make
    each case's answer independent of its batch; same batches keep even the float32 order)."""
    client = make_app(bundle).test_client()
    out = []
    for start in range(0, len(cases), chunk):
        body = {"cases": cases[start:start + chunk]}
        r = client.post("/v1/predict", json=body)
        assert r.status_code == 200, r.get_json()
        out += r.get_json()["results"]
    return out


@pytest.mark.parametrize("suffix", [".csv", ".parquet"])
def test_scored_file_equals_the_servers_answers_row_by_row(tiny_bundle_factory: Any, make_app: Any,
                                                            tmp_path: Path, suffix: str) -> None:
    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    names = list(bundle.manifest.inputs.names)
    data = tmp_path / "parcels.csv"
    ids = _digits_csv(data, names, 150, breakage=False)
    out = tmp_path / f"scored{suffix}"
    config = ServeConfig(bundle=str(bundle.path), seed=0)
    report = score_file(config, data, out, id_column="parcel_id", ignore=["depot"], chunk_rows=64)
    rows = _read(out)
    assert report.rows == len(rows) == 150 and report.invalid == 0
    assert [r["parcel_id"] for r in rows] == ids
    cases = load_digits().data[:150].tolist()
    server = _server_results(make_app, bundle, cases, 64)
    for row, answer in zip(rows, server):
        assert row["decision"] == answer["decision"]
        assert row["reason"] == answer["reason"]
        assert row["prediction"] == answer["prediction"]
        assert float(row["score"]) == answer["score"]["value"]
        assert float(row["threshold"]) == answer["threshold"]
        assert row["model_checksum"] == bundle.checksum
        assert [float(row[f"p_{k}"]) for k in bundle.manifest.labels] == answer["mean"]
        assert [float(row[f"p_{k}_lower"]) for k in bundle.manifest.labels] == answer["interval"]["lower"]
        for key in ("predictive_entropy", "expected_entropy", "mutual_information"):
            assert float(row[key]) == answer["uncertainty"][key]
    # scipy.stats.entropy (natural log) of the mean probabilities is the predictive entropy
    probs = np.array([[float(r[f"p_{k}"]) for k in bundle.manifest.labels] for r in rows])
    np.testing.assert_allclose([float(r["predictive_entropy"]) for r in rows], entropy(probs, axis=1), rtol=1e-9)


def test_bad_rows_get_a_reason_naming_the_field_and_the_run_goes_on(tiny_bundle_factory: Any,
                                                                     tmp_path: Path) -> None:
    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    names = list(bundle.manifest.inputs.names)
    data = tmp_path / "parcels.csv"
    _digits_csv(data, names, 40)
    out = tmp_path / "scored.csv"
    report = score_file(ServeConfig(bundle=str(bundle.path), seed=0), data, out, id_column="parcel_id",
                        ignore=["depot"], chunk_rows=16)
    rows = _read(out)
    assert len(rows) == 40 and report.invalid == 5 and [int(r["row"]) for r in rows] == list(range(1, 41))
    reasons = {int(r["row"]): r["reason"] for r in rows if r["decision"] == "invalid"}
    rev = names[::-1]
    assert reasons == {
        6: f"row 6 column '{rev[3]}' holds 'abc'; expected a number",
        8: f"row 8 column '{rev[10]}' is empty; expected a number",
        10: "row 10 has 65 cells; the header has 66",
        12: f"row 12 column '{rev[0]}' is nan; expected a finite number",
        14: f"row 14 column '{rev[2]}' is 1e+39, outside the float32 range (about ±3.4e38)",
    }
    invalid = [r for r in rows if r["decision"] == "invalid"]
    assert all(r["p_0"] == "" and r["score"] == "" and r["prediction"] == "" for r in invalid)


def test_support_check_abstains_as_the_server_does(demo_bundle: Any, make_app: Any, tmp_path: Path) -> None:
    """The trained demo bundle carries a support record: a row far outside the training range
    abstains with the server's own reason (the support check runs before the score)."""
    names = list(demo_bundle.manifest.inputs.names)
    data = tmp_path / "parcels.csv"
    _digits_csv(data, names, 40)
    out = tmp_path / "scored.csv"
    score_file(ServeConfig(bundle=str(demo_bundle.path), seed=0), data, out, id_column="parcel_id",
               ignore=["depot"])
    outside = _read(out)[15]
    assert outside["decision"] == "abstain" and outside["reason"].startswith("outside_training_data")
    rev = names[::-1]
    case = dict(zip(rev, [float(v) for v in load_digits().data[15][::-1]])) | {rev[1]: 1000.0}
    server = make_app(demo_bundle).test_client().post("/v1/predict", json={"cases": [case]}).get_json()
    assert server["results"][0]["reason"] == outside["reason"]


def test_parquet_round_trip_keeps_types_ids_and_nulls(tiny_bundle_factory: Any, tmp_path: Path) -> None:
    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    names = list(bundle.manifest.inputs.names)
    x = load_digits().data[:30]
    columns: dict[str, Any] = {name: pa.array(x[:, j]) for j, name in enumerate(names)}
    columns[names[4]] = pa.array([None if i == 3 else float(v) for i, v in enumerate(x[:, 4])])
    columns["parcel_id"] = pa.array(np.arange(1000, 1030, dtype=np.int64))
    source = tmp_path / "parcels.parquet"
    pq.write_table(pa.table(columns), source, row_group_size=7)
    out = tmp_path / "scored.parquet"
    report = score_file(ServeConfig(bundle=str(bundle.path), seed=0), source, out, id_column="parcel_id",
                        chunk_rows=8)
    table = pq.read_table(out)
    assert report.rows == table.num_rows == 30 and report.invalid == 1
    assert table.schema.field("parcel_id").type == pa.int64()
    assert table.schema.field("p_3").type == pa.float64() and table.schema.field("row").type == pa.int64()
    assert table.column("parcel_id").to_pylist() == list(range(1000, 1030))
    bad = table.slice(3, 1).to_pylist()[0]
    assert bad["decision"] == "invalid" and bad["reason"] == f"row 4 column '{names[4]}' is empty; expected a number"
    assert bad["p_3"] is None and bad["score"] is None
    # the same rows from CSV give the same numbers (one reader per format, one pipeline)
    csv_in = tmp_path / "parcels.csv"
    import pyarrow.csv as pacsv

    pacsv.write_csv(pq.read_table(source), csv_in)
    again = tmp_path / "again.parquet"
    score_file(ServeConfig(bundle=str(bundle.path), seed=0), csv_in, again, id_column="parcel_id", chunk_rows=8)
    assert pq.read_table(again).column("score").to_pylist() == table.column("score").to_pylist()


def test_regression_bundle_writes_mean_interval_and_variances(diabetes_bundle: Any, tmp_path: Path) -> None:
    names = list(diabetes_bundle.manifest.inputs.names)
    x = load_diabetes(scaled=False).data[:20]
    data = tmp_path / "clinic.csv"
    with data.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(names)
        w.writerows(x.tolist())
    out = tmp_path / "scored.parquet"
    score_file(ServeConfig(bundle=str(diabetes_bundle.path), seed=0), data, out)
    rows = _read(out)
    assert set(output_columns(diabetes_bundle.manifest)) == set(rows[0])
    for r in rows:
        assert r["lower"] <= r["mean"] <= r["upper"] and r["prediction"] == r["mean"]
        assert r["epistemic_variance"] >= 0 and r["aleatoric_variance"] >= 0


def test_whole_file_problems_are_refused_up_front(tiny_bundle_factory: Any, tmp_path: Path) -> None:
    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    names = list(bundle.manifest.inputs.names)
    config = ServeConfig(bundle=str(bundle.path), seed=0)
    data = tmp_path / "parcels.csv"
    _digits_csv(data, names, 3)
    with pytest.raises(InvalidInput, match="unknown column\\(s\\) 'depot'"):
        score_file(config, data, tmp_path / "o.csv", id_column="parcel_id")
    with pytest.raises(InvalidInput, match="missing column\\(s\\) 'parcel'"):
        score_file(config, data, tmp_path / "o.csv", id_column="parcel", ignore=["depot", "parcel_id"])
    with pytest.raises(ConfigError, match="must end in .csv, .parquet or .pq"):
        score_file(config, data, tmp_path / "o.xlsx", id_column="parcel_id", ignore=["depot"])
    with pytest.raises(ConfigError, match="output column"):
        Scorer(config, id_column="score").start()
    assert not list(tmp_path.glob("*o.csv*"))  # nothing half-written


def test_cli_scores_and_enqueues_abstentions_with_the_row_id(tiny_bundle_factory: Any, tmp_path: Path,
                                                             capsys: Any) -> None:
    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    names = list(bundle.manifest.inputs.names)
    data = tmp_path / "parcels.csv"
    ids = _digits_csv(data, names, 60)
    store = tmp_path / "reviews.sqlite3"
    out = tmp_path / "scored.csv"
    status = main(["score", str(bundle.path), "--data", str(data), "--out", str(out), "--id", "parcel_id",
                   "--ignore", "depot", "--enqueue", f"sqlite:///{store}", "--chunk-rows", "25"])
    assert status == 0
    err = capsys.readouterr().err
    assert "60 rows" in err and "5 invalid" in err and "supports, never replaces" in err
    rows = _read(out)
    abstained = [r for r in rows if r["decision"] == "abstain"]
    assert abstained and all(r["review"] for r in abstained)
    assert all(r["review"] == "" for r in rows if r["decision"] != "abstain")
    queue = open_store(f"sqlite:///{store}", lease_s=60.0)
    try:
        assert queue.counts()["pending"] == len(abstained)
        for r in abstained:
            item = queue.get(r["review"])
            assert item.client_case_id == r["parcel_id"] and item.kind == "abstain"
            assert item.prediction == r["prediction"]
    finally:
        queue.close()
    # scoring the file again queues nothing twice: the store keys items by (case id, model)
    assert main(["score", str(bundle.path), "--data", str(data), "--out", str(out), "--id", "parcel_id",
                 "--ignore", "depot", "--enqueue", f"sqlite:///{store}", "--quiet"]) == 0
    queue = open_store(f"sqlite:///{store}", lease_s=60.0)
    try:
        assert queue.counts()["pending"] == len(abstained)
    finally:
        queue.close()
    assert set(r["parcel_id"] for r in abstained) <= set(ids)


def test_cli_refusals_name_the_problem(tiny_bundle_factory: Any, tmp_path: Path, capsys: Any) -> None:
    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    assert main(["score", str(tmp_path / "nope"), "--data", "x.csv", "--out", "y.csv"]) == 1
    assert "demur score:" in capsys.readouterr().err
    assert main(["score", str(bundle.path), "--data", str(tmp_path / "missing.csv"), "--out", "y.csv"]) == 1
    assert "no such file" in capsys.readouterr().err


def test_image_bundle_rows_are_reshaped_as_the_server_does(tiny_bundle_factory: Any, make_app: Any,
                                                           tmp_path: Path) -> None:
    """A conv net's input is [1, 8, 8]: a file row of 64 named pixels is the case the server
    gets as an 8x8 grid."""
    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8, arch="conv")
    names = list(bundle.manifest.inputs.names)
    data = tmp_path / "parcels.csv"
    _digits_csv(data, names, 20, breakage=False)
    out = tmp_path / "scored.parquet"
    score_file(ServeConfig(bundle=str(bundle.path), seed=0), data, out, id_column="parcel_id", ignore=["depot"])
    rows = _read(out)
    grids = [np.asarray(v).reshape(8, 8).tolist() for v in load_digits().data[:20]]
    server = _server_results(make_app, bundle, grids, 1024)
    assert [r["decision"] for r in rows] == [a["decision"] for a in server]
    assert [r["prediction"] for r in rows] == [a["prediction"] for a in server]
    assert [r["score"] for r in rows] == [a["score"]["value"] for a in server]


@pytest.mark.postgres
def test_enqueue_to_postgresql(tiny_bundle_factory: Any, tmp_path: Path, capsys: Any) -> None:
    """--enqueue with the real PostgreSQL on 127.0.0.1 (the store several servers share)."""
    from tests.serve._review_helpers import PG_URL, pg_schema, require_postgres, with_schema

    require_postgres()
    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    data = tmp_path / "parcels.csv"
    _digits_csv(data, list(bundle.manifest.inputs.names), 30, breakage=False)
    with pg_schema("demur_score") as schema:
        url = with_schema(PG_URL, schema)
        out = tmp_path / "scored.csv"
        assert main(["score", str(bundle.path), "--data", str(data), "--out", str(out), "--id", "parcel_id",
                     "--ignore", "depot", "--enqueue", url, "--quiet"]) == 0
        abstained = [r for r in _read(out) if r["decision"] == "abstain"]
        queue = open_store(url, lease_s=60.0)
        try:
            assert abstained and queue.counts()["pending"] == len(abstained)
            assert {queue.get(r["review"]).client_case_id for r in abstained} == {r["parcel_id"] for r in abstained}
        finally:
            queue.close()
    assert "queued for review" in capsys.readouterr().err


@pytest.mark.parametrize("suffix", [".csv", ".parquet"])
def test_a_file_with_a_header_and_no_rows_gives_an_empty_output(tiny_bundle_factory: Any, tmp_path: Path,
                                                                 suffix: str) -> None:
    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    data = tmp_path / "empty.csv"
    data.write_text(",".join(["parcel_id", *bundle.manifest.inputs.names]) + "\n")
    out = tmp_path / f"scored{suffix}"
    report = score_file(ServeConfig(bundle=str(bundle.path), seed=0), data, out, id_column="parcel_id")
    assert report.rows == 0 and _read(out) == []
    if suffix == ".parquet":
        assert pq.read_schema(out).names == list(output_columns(bundle.manifest, "parcel_id"))


def test_with_a_queue_an_id_the_store_cannot_hold_makes_its_row_invalid(tiny_bundle_factory: Any,
                                                                        tmp_path: Path) -> None:
    """The server refuses such case ids with a 400 naming the field; a file row gets the reason."""
    from demur.serve.offline.scoring import _review_router

    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    names = list(bundle.manifest.inputs.names)
    data = tmp_path / "parcels.csv"
    x = load_digits().data[:4]
    with data.open("w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["parcel_id", *names])
        for cid, row in zip(["ok-1", "nul\x00here", "x" * 201, ""], x):
            w.writerow([cid, *row.tolist()])
    config = ServeConfig(bundle=str(bundle.path), seed=0, review_store=f"sqlite:///{tmp_path / 'q.sqlite3'}")
    router = _review_router(config)
    try:
        score_file(config, data, tmp_path / "scored.csv", id_column="parcel_id", review=router)
    finally:
        router.close()
    rows = _read(tmp_path / "scored.csv")
    assert [r["decision"] == "invalid" for r in rows] == [False, True, True, False]
    assert rows[1]["reason"].startswith("row 2: 'parcel_id' holds the NUL character, U+0000 at position 3")
    assert rows[2]["reason"] == "row 3: 'parcel_id' must have 1 to 200 characters; got 201"


def test_progress_line_only_when_asked(tiny_bundle_factory: Any, tmp_path: Path, capsys: Any) -> None:
    """The CLI asks for it only on a terminal (``sys.stderr.isatty()``); the line shows the
    share of the file read and rows/s, redrawn in place."""
    from demur.serve.offline.scoring import _Progress

    class Reader:
        total_rows, total_bytes = 200, None

        def done(self) -> int:
            return 50

    bar = _Progress(Reader())
    bar._last -= 1.0  # as if the last redraw were a second ago
    bar.update(50)
    bar.close()
    assert capsys.readouterr().err.startswith("\rdemur score:  25.0% 50 rows (")
    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    data = tmp_path / "parcels.csv"
    _digits_csv(data, list(bundle.manifest.inputs.names), 10, breakage=False)
    score_file(ServeConfig(bundle=str(bundle.path), seed=0), data, tmp_path / "o.csv", id_column="parcel_id",
               ignore=["depot"])
    assert capsys.readouterr().err == ""


def test_an_unreachable_review_store_stops_the_run_before_any_row(tiny_bundle_factory: Any, tmp_path: Path,
                                                                   capsys: Any) -> None:
    from tests.serve._review_helpers import free_port

    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    data = tmp_path / "parcels.csv"
    _digits_csv(data, list(bundle.manifest.inputs.names), 5, breakage=False)
    out = tmp_path / "scored.csv"
    url = f"postgresql://postgres@127.0.0.1:{free_port()}/test"
    assert main(["score", str(bundle.path), "--data", str(data), "--out", str(out), "--id", "parcel_id",
                 "--ignore", "depot", "--enqueue", url, "--quiet"]) == 1
    assert "demur score: no PostgreSQL connection for the review store" in capsys.readouterr().err
    assert not out.exists()


def test_a_row_the_graph_cannot_carry_gets_its_reason_and_the_chunk_is_scored(tiny_bundle_factory: Any,
                                                                                tmp_path: Path,
                                                                                monkeypatch: Any) -> None:
    """A row whose draws come back NaN (an overflow; here forced by wrapping the real engine, as in
    tests/serve/web/test_output_not_finite.py) is ``invalid`` with the reason; the other rows of its
    chunk are decided as the server decides them."""
    import demur.serve.offline.scoring as scoring
    from tests.serve.web.test_output_not_finite import _Overflowing

    real = scoring.engine_loader
    monkeypatch.setattr(scoring, "engine_loader", lambda config: (lambda p: _Overflowing(real(config)(p))))
    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    names = list(bundle.manifest.inputs.names)
    data = tmp_path / "parcels.csv"
    with open(data, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(names)
        for i in range(6):
            w.writerow([3e38 if (i == 3 and j == 0) else 1.0 for j in range(len(names))])
    out = tmp_path / "scored.csv"
    report = score_file(ServeConfig(bundle=str(bundle.path), seed=0), data, out, chunk_rows=16)
    rows = _read(out)
    assert report.invalid == 1 and [r["decision"] == "invalid" for r in rows] == [False] * 3 + [True] + [False] * 2
    assert rows[3]["reason"].startswith("row 4: the model's output is not a finite number")
    assert all(r["p_0"] != "" for i, r in enumerate(rows) if i != 3)
