"""pandas DataFrames in place of files: data a notebook user already has in memory.

A data table's ``files`` may list DataFrames instead of paths (``graybox.Study.with_data``
puts them there).  Each frame is read as a file of that table would be: its columns are the
header (the time column, a column per tag or the long layout's tag, value and quality
columns; a time column that is the frame's named index is taken from there), and every later
step is the data layer's own, with the same checks and unit conversions as for a file.

* A cell holds no value when it is missing (``NaN``, ``None``, ``pd.NA``: pandas' missing
  values) or, in a text column, one of the table's ``no_value`` texts.  A text column of
  numbers is parsed as a CSV file's would be (so ``"nan"`` is a value that is not a number).
* The table's keys for reading text and spreadsheets (``format``, ``delimiter``,
  ``encoding``, ``header_row``, ``skip_after_header``, ``sheet``) do not apply to a frame;
  ``decimal`` applies to numbers written as text in it.
* Messages name the frame by its place in the table (``DataFrame data.files[0]``) and a row
  by its position (``iloc 17``, counted from 0 as ``DataFrame.iloc`` counts).
* The frame is copied when the study takes it: neither the caller's frame is ever modified,
  nor does changing it afterwards change the study.  The run record names the frame and a
  SHA-256 digest of its column names, dtypes, index and values
  (``pandas.util.hash_pandas_object`` per row, then SHA-256 of those row hashes in order).
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass

import numpy as np
import pandas as pd

from graybox.configkit import Table
from graybox.errors import DataError

FRAME_WORD = "iloc"  # how a message names a row of a frame: its position, from 0


@dataclass(frozen=True, eq=False)
class FrameSource:
    """A DataFrame standing where a data table lists a file (compared by identity)."""

    frame: pd.DataFrame  # the study's own copy
    label: str  # e.g. "DataFrame data.files[0]"

    def __str__(self) -> str:
        return self.label

    def sha256(self) -> str:
        """A digest of the frame's column names, dtypes, index and values (row by row)."""
        h = hashlib.sha256()
        h.update(repr([(str(c), str(t)) for c, t in self.frame.dtypes.items()]).encode("utf-8"))
        h.update(np.ascontiguousarray(pd.util.hash_pandas_object(self.frame, index=True).to_numpy()).tobytes())
        return h.hexdigest()


def is_frame(value) -> bool:
    """Whether ``value`` is a pandas DataFrame."""
    return isinstance(value, pd.DataFrame)


def lists_frames(t: Table) -> bool:
    """Whether the table's ``files`` holds DataFrames (or already-taken frame sources)."""
    value = t.data.get("files")
    items = value if isinstance(value, (list, tuple)) else [value]
    return any(is_frame(v) or isinstance(v, FrameSource) for v in items)


def frame_sources(t: Table) -> tuple[FrameSource, ...]:
    """The frames a data table's ``files`` lists, each copied and labelled by its place; a
    list mixing frames with paths (or with anything else) is an error."""
    value = t.data.get("files")
    items = list(value) if isinstance(value, (list, tuple)) else [value]
    out = []
    for k, v in enumerate(items):
        if isinstance(v, FrameSource):
            out.append(v)
        elif is_frame(v):
            out.append(FrameSource(v.copy(deep=True), f"DataFrame {'.'.join(t.path)}.files[{k}]"))
        else:
            raise t.error("files", f"entry {k} is {type(v).__name__}, among pandas DataFrames",
                          hint="give either files (paths) or DataFrames for one experiment, not both")
    return tuple(out)


def frame_columns(source: FrameSource, time_column: str | None) -> tuple[pd.DataFrame, np.ndarray, list[str]]:
    """The frame as a reader sees a file: columns named by their text (stripped), a time
    column that is the frame's named index moved into the columns; its row positions (from
    0) and header."""
    frame = source.frame
    names = [str(c).strip() for c in frame.columns]
    if len(set(names)) != len(names):
        dup = next(n for n in names if names.count(n) > 1)
        raise DataError(f"the column name '{dup}' appears twice", where=source.label,
                        hint="give every column of the frame its own name")
    if time_column is not None and time_column not in names and frame.index.name is not None \
            and str(frame.index.name).strip() == time_column:
        frame = frame.reset_index()
        names = [str(c).strip() for c in frame.columns]
    elif time_column is not None and time_column not in names and isinstance(frame.index, pd.DatetimeIndex):
        raise DataError(f"no column '{time_column}' in the frame; its time stamps are in its index, which has no "
                        "name", where=source.label,
                        hint=f"name the index (frame.rename_axis(\"{time_column}\")) or reset it into a column")
    frame = frame.set_axis(names, axis=1)
    return frame, np.arange(len(frame), dtype=np.int64), names


def blank_texts(frame: pd.DataFrame, columns: list[str], no_value: tuple[str, ...]) -> pd.DataFrame:
    """The needed columns, a text cell equal to one of the ``no_value`` texts (stripped)
    made a missing value, as a CSV reader makes it; a new frame (the source is not touched)."""
    out = frame.loc[:, columns].copy()
    texts = set(no_value)
    for c in columns:
        col = out[c]
        if pd.api.types.is_string_dtype(col.dtype) or col.dtype == object:
            hit = col.map(lambda v: isinstance(v, str) and v.strip() in texts).to_numpy(dtype=bool)
            if hit.any():
                out[c] = col.where(~hit, None)
    return out
