"""Readers: one export file (CSV, Parquet, Excel; wide or long) into raw tag samples.

A reader opens its file read-only, reads only the columns it needs and returns a
:class:`RawTable`: the time column as stored, each wanted tag's values as numbers (``NaN``
where a cell holds no value), its quality texts if any, and the 1-based line (CSV) or row
(Parquet, Excel) of every sample, so that every later message can point at the file.

A cell holds no value when it is empty, null or one of the ``no_value`` texts.  A cell that
holds a NaN (the text "nan" in any case, or a NaN stored in a Parquet float column) is a
value that is not a number: it is ``NaN`` too, and marked in the tag's ``nan`` mask, so the
data layer counts it as its own reason.  Infinite values ("inf", "-inf", "Infinity", a
number beyond the float range) stay infinite.
"""

from __future__ import annotations

import difflib
import hashlib
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from graybox.data.spec import ReadOptions
from graybox.data.frames import FRAME_WORD, FrameSource, blank_texts, frame_columns
from graybox.errors import DataError


# a tag's rows of its table: positions in recorded order, or a slice (start, stop and step all
# given) when they are evenly spaced, as in a wide table or a long one that cycles through its tags
Rows = np.ndarray | slice


@dataclass(frozen=True)
class TagRaw:
    """One tag's rows from one file, in recorded order."""

    tag: str
    values: np.ndarray  # float, NaN = no value in that cell (or not a number: see ``nan``)
    quality: np.ndarray | None  # quality code per row (into the experiment's QualityVocab), or None
    rows: Rows  # positions into the table's time column
    nan: np.ndarray | None = None  # True where the cell held a NaN value (not a blank); None: none did


def take_rows(arr: np.ndarray, rows: Rows) -> np.ndarray:
    """``arr`` at ``rows``, as a contiguous array of its own (a slice is copied, not viewed:
    every later pass over a strided view would touch a cache line per sample)."""
    return arr[rows] if isinstance(rows, np.ndarray) else arr[rows].copy()


def row_at(rows: Rows, i: int) -> int:
    """The position of the ``i``-th of ``rows``."""
    return int(rows[i]) if isinstance(rows, np.ndarray) else range(rows.start, rows.stop, rows.step)[i]


def row_positions(rows: Rows) -> np.ndarray:
    """The table row positions a ``Rows`` selection (slice-like range or index array) names, as an array."""
    return rows if isinstance(rows, np.ndarray) else np.arange(rows.start, rows.stop, rows.step)


def row_count(rows: Rows) -> int:
    """How many rows a ``Rows`` selection (slice-like range or index array) names."""
    return rows.size if isinstance(rows, np.ndarray) else len(range(rows.start, rows.stop, rows.step))


@dataclass(frozen=True)
class RawTable:
    """One file as read, before conversion: its path, the word for its rows in messages
    (``line`` or ``row``), each row's 1-based line/row number, the raw time column (None for
    a static table), each tag's raw values, the columns it has and its time column."""

    path: Path
    word: str  # "line" or "row"
    numbers: np.ndarray  # 1-based line/row number of each table row
    time: pd.Series | None  # raw time column (None for a static table)
    tags: dict[str, TagRaw]
    columns: tuple[str, ...]  # the tag names (long) or column names (wide) the file has
    time_column: str | None

    def place(self, i: int, column: str) -> str:
        """Where row ``i`` of ``column`` is, for messages: file, line/row number and column."""
        return f"{self.path} {self.word} {int(self.numbers[i])} column '{column}'"


_HASH_BLOCK = 1 << 22


def file_sha256(path: Path) -> str:
    """The file's SHA-256 digest, read in 4 MiB blocks: the digest runs on a second thread,
    and every block hands Python's lock back and forth once (hashlib.file_digest's 256 KiB
    blocks made the thread reading the samples wait for it hundreds of times a file)."""
    if isinstance(path, FrameSource):
        return path.sha256()
    h = hashlib.sha256()
    buf = bytearray(_HASH_BLOCK)
    view = memoryview(buf)
    with open(path, "rb", buffering=0) as fh:  # read-only
        while n := fh.readinto(buf):
            h.update(view[:n])
    return h.hexdigest()


def file_format(path: Path, opts: ReadOptions) -> str:
    """The file's format: the declared one, else from its ending (``.parquet``/``.pq``
    parquet, ``.xlsx``/``.xlsm`` excel, anything else csv)."""
    if opts.file_format:
        return opts.file_format
    suffix = path.suffix.lower()
    if suffix in (".parquet", ".pq"):
        return "parquet"
    if suffix in (".xlsx", ".xlsm"):
        return "excel"
    return "csv"


def read_table(path: Path, opts: ReadOptions, time_column: str | None, wanted: dict[str, str | None],
               text_time: bool, vocab: QualityVocab | None = None, after_parse=None) -> RawTable:
    """Read one file.  ``wanted`` maps each tag the experiment needs to its quality column
    (wide layout) or None; tags absent from this file are simply not in the result (several
    files may feed one experiment).  ``text_time``: keep the time column as text.
    ``after_parse()`` is called once the file's text has been parsed into columns."""
    nan_cells: dict[str, np.ndarray] = {}  # stored NaNs apart from empty cells (Parquet floats only)
    fmt = None if isinstance(path, FrameSource) else file_format(path, opts)
    if fmt is None:  # a DataFrame in place of a file (graybox.data.frames)
        frame, word, numbers, header = _frame_frame(path, opts, time_column, wanted)
    elif fmt == "csv":
        frame, word, numbers, header = _csv_frame(path, opts, time_column, wanted, text_time)
    elif fmt == "parquet":
        frame, word, numbers, header, nan_cells = _parquet_frame(path, opts, time_column, wanted)
    else:
        frame, word, numbers, header = _excel_frame(path, opts, time_column, wanted)
    if after_parse is not None:
        after_parse()
    return _to_raw(path, frame, word, numbers, opts, time_column, wanted, header, vocab or QualityVocab(),
                   nan_cells)


# -- the three storage formats ---------------------------------------------------------------
def _needed_columns(header: list[str], opts: ReadOptions, time_column: str | None, wanted: dict) -> list[str]:
    if opts.layout == "long":
        cols = [opts.tag_column, opts.value_column] + ([opts.quality_column] if opts.quality_column else [])
    else:
        cols = [t for t in wanted if t in header]
        cols += [q for t, q in wanted.items() if q and t in header]
    if time_column:
        cols = [time_column] + cols
    return list(dict.fromkeys(cols))


def _require_columns(path: Path, header: list[str], needed: list[str], opts: ReadOptions, where_word: str) -> None:
    for col in needed:
        if col not in header:
            close = difflib.get_close_matches(col, header, n=3, cutoff=0.5)
            hint = (f"did you mean {', '.join(repr(c) for c in close)}? " if close else "") + \
                f"its columns: {', '.join(repr(h) for h in header[:12])}{' ...' if len(header) > 12 else ''}"
            if len(header) == 1 and any(d in header[0] for d in ";,\t|"):
                hint += f"; the header looks like one column: is the delimiter '{opts.delimiter}' right?"
            raise DataError(f"no column '{col}' in the {where_word}", where=str(path), hint=hint)


def _skip_rows(opts: ReadOptions) -> int | list[int] | None:
    """Lines to skip: the leading ones as a count (pandas' fast path), a list only when lines
    between the header and the data are skipped too."""
    if opts.skip_after_header:
        return list(range(opts.header_row - 1)) + [opts.header_row + k for k in range(opts.skip_after_header)]
    return opts.header_row - 1 or None


def _csv_frame(path: Path, opts: ReadOptions, time_column, wanted, text_time):
    if path.stat().st_size == 0:
        raise DataError("the file is empty", where=str(path), hint="export the data again")
    common = dict(sep=opts.delimiter, decimal=opts.decimal, encoding=opts.encoding, skiprows=_skip_rows(opts),
                  header=0, keep_default_na=False, na_values=list(opts.no_value), skip_blank_lines=False)
    try:  # pandas opens the path read-only; a path (not a handle) keeps its C reader on raw bytes
        raw_cols = pd.read_csv(path, nrows=0, **common).columns
        header = [str(c).strip() for c in raw_cols]
    except pd.errors.EmptyDataError:
        raise DataError("the file is empty" if opts.header_row == 1 else
                        f"the file ends before its header line {opts.header_row}", where=str(path),
                        hint="export the data again, or check header_row") from None
    except UnicodeDecodeError as exc:
        raise DataError(f"the file is not {opts.encoding} text (byte {exc.start})", where=str(path),
                        hint="set encoding = \"cp1252\", \"latin-1\" or \"utf-16\" to match the export") from None
    except pd.errors.ParserError as exc:
        raise DataError(f"the file cannot be read as delimited text: {exc}", where=str(path)) from None
    needed = _needed_columns(header, opts, time_column, wanted)
    _require_columns(path, header, needed, opts, f"header (line {opts.header_row})")
    first_data_line = opts.header_row + opts.skip_after_header + 1
    # no dtype is forced: pandas reads text columns as text anyway, and forcing it is slower;
    # numbers in a text column (quality codes, tag numbers) are normalized later
    try:
        strip_map = {str(c).strip(): c for c in raw_cols}
        usecols = [strip_map[c] for c in needed]
        every = len(usecols) == len(raw_cols) and len(set(raw_cols)) == len(raw_cols)
        frame = pd.read_csv(path, usecols=None if every else usecols, **common)  # usecols costs ~60%
    except UnicodeDecodeError as exc:
        raise DataError(f"the file is not {opts.encoding} text (byte {exc.start})", where=str(path),
                        hint="set encoding to match the export") from None
    except pd.errors.ParserError as exc:
        raise DataError(f"the file cannot be read as delimited text: {exc}", where=str(path),
                        hint="check delimiter and quoting") from None
    frame.columns = [str(c).strip() for c in frame.columns]
    numbers = np.arange(len(frame), dtype=np.int64) + first_data_line
    return frame, "line", numbers, header


def _frame_frame(source: FrameSource, opts: ReadOptions, time_column, wanted):
    """A DataFrame's needed columns, as a file's reader gives them (see graybox.data.frames)."""
    frame, numbers, header = frame_columns(source, time_column)
    needed = _needed_columns(header, opts, time_column, wanted)
    _require_columns(source.label, header, needed, opts, "frame's columns")
    return blank_texts(frame, needed, opts.no_value), FRAME_WORD, numbers, header


def _parquet_frame(path: Path, opts: ReadOptions, time_column, wanted):
    import pyarrow.parquet as pq

    try:
        with open(path, "rb") as fh:
            pf = pq.ParquetFile(fh)
            header = list(pf.schema_arrow.names)
            needed = _needed_columns(header, opts, time_column, wanted)
            _require_columns(path, header, needed, opts, "Parquet schema")
            table = pf.read(columns=needed)
            nan_cells = _stored_nans(table)
            frame = table.to_pandas()
    except DataError:
        raise
    except Exception as exc:  # noqa: BLE001 - pyarrow raises ArrowInvalid, OSError, ...
        raise DataError(f"the file cannot be read as Parquet: {exc}", where=str(path)) from None
    return frame, "row", np.arange(len(frame), dtype=np.int64) + 1, header, nan_cells


def _stored_nans(table) -> dict[str, np.ndarray]:
    """Per float column of an arrow table that stores a NaN (not a null): where it does.
    pandas turns nulls into NaN too; these masks keep a stored NaN apart from an empty cell."""
    import pyarrow as pa
    import pyarrow.compute as pc

    out = {}
    for name, col in zip(table.column_names, table.columns):
        if pa.types.is_floating(col.type) and len(col):
            hit = pc.fill_null(pc.is_nan(col), False)
            if pc.any(hit).as_py():
                out[name] = hit.to_numpy(zero_copy_only=False).astype(bool)
    return out


def _excel_frame(path: Path, opts: ReadOptions, time_column, wanted):
    import openpyxl

    try:
        wb = openpyxl.load_workbook(path, read_only=True, data_only=True)
    except Exception as exc:  # noqa: BLE001 - zip, xml and openpyxl errors
        raise DataError(f"the file cannot be read as an Excel workbook: {exc}", where=str(path)) from None
    try:
        if opts.sheet is not None:
            if opts.sheet not in wb.sheetnames:
                close = difflib.get_close_matches(opts.sheet, wb.sheetnames, n=1)
                raise DataError(f"no sheet '{opts.sheet}'", where=str(path),
                                hint=(f"did you mean '{close[0]}'? " if close else "") +
                                f"its sheets: {', '.join(wb.sheetnames)}")
            ws = wb[opts.sheet]
        else:
            ws = wb.worksheets[0]
        rows = list(ws.iter_rows(values_only=True))
    finally:
        wb.close()
    where = f"{path} sheet '{ws.title}'"
    if len(rows) < opts.header_row or all(v is None for v in rows[opts.header_row - 1]):
        raise DataError("the sheet is empty" if not rows else f"no header in row {opts.header_row}", where=where,
                        hint="check the sheet and header_row")
    header = [str(v).strip() if v is not None else "" for v in rows[opts.header_row - 1]]
    needed = _needed_columns(header, opts, time_column, wanted)
    _require_columns(Path(where), header, needed, opts, f"header (row {opts.header_row})")
    first = opts.header_row + opts.skip_after_header
    body = rows[first:]
    pos = [header.index(c) for c in needed]
    data = {c: pd.Series([r[p] if p < len(r) else None for r in body], dtype=object) for c, p in zip(needed, pos)}
    frame = pd.DataFrame(data)
    no_value = set(opts.no_value)
    frame = frame.map(lambda v: None if isinstance(v, str) and v.strip() in no_value else v)
    return frame, "row", np.arange(len(frame), dtype=np.int64) + first + 1, header


# -- columns into tag samples ------------------------------------------------------------------
NAN_TEXTS = ("nan", "+nan", "-nan")  # compared in lower case: a value that is not a number


def to_numbers(col: pd.Series, decimal: str, describe) -> tuple[np.ndarray, np.ndarray | None]:
    """Float values of a value column (``NaN`` for blank cells) and where a cell held the
    text "nan" (any case; None when none did); a DataError naming the line for the first
    other text that is not a number.  ``describe(i)`` locates row ``i``."""
    if pd.api.types.is_numeric_dtype(col.dtype) and not pd.api.types.is_bool_dtype(col.dtype):
        return col.to_numpy(dtype=float, na_value=np.nan), None
    text = col.astype("str").str.strip()
    blank = col.isna().to_numpy() | (text == "").to_numpy()
    if decimal == ",":
        text = text.str.replace(".", "", regex=False).str.replace(",", ".", regex=False)
    nums = pd.to_numeric(text.where(~blank), errors="coerce")
    bad = nums.isna().to_numpy() & ~blank
    nan = None
    if bad.any():
        nan = bad & text.str.lower().isin(NAN_TEXTS).to_numpy()
        bad &= ~nan
        if not nan.any():
            nan = None
    if bad.any():
        i = int(np.argmax(bad))
        raise DataError(f"'{col.iloc[i]}' is not a number", where=describe(i),
                        hint="fix the cell, or list that text in no_value if it means 'no sample'")
    return nums.to_numpy(dtype=float, na_value=np.nan), nan


class QualityVocab:
    """The quality texts met so far (normalized), numbered: flags travel as int32 codes into
    this list, shared by every file of an experiment (so codes compare across files)."""

    def __init__(self):
        self.texts: list[str] = []
        self._index: dict[str, int] = {}

    def code(self, text: str) -> int:
        """The code of a normalized quality text (numbered on first sight)."""
        if text not in self._index:
            self._index[text] = len(self.texts)
            self.texts.append(text)
        return self._index[text]

    def codes_of(self, col: pd.Series) -> np.ndarray:
        """A quality column as int32 codes into :attr:`texts` (each distinct value normalized
        once; a missing cell gets the code of the blank text)."""
        from graybox.data.config import normalize_quality

        from graybox.data.columns import text_codes, text_runs

        if pd.api.types.is_string_dtype(col.dtype) and (runs := text_runs(col)) is not None:
            lengths, values = runs  # a flag column is one value for long stretches
            return np.repeat(np.array([self.code(normalize_quality(u)) for u in values], np.int32), lengths)
        if col.isna().any() or not pd.api.types.is_string_dtype(col.dtype):
            codes, uniq = pd.factorize(col, sort=False)
        else:
            codes, uniq = text_codes(col, runs=False)  # no runs: looked for above
        table = np.array([self.code(normalize_quality(u)) for u in uniq] + [self.code("")], dtype=np.int32)
        return table[codes]  # code -1 (missing) maps to the blank flag


def _drop_empty_rows(frame: pd.DataFrame, numbers: np.ndarray, nan_cells: dict[str, np.ndarray]):
    """The rows with any cell holding something (a stored NaN is a value), their numbers,
    and the NaN masks cut to them."""
    empty = np.ones(len(frame), bool)
    for name in frame.columns:  # column by column: most columns of most files have no blank cell
        col_empty = frame[name].isna().to_numpy()
        if name in nan_cells:
            col_empty = col_empty & ~nan_cells[name]  # a stored NaN is a value
        empty &= col_empty
        if not empty.any():
            return frame, numbers, nan_cells
    kept = frame.loc[~empty].reset_index(drop=True)
    return kept, numbers[~empty], {k: m[~empty] for k, m in nan_cells.items()}


def _either(a: np.ndarray | None, b: np.ndarray | None) -> np.ndarray | None:
    if a is None:
        return b
    return a if b is None else a | b


def _tag_codes(tag_col: pd.Series, wanted) -> tuple[np.ndarray, list[str]]:
    """Each row's tag as a code into the (stripped) tag names of the file.  When every row
    holds one of the wanted tags, exactly as written, they are looked up in that short list
    (about twice as fast as hashing the column); otherwise every distinct text is coded."""
    from graybox.data.columns import arrow_text, text_codes

    arr = arrow_text(tag_col)
    if arr is not None and arr.null_count == 0 and wanted:
        import pyarrow as pa
        import pyarrow.compute as pc

        names = list(wanted)
        idx = pc.index_in(arr, value_set=pa.array(names, pa.string()))
        if idx.null_count == 0:
            codes = idx.to_numpy(zero_copy_only=False)
            present = np.flatnonzero(np.bincount(codes, minlength=len(names)))
            if present.size == len(names):
                return codes, names
            renumber = np.full(len(names), -1, np.int32)
            renumber[present] = np.arange(present.size)
            return renumber[codes], [names[k] for k in present]
    codes, names = text_codes(tag_col)
    return codes, [str(n).strip() for n in names]


def _tag_groups(tag_col: pd.Series, wanted) -> tuple[list[Rows], list[str]]:
    """The file's (stripped) tag names and each one's rows in recorded order."""
    from graybox.data.columns import periodic_texts

    if isinstance(tag_col.dtype, pd.CategoricalDtype):  # dictionary-encoded (Parquet): the cycle checked on codes
        codes, names = np.asarray(tag_col.cat.codes), [str(n).strip() for n in tag_col.cat.categories]
        return _periodic(codes, len(names)) or _grouped(codes, len(names)), names
    if not pd.api.types.is_string_dtype(tag_col.dtype) or tag_col.dtype == object:
        tag_col = tag_col.astype("str")
    period = periodic_texts(tag_col)
    if period is not None:  # every stamp lists every tag in one order: no lookup, no sort
        n, p = len(tag_col), len(period)
        return [slice(j, n, p) for j in range(p)], [t.strip() for t in period]
    codes, names = _tag_codes(tag_col, wanted)
    return _grouped(codes, len(names)), names


def _grouped(codes: np.ndarray, n_names: int) -> list[Rows]:
    """Each code's rows in recorded order (rows with code -1, not wanted, are left out)."""
    small = codes.astype(np.int16) if n_names < 32000 and codes.itemsize > 2 else codes  # radix-sorted
    order = np.argsort(small, kind="stable")
    bounds = np.cumsum(np.bincount(small.astype(np.intp) + 1, minlength=n_names + 1))
    return [order[bounds[k]:bounds[k + 1]] for k in range(n_names)]


def _periodic(codes: np.ndarray, n_names: int) -> list[slice] | None:
    """:func:`_grouped` without a sort when the codes cycle through every name in one order
    (row ``r`` holds the code of row ``r % n_names``): code ``k``'s rows are every
    ``n_names``-th from its place in the first cycle.  None otherwise."""
    n = codes.size
    if n_names < 2 or n % n_names or n < 4 * n_names:
        return None
    first = codes[:n_names]
    if first.min() < 0 or np.unique(first).size != n_names:
        return None
    if not np.array_equal(codes.reshape(-1, n_names), np.broadcast_to(first, (n // n_names, n_names))):
        return None
    place = np.argsort(first)  # place[k]: where code k sits in each cycle
    return [slice(int(place[k]), n, n_names) for k in range(n_names)]


def _to_raw(path: Path, frame: pd.DataFrame, word: str, numbers: np.ndarray, opts: ReadOptions,
            time_column: str | None, wanted: dict[str, str | None], header: list[str],
            vocab: QualityVocab, nan_cells: dict[str, np.ndarray] | None = None) -> RawTable:
    frame, numbers, nan_cells = _drop_empty_rows(frame, numbers, nan_cells or {})
    if len(frame) == 0:
        raise DataError("the file has a header but no data rows", where=str(path), hint="export the data again")

    def locate(column):
        return lambda i: f"{path} {word} {int(numbers[i])} column '{column}'"

    time = frame[time_column].reset_index(drop=True) if time_column else None
    tags: dict[str, TagRaw] = {}
    if opts.layout == "wide":
        present = tuple(header)
        for tag, qcol in wanted.items():
            if tag not in frame.columns:
                continue
            values, nan = to_numbers(frame[tag], opts.decimal, locate(tag))
            nan = _either(nan, nan_cells.get(tag))
            quality = vocab.codes_of(frame[qcol]) if qcol and qcol in frame.columns else None
            if qcol and qcol not in frame.columns:
                raise DataError(f"no quality column '{qcol}' for tag '{tag}'", where=str(path),
                                hint="check the tag's quality_column")
            tags[tag] = TagRaw(tag, values, quality, slice(0, len(frame), 1), nan)
        return RawTable(path, word, numbers, time, tags, present, time_column)
    with ThreadPoolExecutor(max_workers=1) as helper:
        # the quality flags are coded on a second thread (pyarrow releases the GIL) while this
        # one groups the rows by tag; nothing else touches the vocabulary meanwhile
        quality_job = helper.submit(vocab.codes_of, frame[opts.quality_column]) if opts.quality_column else None
        groups, names = _tag_groups(frame[opts.tag_column], wanted)
        all_quality = quality_job.result() if quality_job is not None else None
    value_col = frame[opts.value_column]
    numeric = pd.api.types.is_numeric_dtype(value_col.dtype) and not pd.api.types.is_bool_dtype(value_col.dtype)
    all_values = value_col.to_numpy(dtype=float, na_value=np.nan) if numeric else None
    stored_nan = nan_cells.get(opts.value_column)
    for rows, name in zip(groups, names):
        if name not in wanted:
            continue
        if all_values is not None:
            values = take_rows(all_values, rows)
            nan = take_rows(stored_nan, rows) if stored_nan is not None else None
        else:  # text in the value column: parse this tag's cells only (other tags may hold text)
            col = value_col.iloc[rows].reset_index(drop=True)
            values, nan = to_numbers(col, opts.decimal, lambda i, r=rows: locate(opts.value_column)(row_at(r, i)))
        if nan is not None and not nan.any():
            nan = None
        quality = take_rows(all_quality, rows) if all_quality is not None else None
        if name in tags:  # the same tag written two ways (e.g. with trailing blanks): merge in order
            prev = tags[name]
            merged = np.concatenate([row_positions(prev.rows), row_positions(rows)])
            o = np.argsort(merged, kind="stable")
            if nan is not None or prev.nan is not None:
                nan = np.concatenate([prev.nan if prev.nan is not None else np.zeros(prev.values.size, bool),
                                      nan if nan is not None else np.zeros(values.size, bool)])[o]
            values = np.concatenate([prev.values, values])[o]
            quality = None if quality is None else np.concatenate([prev.quality, quality])[o]
            rows = merged[o]
        tags[name] = TagRaw(name, values, quality, rows, nan)
    return RawTable(path, word, numbers, time, tags, tuple(names), time_column)
