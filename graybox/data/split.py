"""Split a record by time into a fit part and a validation part.

Observations before the split instant go to the fit part, the rest to the validation part.
Each part keeps the record's time origin (``start_utc``), so times stay comparable.  An
input's validation part also keeps its last sample before the split: the value that holds
(or the left end of the line) when the validation part starts.
"""

from __future__ import annotations

from datetime import datetime

import numpy as np

from graybox.data.record import InputSeries, OutputSeries, Record, Segment
from graybox.errors import DataError


def split_time(record: Record, at: float | datetime) -> float:
    """The split instant in the record's seconds: a fraction of the record's span held out
    at its end (0 < at < 1), or a time-zone aware instant."""
    if isinstance(at, datetime):
        if at.tzinfo is None:
            raise DataError("the split instant must carry a time zone", hint="e.g. 2026-02-01T00:00Z")
        return (at - record.start_utc).total_seconds()
    frac = float(at)
    if not 0.0 < frac < 1.0:
        raise DataError(f"a validation fraction must lie between 0 and 1, got {frac}")
    lo, hi = record.time_span()
    return hi - frac * (hi - lo)


def _inputs_part(series: InputSeries, lo: float, hi: float, keep_before: bool) -> InputSeries:
    t, v = series.t, series.values
    sel = (t >= lo) & (t < hi)
    if keep_before:
        before = np.flatnonzero(t < lo)
        if before.size:
            sel[before[-1]] = True
    if not sel.any():
        raise DataError(f"input '{series.name}' has no sample in the part from {lo:g} s to {hi:g} s")
    return InputSeries(series.name, t[sel], v[sel], hold=series.hold, units=series.units)


def _output_part(series: OutputSeries, lo: float, hi: float, part: str) -> OutputSeries:
    sel = (series.t >= lo) & (series.t < hi)
    if not (sel & series.mask).any():
        raise DataError(f"the {part} part has no valid observation of output '{series.name}'",
                        hint="move the split instant or the validation fraction")
    return OutputSeries(series.name, series.t[sel], series.values[sel], series.mask[sel], series.units)


def _segments_part(record: Record, lo: float, hi: float, outputs) -> tuple[Segment, ...]:
    out = []
    for s in record.segments:
        a, b = max(s.t_start, lo), min(s.t_end, hi)
        if b < a:
            continue
        if all((o.mask & (o.t >= a) & (o.t <= b)).any() for o in outputs.values()):
            out.append(Segment(a, b))
    return tuple(out)


def split_record(record: Record, at: float | datetime) -> tuple[Record, Record]:
    """``(fit_record, validation_record)``: the fit part before ``at``, the validation part
    from it on; ``at`` is the fraction held out at the end, or an aware instant."""
    cut = split_time(record, at)
    lo, hi = record.time_span()
    if not lo < cut <= hi:
        raise DataError(f"the split instant ({cut:g} s) lies outside the record ({lo:g} s .. {hi:g} s)")
    parts = []
    for name, a, b, keep in (("fit", -np.inf, cut, False), ("validation", cut, np.inf, True)):
        outs = {k: _output_part(o, a, b, name) for k, o in record.outputs.items()}
        ins = {k: _inputs_part(s, a, b, keep) for k, s in record.inputs.items()}
        segs = _segments_part(record, max(a, lo), min(b, hi) if np.isfinite(b) else hi, outs)
        if not segs:
            raise DataError(f"the {name} part holds no segment with observations of every output",
                            hint="move the split instant")
        note = f"{name} part of '{record.name}', split at {cut:g} s"
        parts.append(Record(f"{record.name}:{name}", record.start_utc, ins, outs, segs, record.sources,
                            (*record.notes, note)))
    return parts[0], parts[1]
