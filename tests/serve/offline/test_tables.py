"""serve/offline/tables.py: files of cases read in chunks, every bad row named, never a crash.

External references: Python's csv module (RFC 4180 dialect) writes the inputs; pyarrow
writes and reads the Parquet files; Unicode 15 section 3.9 (lone surrogates are not
scalar values, so invalid UTF-8 cannot be decoded as such) for the hostile bytes.
"""

from __future__ import annotations

import csv
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from demur.serve.errors import ConfigError
from demur.serve.offline.tables import open_reader, open_writer

pa = pytest.importorskip("pyarrow")
pq = pytest.importorskip("pyarrow.parquet")

NAMES = ["a", "b", "c"]


def _all(reader: Any) -> tuple[np.ndarray, list[Any], list[Any]]:
    chunks = list(reader)
    reader.close()
    return (np.concatenate([c.x for c in chunks]), [b for c in chunks for b in c.bad],
            [i for c in chunks for i in (c.ids or [])])


def test_hostile_csv_cells_become_row_reasons(tmp_path: Path) -> None:
    path = tmp_path / "hostile.csv"
    lines = [b"id,a,b,c", b"r1,1,2,3", b"r2,1\x002,2,3", b"r3,\xff\xfe,2,3", b"r4," + b"9" * 200_000 + b",2,3",
             b"\xed\xa0\x80id,1,2,3", b"r6,1e3, 2 ,-0", b"", b"r7,1,2,inf", b"r8,1,2,3"]
    path.write_bytes(b"\r\n".join(lines) + b"\r\n")
    x, bad, ids = _all(open_reader(path, NAMES, id_column="id", chunk_rows=3))
    assert len(bad) == 8  # the blank line is not a row
    assert bad[0] is None and x[0].tolist() == [1.0, 2.0, 3.0]
    assert bad[1] == "row 2 column 'a' holds '1\\x002'; expected a number"
    assert bad[2] == "row 3 column 'a' holds '\ufffd\ufffd'; expected a number"
    assert bad[3].startswith("row 4 could not be read as CSV: field larger than field limit")
    assert bad[4] is None and ids[4].endswith("id")  # an id of invalid UTF-8 passes through, replaced
    assert bad[5] is None and x[5].tolist() == [1000.0, 2.0, -0.0]
    assert bad[6] == "row 7 column 'c' is inf; expected a finite number"
    assert bad[7] is None and ids[7] == "r8"


def test_parquet_columns_of_other_types_name_the_column(tmp_path: Path) -> None:
    path = tmp_path / "typed.parquet"
    pq.write_table(pa.table({"a": pa.array([1, 2, None], type=pa.int32()), "b": pa.array(["1.5", "x", " "]),
                             "c": pa.array([True, False, True])}), path)
    x, bad, _ = _all(open_reader(path, NAMES))
    assert bad[0] == "row 1 column 'c' holds true/false values; expected numbers"
    assert bad[1] == "row 2 column 'b' holds 'x'; expected a number (and 1 more bad cell)"
    assert bad[2] == "row 3 column 'a' is empty; expected a number (and 2 more bad cells)"
    assert x[0, :2].tolist() == [1.0, 1.5]


def test_both_csv_writers_read_back_to_the_same_numbers(tmp_path: Path) -> None:
    values = np.array([0.1 + 0.2, 1e-5, -3.0, 2.0 ** -30])
    valid = np.array([True, True, False, True])
    kinds = {"id": "id", "row": "int", "decision": "text", "score": "number"}
    columns = {"id": ["a,b", None, "c", 'd"e'], "row": np.arange(1, 5), "decision": ["accept", "abstain", "invalid",
                                                                                      "accept"], "score": values}
    read = []
    for arrow in (False, True):
        writer = open_writer(tmp_path / f"out-{arrow}.csv", arrow=arrow)
        writer.write(columns, valid, kinds)
        writer.commit()
        with (tmp_path / f"out-{arrow}.csv").open(newline="") as fh:
            read.append(list(csv.DictReader(fh)))
    plain, fast = read
    assert [float(r["score"]) if r["score"] else None for r in plain] == [values[0], values[1], None, values[3]]
    assert [r["score"] and float(r["score"]) for r in plain] == [r["score"] and float(r["score"]) for r in fast]
    assert [r["id"] for r in plain] == ["a,b", "", "c", 'd"e'] == [r["id"] for r in fast]


def test_parquet_without_pyarrow_is_refused_naming_the_extra(tmp_path: Path, monkeypatch: Any) -> None:
    path = tmp_path / "x.parquet"
    path.write_bytes(b"PAR1")
    monkeypatch.setitem(sys.modules, "pyarrow", None)
    monkeypatch.setitem(sys.modules, "pyarrow.parquet", None)
    with pytest.raises(ConfigError, match=r"pip install 'demur\[parquet\]'"):
        open_reader(path, NAMES)
    with pytest.raises(ConfigError, match=r"demur\[parquet\]"):
        open_writer(tmp_path / "out.parquet")
    writer = open_writer(tmp_path / "out.csv")  # CSV still works, through the csv module
    writer.abort()


def test_pandas_stored_index_is_not_a_column_to_refuse(tmp_path: Path) -> None:
    """pandas (DataFrame.to_parquet) stores a non-default unnamed index as the column
    '__index_level_0__' (pandas metadata convention); it is no feature and no typo."""
    pd = pytest.importorskip("pandas")
    path = tmp_path / "frame.parquet"
    pd.DataFrame({"a": [1.0, 2.0], "b": [3.0, 4.0], "c": [5.0, 6.0]}, index=[10, 20]).to_parquet(path)
    assert "__index_level_0__" in pq.ParquetFile(path).schema_arrow.names
    x, bad, _ = _all(open_reader(path, NAMES))
    assert bad == [None, None] and x.tolist() == [[1.0, 3.0, 5.0], [2.0, 4.0, 6.0]]
