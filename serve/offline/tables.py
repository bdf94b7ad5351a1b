"""Files of cases, read and written in chunks: CSV (standard library) and Parquet (pyarrow).

The boundary of ``demur score`` (serve/offline/scoring.py) and of the cluster scorer
(serve/offline/cluster.py): a file's cells become ``Rows`` (raw feature values in the
bundle's feature order, float64[n, F], plus a reason for each row that cannot be
scored), read ``chunk_rows`` at a time (Parquet: fetched ``READ_ROWS`` at a time and
sliced) so memory stays bounded whatever the file's size. Columns are matched by name in any order; a column that is neither a feature,
the id column nor ignored is refused before any row is read (a typo must not pass
silently).

A bad row never stops the run: a cell that is empty (or null), not a number, NaN or
infinite, or beyond the float32 range, and a CSV line with the wrong number of cells,
give that row a reason naming the row and the column (``row 17 column 'px_r0c3' is
empty; expected a number``). Rows are numbered from 1, header excluded (the file's
data rows in order; blank CSV lines are not rows).

Parquet needs pyarrow (``pip install 'demur[parquet]'``); without it a Parquet path is
refused with that message, and CSV works as before.
"""

from __future__ import annotations

import csv
import difflib
import io
import os
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from itertools import islice
from operator import itemgetter
from pathlib import Path
from typing import Any

import numpy as np

from demur.serve.core.bundle import F32_LIMIT
from demur.serve.errors import ConfigError, InvalidInput

__all__ = [
    "FORMATS",
    "PARQUET_EXTRA",
    "READ_ROWS",
    "ROW_GROUP_ROWS",
    "Rows",
    "TableReader",
    "TableWriter",
    "arrow_rows",
    "arrow_table",
    "check_header",
    "file_format",
    "open_reader",
    "open_writer",
    "require_pyarrow",
]

FORMATS = {".csv": "csv", ".parquet": "parquet", ".pq": "parquet"}
"""File suffix -> format."""

PARQUET_EXTRA = "pip install 'demur[parquet]'"

ROW_GROUP_ROWS = 65_536
"""Rows per Parquet row group written: chunks are gathered to this size (about 20 MB for
the digits' 42 output columns), because a row group per 1,024-row chunk keeps a growing
footer in memory (measured: 707 MB peak RSS over 7.2 million rows) and makes files that
readers scan slowly."""

READ_ROWS = 8192
"""Rows a Parquet reader fetches per call and then slices into chunks (about 4 MB for 64
float64 features): reading is bounded by this or the chunk, whichever is larger."""

_OK, _EMPTY, _TEXT, _NONFINITE, _RANGE, _TYPE = range(6)


@dataclass(frozen=True)
class Rows:
    """One chunk of a file, ready for the pipeline.

    ``row``: int64[n], each row's number in the file (1 = first data row);
    ``x``: float64[n, F] raw feature values in the bundle's order (anything in a bad row);
    ``bad``: per row None or the reason it cannot be scored (naming row and column);
    ``ids``: the id column's values as read (text for CSV, the column's own type for
    Parquet), or None when no id column was named.
    """

    row: np.ndarray
    x: np.ndarray
    bad: list[str | None]
    ids: list[Any] | None

    @property
    def size(self) -> int:
        return int(self.row.shape[0])


def file_format(path: str | os.PathLike[str], field: str) -> str:
    """"csv" or "parquet" from the suffix; ``ConfigError`` naming ``field`` otherwise."""
    suffix = Path(path).suffix.lower()
    if suffix not in FORMATS:
        raise ConfigError(f"{field} {str(path)!r} must end in .csv, .parquet or .pq; got {suffix or 'no suffix'!r}",
                          field=field)
    return FORMATS[suffix]


def require_pyarrow() -> Any:
    """The pyarrow module, or ``ConfigError`` saying which extra installs it."""
    try:
        import pyarrow
        import pyarrow.parquet  # noqa: F401
    except ImportError:
        raise ConfigError(f"Parquet files need pyarrow, which is not installed; {PARQUET_EXTRA}",
                          field="pyarrow") from None
    return pyarrow


def check_header(header: Sequence[str], names: Sequence[str], *, id_column: str | None,
                 ignore: Sequence[str], where: str) -> None:
    """Refuse a header that lacks a feature or the id column, repeats a column, or has a
    column that is neither a feature, the id nor ignored; every problem in one message."""
    counts: dict[str, int] = {}
    for h in header:
        counts[h] = counts.get(h, 0) + 1
    wanted = [*names, *([id_column] if id_column else [])]
    known = set(wanted) | set(ignore)
    missing = [n for n in wanted if n not in counts]
    unknown = [h for h in counts if h not in known]
    repeated = [h for h, c in counts.items() if c > 1 and h in set(wanted)]
    if not (missing or unknown or repeated):
        return
    parts = []
    if missing:
        parts.append(f"missing column(s) {_listed(missing)}")
    if unknown:
        shown = []
        for u in unknown[:8]:
            near = difflib.get_close_matches(u, list(names), n=1)
            shown.append(f"{_clip(u)!r} (did you mean {near[0]!r}?)" if near else repr(_clip(u)))
        parts.append(f"unknown column(s) {', '.join(shown)}{' ...' if len(unknown) > 8 else ''}")
    if repeated:
        parts.append(f"repeated column(s) {_listed(repeated)}")
    raise InvalidInput(
        f"the header of {where} does not match the bundle's {len(names)} feature names: {'; '.join(parts)}. "
        "Columns are matched by name, in any order (inputs.names in the bundle's manifest.json lists them); "
        "name the id column with --id and columns to skip with --ignore COLUMN",
        field=_clip((missing or unknown or repeated)[0]))


# --- reading ----------------------------------------------------------------------------


class TableReader:
    """Iterate a file's ``Rows`` in chunks. ``total_rows`` (Parquet) or ``total_bytes``
    (CSV) and ``done()`` (rows or bytes read so far) drive a progress display."""

    total_rows: int | None = None
    total_bytes: int | None = None

    def __iter__(self) -> Iterator[Rows]:
        raise NotImplementedError

    def done(self) -> int:
        raise NotImplementedError

    def close(self) -> None:
        return None


def open_reader(path: str | os.PathLike[str], names: Sequence[str], *, id_column: str | None = None,
                ignore: Sequence[str] = (), chunk_rows: int = 1024) -> TableReader:
    """A chunked reader of the CSV or Parquet file at ``path`` (header checked at once)."""
    p = Path(path)
    kind = file_format(p, "data")
    if not p.is_file():
        raise ConfigError(f"no such file: {str(p)!r}", field="data")
    if kind == "parquet":
        return _ParquetReader(p, names, id_column, ignore, chunk_rows)
    return _CsvReader(p, names, id_column, ignore, chunk_rows)


class _CsvReader(TableReader):
    def __init__(self, path: Path, names: Sequence[str], id_column: str | None, ignore: Sequence[str],
                 chunk_rows: int) -> None:
        self._raw = path.open("rb")
        # bytes that are not UTF-8 read as U+FFFD: the cell is then refused as a number (its
        # row gets the reason) or passed through as an id, and the run goes on
        self._text = io.TextIOWrapper(self._raw, encoding="utf-8-sig", errors="replace", newline="")
        self._reader = csv.reader(self._text)
        self.total_bytes = path.stat().st_size
        header = next((row for row in self._reader if any(c.strip() for c in row)), None)
        if header is None:
            self.close()
            raise InvalidInput(f"{path} is empty: expected a header row naming the columns", field="data")
        header = [h.strip() for h in header]
        try:
            check_header(header, names, id_column=id_column, ignore=ignore, where=str(path))
        except InvalidInput:
            self.close()
            raise
        self._names = list(names)
        self._width = len(header)
        cols = [header.index(n) for n in names]
        self._get = itemgetter(*cols) if len(cols) > 1 else (lambda row, _c=cols[0]: (row[_c],))
        self._id = header.index(id_column) if id_column else None
        self._chunk = chunk_rows
        self._next_row = 1

    def done(self) -> int:
        return self._raw.tell()

    def close(self) -> None:
        self._text.close()

    def __iter__(self) -> Iterator[Rows]:
        while True:
            lines = list(islice(self._lines(), self._chunk))
            if not lines:
                return
            yield self._rows(lines)

    def _lines(self) -> Iterator[list[str] | str]:
        """Non-blank lines as lists of cells, or the csv module's complaint about a line it
        cannot read (a cell over its size limit, 128 KiB): that row's reason, and on."""
        while True:
            try:
                cells = next(self._reader)
            except StopIteration:
                return
            except csv.Error as exc:
                yield f"could not be read as CSV: {exc}"
                continue
            if cells and any(c.strip() for c in cells):
                yield cells

    def _rows(self, lines: list[list[str] | str]) -> Rows:
        n = len(lines)
        first = self._next_row
        self._next_row += n
        row = np.arange(first, first + n, dtype=np.int64)
        bad: list[str | None] = [None] * n
        fits = [i for i, cells in enumerate(lines) if not isinstance(cells, str) and len(cells) == self._width]
        for i, cells in enumerate(lines):
            if isinstance(cells, str):
                bad[i], lines[i] = f"row {first + i} {cells}", []
            elif len(cells) != self._width:
                bad[i] = f"row {first + i} has {len(cells)} cells; the header has {self._width}"
        x = np.zeros((n, len(self._names)), dtype=np.float64)
        if fits:
            text = list(map(self._get, (lines[i] for i in fits)))
            x[fits] = _text_numbers(text, row[fits], self._names, bad, fits)
        ids = None
        if self._id is not None:
            j = self._id
            ids = [cells[j] if len(cells) > j else None for cells in lines]
        return Rows(row=row, x=x, bad=bad, ids=ids)


def _text_numbers(text: list[tuple[str, ...]], rows: np.ndarray, names: Sequence[str],
                  bad: list[str | None], where: list[int]) -> np.ndarray:
    """float64[m, F] from cells of text; a bad cell's row gets its reason in ``bad[where[i]]``.
    One C-level conversion for the whole chunk; cell by cell only when that fails."""
    try:
        x = np.array(text, dtype=np.float64).reshape(len(text), len(names))
        codes = None
    except ValueError:
        x = np.zeros((len(text), len(names)), dtype=np.float64)
        codes = np.zeros(x.shape, dtype=np.int8)
        shown: dict[tuple[int, int], str] = {}
        for i, cells in enumerate(text):
            try:
                x[i] = np.array(cells, dtype=np.float64)
                continue
            except ValueError:
                pass
            for j, cell in enumerate(cells):
                try:
                    x[i, j] = float(cell)
                except ValueError:
                    codes[i, j] = _EMPTY if not cell.strip() else _TEXT
                    shown[(i, j)] = cell
        _reasons(x, codes, rows, names, bad, where, shown)
        return x
    _reasons(x, codes, rows, names, bad, where, {})
    return x


def _reasons(x: np.ndarray, codes: np.ndarray | None, rows: np.ndarray, names: Sequence[str],
             bad: list[str | None], where: Sequence[int], shown: dict[tuple[int, int], Any],
             types: dict[int, str] | None = None) -> None:
    """Mark non-finite and out-of-range cells in ``codes``, then write one reason per bad row
    (the first bad column named, with how many more)."""
    finite = np.isfinite(x)
    if codes is None:
        if finite.all() and (x.size == 0 or np.abs(x).max() < F32_LIMIT):
            return
        codes = np.zeros(x.shape, dtype=np.int8)
    codes[(codes == _OK) & ~finite] = _NONFINITE
    with np.errstate(invalid="ignore"):
        codes[(codes == _OK) & (np.abs(x) >= F32_LIMIT)] = _RANGE
    for i in np.flatnonzero(codes.any(axis=1)).tolist():
        cols = np.flatnonzero(codes[i]).tolist()
        j = cols[0]
        name, code = names[j], int(codes[i, j])
        if code == _EMPTY:
            what = "is empty; expected a number"
        elif code == _TEXT:
            what = f"holds {_clip(str(shown[(i, j)]))!r}; expected a number"
        elif code == _NONFINITE:
            what = f"is {x[i, j]}; expected a finite number"
        elif code == _RANGE:
            what = f"is {x[i, j]:.3g}, outside the float32 range (about ±3.4e38)"
        else:
            what = f"holds {(types or {}).get(j, 'values')}; expected numbers"
        more = f" (and {len(cols) - 1} more bad cell{'s' if len(cols) > 2 else ''})" if len(cols) > 1 else ""
        bad[where[i]] = f"row {int(rows[i])} column {name!r} {what}{more}"


class _ParquetReader(TableReader):
    def __init__(self, path: Path, names: Sequence[str], id_column: str | None, ignore: Sequence[str],
                 chunk_rows: int) -> None:
        require_pyarrow()
        import pyarrow.parquet as pq

        try:
            self._file = pq.ParquetFile(path)
        except Exception as exc:  # pyarrow's ArrowInvalid / OSError: not a Parquet file
            raise InvalidInput(f"{path} is not a readable Parquet file: {exc}", field="data") from None
        header = list(self._file.schema_arrow.names)
        pandas_index = [h for h in header if h.startswith("__index_level_")]  # pandas' stored row index
        check_header(header, names, id_column=id_column, ignore=[*ignore, *pandas_index], where=str(path))
        self.total_rows = int(self._file.metadata.num_rows)
        self._names = list(names)
        self._id = id_column
        self._chunk = chunk_rows
        self._next_row = 1

    def done(self) -> int:
        return self._next_row - 1

    def close(self) -> None:
        self._file.close()

    def __iter__(self) -> Iterator[Rows]:
        columns = [*self._names, *([self._id] if self._id else [])]
        # read READ_ROWS at a time and hand out zero-copy slices of ``chunk_rows``: a call of
        # iter_batches costs about as much for 1,024 rows as for 8,192 (measured: 26 ms against
        # 10 ms for 20,000 rows of 65 columns in 1,024- and 4,096-row reads)
        for batch in self._file.iter_batches(batch_size=max(self._chunk, READ_ROWS), columns=columns):
            for start in range(0, batch.num_rows, self._chunk):
                rows = arrow_rows(batch.slice(start, self._chunk), self._names, self._id, self._next_row)
                self._next_row += rows.size
                yield rows


def arrow_rows(batch: Any, names: Sequence[str], id_column: str | None, first_row: int,
               label: str = "row") -> Rows:
    """``Rows`` from a pyarrow RecordBatch or Table (Parquet chunks, Dask partitions):
    numeric columns convert in C; text columns are parsed as CSV cells are; nulls, bools
    and other types give their rows a reason. ``label`` prefixes row numbers in reasons."""
    n = batch.num_rows
    row = np.arange(first_row, first_row + n, dtype=np.int64)
    shown: dict[tuple[int, int], Any] = {}
    types: dict[int, str] = {}
    x = _float64_block(batch, names)
    codes = None
    if x is None:
        x, codes = _column_by_column(batch, names, shown, types)
    bad: list[str | None] = [None] * n
    _reasons(x, codes if codes is not None and codes.any() else None, row, names, bad, range(n), shown, types)
    if label != "row":
        bad = [b.replace("row ", f"{label} row ", 1) if b else b for b in bad]
    ids = batch.column(id_column).to_pylist() if id_column else None
    return Rows(row=row, x=x, bad=bad, ids=ids)


def _column_by_column(batch: Any, names: Sequence[str], shown: dict[tuple[int, int], Any],
                      types: dict[int, str]) -> tuple[np.ndarray, np.ndarray]:
    """(float64[n, F] values, int8[n, F] codes) of any column types: numbers cast, text parsed,
    nulls and other types coded (their cells in ``shown``, type names in ``types``)."""
    import pyarrow as pa
    import pyarrow.types as pt

    n = batch.num_rows
    x = np.zeros((n, len(names)), dtype=np.float64)
    codes = np.zeros(x.shape, dtype=np.int8)
    for j, name in enumerate(names):
        col = batch.column(name)
        if isinstance(col, pa.ChunkedArray):
            col = col.combine_chunks()
        kind = col.type
        nulls = col.is_null().to_numpy(zero_copy_only=False) if col.null_count else None
        if pt.is_integer(kind) or pt.is_floating(kind) or pt.is_decimal(kind):
            x[:, j] = col.cast(pa.float64()).to_numpy(zero_copy_only=False)
        elif pt.is_string(kind) or pt.is_large_string(kind) or pt.is_dictionary(kind):
            for i, cell in enumerate(col.to_pylist()):
                if cell is None:
                    continue
                try:
                    x[i, j] = float(cell)
                except ValueError:
                    codes[i, j] = _EMPTY if not cell.strip() else _TEXT
                    shown[(i, j)] = cell
        else:
            codes[:, j] = _TYPE
            types[j] = f"{kind} values" if not pt.is_boolean(kind) else "true/false values"
        if nulls is not None:
            codes[nulls & (codes[:, j] == _OK), j] = _EMPTY
            x[nulls, j] = 0.0
    return x, codes


def _float64_block(batch: Any, names: Sequence[str]) -> np.ndarray | None:
    """float64[n, F] of the feature columns in one conversion when every one is float64 without
    nulls (the common file: measured 0.16 ms against 1.9 ms column by column for 1,024 rows of
    64 features), else None (the caller converts and checks column by column)."""
    import pyarrow as pa

    features = batch.select(list(names))
    if not names or any(t != pa.float64() for t in features.schema.types):
        return None
    try:
        return np.asarray(features.to_tensor(row_major=True), dtype=np.float64).reshape(batch.num_rows, len(names))
    except pa.ArrowTypeError:  # nulls: named cell by cell by the caller
        return None


# --- writing ----------------------------------------------------------------------------


class TableWriter:
    """Write scored chunks to a temporary file beside ``path``; ``commit()`` moves it into
    place (an interrupted run leaves no half-written output under the final name)."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self.tmp = path.with_name(f".{path.name}.partial-{os.getpid()}")

    def write(self, columns: dict[str, Any], valid: np.ndarray, kinds: dict[str, str]) -> None:
        """Append one chunk: ``columns`` name -> values (float64 arrays for numbers, lists or
        object arrays otherwise), ``valid`` bool[n], ``kinds`` name -> "id" | "int" |
        "text" | "number" (serve/offline/scoring.py, ``output_columns``)."""
        raise NotImplementedError

    def _close(self) -> None:
        raise NotImplementedError

    def commit(self) -> None:
        self._close()
        os.replace(self.tmp, self.path)

    def abort(self) -> None:
        try:
            self._close()
        finally:
            self.tmp.unlink(missing_ok=True)


def open_writer(path: str | os.PathLike[str], *, arrow: bool | None = None) -> TableWriter:
    """A writer for ``path`` (.csv or .parquet by suffix); its directory must exist.

    CSV is written by pyarrow when it is installed (``arrow=None``; formatting floats in
    C++ is about 6x faster than the csv module, measured on 37 columns) and by the
    standard library otherwise (``arrow=False`` forces it). Both write numbers in their
    shortest round-trip form, so either file reads back to the same float64 values."""
    p = Path(path)
    kind = file_format(p, "out")
    if not p.parent.is_dir():
        raise ConfigError(f"the directory of --out {str(p)!r} does not exist", field="out")
    if p.is_dir():
        raise ConfigError(f"--out {str(p)!r} is a directory; give a file name", field="out")
    if kind == "parquet":
        require_pyarrow()
        return _ArrowWriter(p, "parquet")
    if arrow is None:
        try:
            require_pyarrow()
            arrow = True
        except ConfigError:
            arrow = False
    return _ArrowWriter(p, "csv") if arrow else _CsvWriter(p)


class _CsvWriter(TableWriter):
    def __init__(self, path: Path) -> None:
        super().__init__(path)
        self._fh = self.tmp.open("w", newline="", encoding="utf-8")
        self._csv = csv.writer(self._fh)
        self._header = False

    def write(self, columns: dict[str, Any], valid: np.ndarray, kinds: dict[str, str]) -> None:
        if not self._header:
            self._csv.writerow(list(columns))
            self._header = True
        invalid = np.flatnonzero(~valid).tolist()
        cells = []
        for name, values in columns.items():
            values = values.tolist() if isinstance(values, np.ndarray) else list(values)
            if invalid and kinds[name] == "number":
                for i in invalid:
                    values[i] = ""
            cells.append(values)
        self._csv.writerows(zip(*cells))

    def _close(self) -> None:
        if not self._fh.closed:
            self._fh.close()


class _ArrowWriter(TableWriter):
    """Parquet, or CSV through pyarrow's writer; the schema is fixed by the first chunk."""

    def __init__(self, path: Path, kind: str) -> None:
        super().__init__(path)
        self._kind = kind
        self._writer: Any = None
        self._schema: Any = None
        self._pending: list[Any] = []
        self._pending_rows = 0

    def write(self, columns: dict[str, Any], valid: np.ndarray, kinds: dict[str, str]) -> None:
        table = arrow_table(columns, valid, kinds)
        if self._kind == "parquet":  # row groups of ROW_GROUP_ROWS, not one per chunk
            self._pending.append(table)
            self._pending_rows += table.num_rows
            if self._pending_rows >= ROW_GROUP_ROWS:
                self._flush()
            return
        self._put(table)

    def _flush(self) -> None:
        if self._pending:
            import pyarrow as pa

            self._put(pa.concat_tables(self._pending))
            self._pending, self._pending_rows = [], 0

    def _put(self, table: Any) -> None:
        if self._writer is None:
            if self._kind == "parquet":
                import pyarrow as pa
                import pyarrow.parquet as pq

                # dictionary pages for text and ids only: float columns of probabilities rarely
                # repeat, and trying a dictionary on them cost ~20% of the write (measured)
                text = [f.name for f in table.schema if not pa.types.is_floating(f.type)]
                self._writer = pq.ParquetWriter(self.tmp, table.schema, use_dictionary=text)
            else:
                import pyarrow.csv as pacsv

                self._writer = pacsv.CSVWriter(self.tmp, table.schema)
            self._schema = table.schema
        self._writer.write_table(table.cast(self._schema))

    def commit(self) -> None:
        self._flush()
        super().commit()

    def _close(self) -> None:
        if self._writer is not None:
            self._writer.close()
            self._writer = None


def arrow_table(columns: dict[str, Any], valid: np.ndarray, kinds: dict[str, str]) -> Any:
    """A pyarrow Table of scored columns: numbers float64 (null in invalid rows), text
    string, row int64, the id column as its values' own type (string when all are null)."""
    import pyarrow as pa

    mask = ~valid if not valid.all() else None
    arrays = {}
    for name, values in columns.items():
        kind = kinds[name]
        if kind == "number":
            arrays[name] = pa.array(values, type=pa.float64(), mask=mask)
        elif kind == "int":
            arrays[name] = pa.array(values, type=pa.int64())
        elif kind == "text":
            arrays[name] = pa.array(list(values), type=pa.string())
        else:
            ids = pa.array(values.tolist() if isinstance(values, np.ndarray) else list(values))
            arrays[name] = ids.cast(pa.string()) if pa.types.is_null(ids.type) else ids
    return pa.table(arrays)


def _listed(items: Sequence[str], most: int = 8) -> str:
    shown = ", ".join(repr(_clip(i)) for i in items[:most])
    return shown + (f" and {len(items) - most} more" if len(items) > most else "")


def _clip(text: str, limit: int = 40) -> str:
    return text if len(text) <= limit else text[: limit - 1] + "…"
