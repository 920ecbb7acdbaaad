"""The integration plan of one record for one model: knots, inputs on them, observations.

Within a segment the knots are the union of every input sample time and every observation
time.  Between two knots the inputs are held at the value of the left knot (the default:
the historian's last value holds) or linear from left to right, so the integrator is
restarted at every input change and no input jump is ever smeared over a step.  Outputs are
evaluated only at their own observation times, never interpolated.

Initial states (per segment, per state; the spec says which):

* ``measured`` (the default for a state measured directly): the first valid observation of
  that state in the segment.  The segment starts at that observation; the observation
  itself is used up as the initial value and not compared; observations before it are not
  compared either;
* ``steady`` (the default otherwise): the steady state at the segment's first inputs;
* a number: given, at the segment's start (the first segment's start is the experiment's:
  its declared start or its first time stamp).  A given state cannot start at the first
  segment's start while a measured one starts later: that is an error;
* ``estimate``: a free parameter per segment, estimated with the others.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np

from graybox.data.record import HOLD_LINEAR, Record
from graybox.errors import DataError, SimulationError
from graybox.model.spec import INITIAL_ESTIMATE, INITIAL_MEASURED, ModelSpec

REASON_INITIAL = "used as the initial state"
REASON_BEFORE = "before the segment's initial state"
REASON_OUTSIDE = "outside every segment"


@dataclass(frozen=True)
class SegmentPlan:
    """One segment of a timeline, ready to integrate: ``index`` (0-based, in the record's
    order), the knots ``t`` (n_knots,) in seconds, the inputs ``u`` (n_knots, n_u) at the knots
    in the model's units, per output the knot (``obs_knot``) and the position in the record's
    output series (``obs_index``) of each compared observation, and the first measured value
    of each state that starts from a measurement (``x0_measured``)."""

    index: int
    t: np.ndarray  # knots, seconds
    u: np.ndarray  # (n_knots, n_u) input values at the knots
    obs_knot: dict[str, np.ndarray]  # output -> knot index of each compared observation
    obs_index: dict[str, np.ndarray]  # output -> index into the OutputSeries arrays
    x0_measured: dict[str, float]  # state -> first measured value

    @property
    def n_knots(self) -> int:
        """Number of knots (restart points of the integrator) in the segment."""
        return int(self.t.size)

    @cached_property
    def observed_knots(self) -> tuple[np.ndarray, np.ndarray, dict[str, np.ndarray]]:
        """The knots where some output is compared (sorted), the inputs there (n_u, n_k, 1),
        and per output the position of each of its observations among those knots: what a
        model without states evaluates, worked out once per plan."""
        knots = np.unique(np.concatenate(list(self.obs_knot.values()) or [np.zeros(0, np.int64)]))
        rows = {o: np.searchsorted(knots, k) for o, k in self.obs_knot.items()}
        return knots, np.ascontiguousarray(self.u[knots].T)[:, :, None], rows

    def knot_has_obs(self) -> np.ndarray:
        """Per knot (n_knots,), True where some output has a compared observation."""
        flag = np.zeros(self.t.size, bool)
        for k in self.obs_knot.values():
            flag[k] = True
        return flag


@dataclass(frozen=True)
class Timeline:
    """The integration plan of one record for one model (built by :func:`plan`): the record,
    its segments, which inputs are linear between samples (``linear``, (n_u,) bool), per output
    the mask of the observations compared in a fit (``used``, over all the output's
    observations), per output the observations left out and why (``excluded``: reason ->
    count), and the states whose initial value is estimated per segment
    (``estimated_states``, in the spec's order)."""

    record: Record
    segments: tuple[SegmentPlan, ...]
    linear: np.ndarray  # (n_u,) bool: input interpolated linearly
    used: dict[str, np.ndarray]  # output -> bool mask over its observations: compared in the fit
    excluded: dict[str, dict[str, int]] = field(default_factory=dict)  # output -> reason -> count
    estimated_states: tuple[str, ...] = ()

    @property
    def n_obs(self) -> int:
        """Number of compared observations over all outputs."""
        return int(sum(m.sum() for m in self.used.values()))

    def n_obs_of(self, output: str) -> int:
        """Number of compared observations of ``output`` (KeyError for an unknown output)."""
        return int(self.used[output].sum())


def plan(spec: ModelSpec, record: Record) -> Timeline:
    """The integration plan of ``record`` for ``spec``: per segment the knots (every input
    sample time and every compared observation time), the inputs there, the compared
    observations and the measured initial states (see the module docstring for the rules).
    The record is not modified.

    Raises DataError (naming the record, segment and output) when the record lacks a model
    input or output, when a state to start from its measurement has no valid measurement in a
    segment, when a given and a measured state cannot start at one instant, or when an output
    has no observation left to compare; SimulationError when an input has no value at a knot."""
    missing_in = [u for u in spec.input_names if u not in record.inputs]
    missing_out = [o for o in spec.output_names if o not in record.outputs]
    if missing_in or missing_out:
        names = ", ".join(missing_in + missing_out)
        raise DataError(f"record '{record.name}' has no data for {names}",
                        hint="map every model input and measured output to a column in the data table")
    linear = np.array([record.inputs[u].hold == HOLD_LINEAR for u in spec.input_names], bool)
    used = {o: np.zeros(record.outputs[o].t.size, bool) for o in spec.output_names}
    excluded: dict[str, dict[str, int]] = {o: {} for o in spec.output_names}
    measured_init = {s.name: o.name for s in spec.states if s.initial == INITIAL_MEASURED
                     for o in spec.outputs if o.state == s.name}
    segments = []
    for si, seg in enumerate(record.segments):
        t0 = seg.t_start
        x0m: dict[str, float] = {}
        init_obs: dict[str, int] = {}
        for state, out in measured_init.items():
            series = record.outputs[out]
            ok = np.flatnonzero(series.mask & seg.contains(series.t))
            if ok.size == 0:
                raise DataError(f"record '{record.name}', segment {si + 1}: no valid measurement of '{out}' to start "
                                f"state '{state}' from", hint="use initial = \"steady\" or \"estimate\" for that state")
            init_obs[out] = int(ok[0])
            x0m[state] = float(series.values[ok[0]])
            t0 = max(t0, float(series.t[ok[0]]))
        given = [s.name for s in spec.states if not isinstance(s.initial, str)]
        if si == 0 and given and t0 > seg.t_start:
            late = max(x0m, key=lambda st: record.outputs[measured_init[st]].t[init_obs[measured_init[st]]])
            raise DataError(f"record '{record.name}': state {', '.join(repr(g) for g in given)} starts from its given "
                            f"value at the experiment's start, but state '{late}' from its first measurement "
                            f"{t0 - seg.t_start:g} s later: the states cannot start at one instant",
                            hint=f"give '{late}' an initial value (a number, or \"estimate\"), or declare the data "
                                 "table's start at that measurement")
        knots = [np.array([t0, seg.t_end])]
        for u in spec.input_names:
            ts = record.inputs[u].t
            knots.append(ts[(ts >= t0) & (ts <= seg.t_end)])
        obs_sel = {}
        for o in spec.output_names:
            series = record.outputs[o]
            inside = series.mask & seg.contains(series.t)
            before = inside & (series.t < t0)
            if before.any():
                excluded[o][REASON_BEFORE] = excluded[o].get(REASON_BEFORE, 0) + int(before.sum())
            sel = inside & (series.t >= t0)
            if o in init_obs:
                sel[init_obs[o]] = False
                excluded[o][REASON_INITIAL] = excluded[o].get(REASON_INITIAL, 0) + 1
            obs_sel[o] = np.flatnonzero(sel)
            used[o][obs_sel[o]] = True
            knots.append(series.t[obs_sel[o]])
        t = np.unique(np.concatenate(knots))
        u_vals = np.column_stack([record.inputs[u].at(t) for u in spec.input_names]) if spec.inputs \
            else np.zeros((t.size, 0))
        obs_knot = {o: np.searchsorted(t, record.outputs[o].t[idx]) for o, idx in obs_sel.items()}
        segments.append(SegmentPlan(si, t, u_vals, obs_knot, obs_sel, x0m))
    for o in spec.output_names:
        series = record.outputs[o]
        outside = series.mask & ~np.any([s.contains(series.t) for s in record.segments], axis=0)
        if outside.any():
            excluded[o][REASON_OUTSIDE] = int(outside.sum())
        if not used[o].any():
            raise DataError(f"record '{record.name}': output '{o}' has no valid observation to compare",
                            hint="check its quality masks, valid range and the selected time windows")
    if not np.all(np.isfinite(np.concatenate([s.u.ravel() for s in segments]))):
        raise SimulationError(f"record '{record.name}': an input has no value at some knot")
    est = tuple(s.name for s in spec.states if s.initial == INITIAL_ESTIMATE)
    return Timeline(record, tuple(segments), linear, used, excluded, est)
