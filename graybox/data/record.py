"""The record: the one shape of operating data that every layer passes on.

A record holds one experiment (one unit, one time window):

* ``start_utc``: the UTC instant that time zero stands for: the experiment's start, where
  its first segment begins and the initial state applies (the data layer puts it at the
  declared start or the first time stamp of the data, which may precede every sample);
* ``inputs``: each a series of samples (time in seconds from ``start_utc``, value in model
  units) that can be evaluated at any time ``t``: held from the previous sample (the default,
  as a historian's last value holds) or linear between samples;
* ``outputs``: each measured output with its *own* observation times, values and a mask
  (``True`` = use); outputs are only ever compared where they were measured;
* ``segments``: the spans that are simulated independently (the data layer splits at input
  gaps longer than a set limit); each segment gets its own initial state.

Only the data layer builds records from files; everything downstream reads this type only.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Mapping

import numpy as np

from graybox.errors import DataError

HOLD_PREVIOUS = "previous"
HOLD_LINEAR = "linear"
HOLD_MODES = (HOLD_PREVIOUS, HOLD_LINEAR)


def _as_float_array(name: str, what: str, values) -> np.ndarray:
    arr = np.asarray(values, dtype=float)
    if arr.ndim != 1:
        raise DataError(f"{what} of '{name}' must be one-dimensional, got shape {arr.shape}")
    return arr


def _check_times(name: str, t: np.ndarray) -> None:
    if t.size == 0:
        raise DataError(f"'{name}' has no samples")
    if not np.all(np.isfinite(t)):
        raise DataError(f"'{name}' has non-finite sample times")
    if t.size > 1 and not np.all(t[1:] > t[:-1]):
        raise DataError(f"sample times of '{name}' must be strictly increasing")


@dataclass(frozen=True)
class InputSeries:
    """Samples of one input, in model units.  ``values`` may hold NaN where the sample was
    masked; evaluation then holds the last good value (or interpolates across it)."""

    name: str
    t: np.ndarray
    values: np.ndarray
    hold: str = HOLD_PREVIOUS
    units: str = ""

    def __post_init__(self):
        t = _as_float_array(self.name, "sample times", self.t)
        v = _as_float_array(self.name, "values", self.values)
        if t.shape != v.shape:
            raise DataError(f"input '{self.name}': {t.size} times but {v.size} values")
        _check_times(self.name, t)
        if self.hold not in HOLD_MODES:
            raise DataError(f"input '{self.name}': hold must be one of {HOLD_MODES}, got '{self.hold}'")
        good = np.isfinite(v)
        if not good.any():
            raise DataError(f"input '{self.name}' has no valid sample", hint="check its quality flags and valid range")
        every = bool(good.all())
        object.__setattr__(self, "t", t if every else t[good])
        object.__setattr__(self, "values", v if every else v[good])

    def at(self, times) -> np.ndarray:
        """Value at each time: held from the last sample at or before it, or linear between
        samples; before the first sample the first value holds, after the last the last."""
        times = np.asarray(times, dtype=float)
        if self.hold == HOLD_LINEAR:
            return np.interp(times, self.t, self.values)
        idx = np.searchsorted(self.t, times, side="right") - 1
        return self.values[np.clip(idx, 0, self.t.size - 1)]


@dataclass(frozen=True)
class OutputSeries:
    """Observations of one measured output at its own times; ``mask`` True = use."""

    name: str
    t: np.ndarray
    values: np.ndarray
    mask: np.ndarray | None = None
    units: str = ""

    def __post_init__(self):
        t = _as_float_array(self.name, "observation times", self.t)
        v = _as_float_array(self.name, "values", self.values)
        if t.shape != v.shape:
            raise DataError(f"output '{self.name}': {t.size} times but {v.size} values")
        _check_times(self.name, t)
        m = np.ones(t.size, bool) if self.mask is None else np.asarray(self.mask, dtype=bool)
        if m.shape != t.shape:
            raise DataError(f"output '{self.name}': mask has {m.size} entries for {t.size} observations")
        m = m & np.isfinite(v)
        object.__setattr__(self, "t", t)
        object.__setattr__(self, "values", v)
        object.__setattr__(self, "mask", m)

    @property
    def n_valid(self) -> int:
        """How many samples the fit compares (the mask's true entries)."""
        return int(self.mask.sum())


@dataclass(frozen=True)
class Segment:
    """A span ``[t_start, t_end]`` simulated on its own, with its own initial state."""

    t_start: float
    t_end: float

    def __post_init__(self):
        if not (np.isfinite(self.t_start) and np.isfinite(self.t_end)) or self.t_end < self.t_start:
            raise DataError(f"segment [{self.t_start}, {self.t_end}] is not a valid time span")

    def contains(self, t: np.ndarray) -> np.ndarray:
        """Which times (s since the record's start, any shape) lie in the segment, ends included."""
        return (t >= self.t_start) & (t <= self.t_end)


@dataclass(frozen=True)
class Record:
    """One experiment's operating data, in model units, on a time axis in seconds."""

    name: str
    start_utc: datetime
    inputs: Mapping[str, InputSeries]
    outputs: Mapping[str, OutputSeries]
    segments: tuple[Segment, ...] = ()
    sources: tuple[Mapping[str, str], ...] = field(default=())  # [{"path", "sha256"}]
    notes: tuple[str, ...] = field(default=())

    def __post_init__(self):
        if self.start_utc.tzinfo is None:
            raise DataError(f"record '{self.name}': start_utc must be time-zone aware (UTC)")
        object.__setattr__(self, "start_utc", self.start_utc.astimezone(timezone.utc))
        object.__setattr__(self, "inputs", dict(self.inputs))
        object.__setattr__(self, "outputs", dict(self.outputs))
        if not self.outputs:
            raise DataError(f"record '{self.name}' has no measured output")
        if not self.segments:
            object.__setattr__(self, "segments", (Segment(*self.time_span()),))
        else:
            object.__setattr__(self, "segments", tuple(self.segments))

    def time_span(self) -> tuple[float, float]:
        """From the earlier of the first sample and the first segment's start (an experiment
        may start before its first sample) to the later of the last sample and segment end."""
        lo = min(float(s.t[0]) for s in [*self.inputs.values(), *self.outputs.values()])
        hi = max(float(s.t[-1]) for s in [*self.inputs.values(), *self.outputs.values()])
        if self.segments:
            lo, hi = min(lo, self.segments[0].t_start), max(hi, self.segments[-1].t_end)
        return lo, hi

    @property
    def n_obs(self) -> int:
        """The number of valid observations over every output."""
        return sum(o.n_valid for o in self.outputs.values())

    def with_outputs(self, outputs: Mapping[str, OutputSeries]) -> "Record":
        """A copy with other observations (same inputs and segments): for simulated data,
        held-out checks and resampling."""
        return Record(self.name, self.start_utc, self.inputs, outputs, self.segments, self.sources, self.notes)


def record_from_arrays(
    name: str,
    t,
    inputs: Mapping[str, np.ndarray],
    outputs: Mapping[str, np.ndarray],
    *,
    start_utc: datetime | None = None,
    hold: str = HOLD_PREVIOUS,
    units: Mapping[str, str] | None = None,
) -> Record:
    """Build a record from arrays on one shared time base (Python API; tests and demos)."""
    t = np.asarray(t, dtype=float)
    units = dict(units or {})
    ins = {k: InputSeries(k, t, np.asarray(v, float), hold=hold, units=units.get(k, "")) for k, v in inputs.items()}
    outs = {k: OutputSeries(k, t, np.asarray(v, float), units=units.get(k, "")) for k, v in outputs.items()}
    start = start_utc or datetime(2026, 1, 1, tzinfo=timezone.utc)
    return Record(name, start, ins, outs)
