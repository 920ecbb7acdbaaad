"""Fast coding of text columns: integer codes in order of appearance and the distinct values.

Historian exports repeat themselves: a long table sorted by time repeats each stamp once per
tag, and a quality column is "Good" for long runs.  Where runs of equal neighbours cover the
column in few pieces they are found by comparing neighbours (cheap in pyarrow); otherwise the
values are hashed (pandas.factorize).  Codes then number *runs* rather than distinct values,
which every caller accepts: each code stands for one value, and the first row of each code
comes in increasing order.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

_PROBE = 4096


def _chunked(series: pd.Series):
    """The column's pyarrow (chunked) array as pandas holds it, or None when it is not
    arrow-backed.  Comparisons, lookups, casts and takes run on it as it is; combining the
    chunks a parallel CSV parse leaves would copy every text once more."""
    return getattr(series.array, "_pa_array", None)


def arrow_text(series: pd.Series):
    """The column as a pyarrow (chunked) string array, or None when it is not arrow text."""
    return _chunked(series) if pd.api.types.is_string_dtype(series.dtype) else None


def _runs(arr, dtype=None) -> tuple[np.ndarray, pd.Series] | None:
    """Run lengths and values of an arrow (chunked) array, when it has few runs (the values
    as a pandas Series of ``dtype``, or as an arrow array when ``dtype`` is None)."""
    n = len(arr)
    if n <= 2 * _PROBE or arr.null_count:
        return None
    import pyarrow as pa
    import pyarrow.compute as pc

    probe = arr[:_PROBE]
    if pc.sum(pc.not_equal(probe[1:], probe[:-1])).as_py() > _PROBE // 4:
        return None
    change = np.empty(n, bool)
    change[0] = True
    change[1:] = pc.not_equal(arr[1:], arr[:-1]).to_numpy(zero_copy_only=False)
    starts = np.flatnonzero(change)
    if starts.size > n // 4:
        return None
    values = _take_sorted(arr, starts)
    return np.diff(np.append(starts, n)), values if dtype is None else pd.Series(values.to_pandas(), dtype=dtype)


def _take_sorted(arr, idx: np.ndarray):
    """``arr.take(idx)`` for ascending ``idx``, chunk by chunk: arrow's take on a chunked
    array joins the chunks first, which copies every text once more."""
    import pyarrow as pa

    if not isinstance(arr, pa.ChunkedArray):
        return arr.take(pa.array(idx))
    offsets = np.cumsum([0] + [len(c) for c in arr.chunks])
    cuts = np.searchsorted(idx, offsets)
    return pa.chunked_array([c.take(pa.array(idx[cuts[k]:cuts[k + 1]] - offsets[k]))
                             for k, c in enumerate(arr.chunks)], type=arr.type)


def text_runs(series: pd.Series, arrow: bool = False) -> tuple[np.ndarray, pd.Series] | None:
    """``(lengths, values)`` of the runs of equal neighbours when they cover an arrow text
    column without nulls in few pieces (at most a quarter of its length), else None; the
    values as a Series like the column, or with ``arrow`` as a pyarrow array."""
    arr = arrow_text(series)
    return None if arr is None else _runs(arr, None if arrow else series.dtype)


def text_codes(series: pd.Series, runs: bool = True) -> tuple[np.ndarray, pd.Series]:
    """``(codes, values)``: ``values.iloc[codes]`` reproduces the column (nulls have code -1
    when hashed; callers reject or map nulls before).  ``runs=False``: the caller has looked
    for runs already (:func:`text_runs`) and found none; hash straight away."""
    arr = _chunked(series)
    if arr is not None:
        import pyarrow.compute as pc

        runs = _runs(arr, series.dtype) if runs else None
        if runs is not None:
            lengths, values = runs
            return np.repeat(np.arange(lengths.size, dtype=np.int64), lengths), values
        enc = pc.dictionary_encode(arr.combine_chunks())  # pandas.factorize on arrow text, minus its wrapping
        codes = enc.indices.to_numpy(zero_copy_only=False)
        codes = np.where(np.isnan(codes), -1, codes).astype(np.int64) if enc.null_count else codes.astype(np.int64)
        return codes, pd.Series(enc.dictionary.to_pandas(), dtype=series.dtype)
    codes, uniq = pd.factorize(series, sort=False)
    return codes, pd.Series(uniq)


_MAX_PERIOD = 10_000


def periodic_texts(series: pd.Series) -> list[str] | None:
    """The texts of one period when an arrow text column without nulls cycles through ``p``
    distinct texts in one order (row ``r`` holds the text of row ``r % p``; the last cycle may
    be cut short), as the tag column of a long export does when every stamp lists every tag
    in the same order; None otherwise.  Checked on arrow's buffers, chunk by chunk: every
    text's length and bytes against the period's, with no hashing and no copy."""
    arr = arrow_text(series)
    if arr is None or arr.null_count or len(arr) < 2:
        return None
    import pyarrow.compute as pc

    p = pc.index(arr[:_MAX_PERIOD + 1], arr[0], start=1).as_py()  # where the first text comes back
    if p <= 0:
        return None
    period = arr[:p].to_pylist()
    if len(set(period)) != p or len(arr) < 2 * p:
        return None
    encoded = [t.encode("utf-8") for t in period]
    lengths = np.array([len(e) for e in encoded], np.int64)
    if not lengths.all():
        return None
    starts = np.concatenate([[0], np.cumsum(lengths)])
    pattern = np.frombuffer(b"".join(encoded), np.uint8)
    row = 0
    for chunk in getattr(arr, "chunks", [arr]):
        if len(chunk) and not _chunk_follows(chunk, row % p, lengths, pattern, starts):
            return None
        row += len(chunk)
    return period


def _chunk_follows(chunk, phase: int, lengths: np.ndarray, pattern: np.ndarray, starts: np.ndarray) -> bool:
    """Whether an arrow string chunk holds the period's texts in turn, starting at ``phase``."""
    import pyarrow as pa

    if pa.types.is_large_string(chunk.type):
        width = 8
    elif pa.types.is_string(chunk.type):
        width = 4
    else:
        return False
    m, p = len(chunk), lengths.size
    _, off_buf, data_buf = chunk.buffers()
    offsets = np.frombuffer(off_buf, np.int64 if width == 8 else np.int32, m + 1, chunk.offset * width)
    if not _cycles(np.diff(offsets), np.roll(lengths, -phase)):
        return False
    data = np.frombuffer(data_buf, np.uint8)[offsets[0]:offsets[-1]]
    return _cycles(data, np.roll(pattern, -int(starts[phase])))


def _cycles(x: np.ndarray, period: np.ndarray) -> bool:
    """Whether ``x`` is ``period`` repeated (the last repeat may be cut short)."""
    k = x.size // period.size
    whole = k * period.size
    return bool((x[:whole].reshape(k, period.size) == period).all() and
                np.array_equal(x[whole:], period[:x.size - whole]))


def regex_matches(texts: pd.Series, pattern: str) -> np.ndarray:
    """Whether each text contains a match of ``pattern``: in pyarrow's RE2 engine when the
    column is arrow-backed (much faster), else in Python's."""
    arr = _chunked(texts)
    if arr is not None:
        try:
            import pyarrow.compute as pc

            return np.asarray(pc.match_substring_regex(arr, pattern).to_numpy(zero_copy_only=False), dtype=bool)
        except Exception:  # noqa: BLE001 - pattern RE2 cannot run: fall back
            pass
    return texts.astype("str").str.contains(pattern, regex=True).to_numpy(dtype=bool)
