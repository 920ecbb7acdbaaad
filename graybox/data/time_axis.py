"""The time axis of one experiment, once its stamps are read (timestamps.py): whether the
model needs one, where the experiment starts (declared, first stamp, or a selected window's
opening) and why, the first stamp over every file, rows stamped before the row before them,
and an instant described for people (UTC with the time since the start, or elapsed time in
the declared unit).  Instants are integer nanoseconds (UTC, or since the run's start for
elapsed time).
"""

from __future__ import annotations

import numpy as np

from graybox.data.config import ELAPSED, table_from_where
from graybox.data.report import duration_text
from graybox.data.spec import TimeSpec
from graybox.errors import DataError


def require_time_axis(spec, dynamic: bool) -> None:
    """A model with states is simulated in time: its data must say when each row was taken.
    A static model (no states) may take the rows in their order (0, 1, 2, ... s)."""
    if dynamic and spec.time.column is None:
        raise DataError("the model has states, but the data table names no time column: its rows have no times to "
                        "simulate on", where=table_from_where({}, spec.where).where("time_column"),
                        hint="add time_column = \"...\" (the column of time stamps) with its time_format; for time "
                             "since the start of a run, time_format = \"elapsed\" and time_units = \"min\"")


START_DECLARED = "the declared start"
START_DATA = "the first time stamp of the data"
START_SELECT = "the opening of the selected window"


def experiment_start(declared: int | None, first_stamp: int | None,
                     select: tuple[tuple[int, int], ...] = ()) -> tuple[int | None, str]:
    """Where the experiment starts (ns) and what set it: the declared ``start``, else the first
    time stamp of the data (any row, with or without values); a selected window opening later
    (the first one still open then) moves it to its opening."""
    start, why = (declared, START_DECLARED) if declared is not None else (first_stamp, START_DATA)
    if start is None:
        return None, ""
    for lo, hi in sorted(select):
        if hi > start:
            if lo > start:
                return int(lo), START_SELECT
            break
    return int(start), why


def first_stamp(times: list[np.ndarray], gaps: list[np.ndarray | None]) -> int | None:
    """The earliest existing time stamp among arrays of UTC ns (``gaps``: rows whose wall time
    does not exist, or None when none did)."""
    best = None
    for t, g in zip(times, gaps):
        ok = t if g is None else t[~g]
        if ok.size:
            m = int(ok.min())
            best = m if best is None else min(best, m)
    return best


def backward_steps(t: np.ndarray, file_starts: np.ndarray | None = None) -> tuple[int, int | None]:
    """How many rows are stamped earlier than the row before them (stamps in recorded order;
    the first row of each file, at positions ``file_starts``, is not compared with the last
    of the file before: files may be listed in any order), and the position of the first."""
    if t.size < 2:
        return 0, None
    back = t[1:] < t[:-1]
    if file_starts is not None and file_starts.size:
        inner = file_starts[(file_starts > 0) & (file_starts < t.size)]
        back[inner - 1] = False
    n = int(np.count_nonzero(back))
    return n, (int(np.argmax(back)) + 1 if n else None)


def describe_instant(ns: int | None, spec: TimeSpec, start: int | None = None) -> str:
    """An instant as a reader wants it: ISO 8601 UTC, or the elapsed time in the table's units;
    with ``start``, its offset from the start too."""
    if ns is None:
        return "-"
    if spec.format == ELAPSED:
        text = f"{ns / 1e9 / spec.seconds_per_unit:g} {spec.units}"
    else:
        text = np.datetime64(int(ns), "ns").astype("datetime64[s]").astype(str) + "Z"
        if ns % 10**9:
            text = np.datetime64(int(ns), "ns").astype("datetime64[ms]").astype(str) + "Z"
    if start is not None and ns != start:
        d = (ns - start) / 1e9
        text += f" (start {'+' if d >= 0 else '-'} {_span_text(abs(d), spec)})"
    elif start is not None:
        text += " (at the start)"
    return text


def _span_text(seconds: float, spec: TimeSpec) -> str:
    """A time since the start: in the declared unit for elapsed time, else four digits."""
    if spec.format == ELAPSED:
        return f"{seconds / spec.seconds_per_unit:g} {spec.units}"
    return duration_text(seconds, digits=4)
