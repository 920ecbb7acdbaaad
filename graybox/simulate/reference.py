"""The reference simulator: numpy, batched over parameter sets, readable.

``simulate(funcs, timeline, theta)`` integrates every parameter set of ``theta`` (shape
``(n_sets, n_p)``) over every segment of the timeline and returns the measured outputs at
their observation times, optionally with their exact sensitivities.  A parameter set whose
integration fails (non-finite values, step size underflow) is flagged in ``ok`` and its
outputs are NaN; the other sets are unaffected.
"""

from __future__ import annotations

import warnings

import numpy as np

from graybox.simulate.contract import SimResult, Tolerances, n_columns
from graybox.simulate.initial import initial_states
from graybox.simulate.integrators import (
    AUTO,
    EXPLICIT,
    IMPLICIT,
    MAX_STEPS_PER_INTERVAL,
    STEPPERS,
    STIFF_RATIO,
    Batch,
    Interval,
    error_norm,
    spectral_radius,
)
from graybox.simulate.timeline import SegmentPlan, Timeline


def _choose_method(b: Batch, x0, seg: SegmentPlan, tol: Tolerances) -> str:
    if tol.method != AUTO:
        return tol.method
    if seg.n_knots < 2:
        return EXPLICIT
    rho = spectral_radius(b, x0, seg.u[0])
    h_typ = float(np.median(np.diff(seg.t)))
    return IMPLICIT if rho * h_typ > STIFF_RATIO else EXPLICIT


def simulate(funcs, timeline: Timeline, theta: np.ndarray, *, x0_est: np.ndarray | None = None,
             sens: bool = False, tol: Tolerances = Tolerances()) -> SimResult:
    """Outputs at observation times for each parameter set (rows of ``theta``, shape
    (n_sets, n_p) in the spec's parameter order), with ``sens`` also their exact forward
    sensitivities; ``funcs`` are the spec's :func:`graybox.simulate.generate.generate`
    functions.  One step size is shared by the batch.  ``x0_est`` (n_sets, n_segments *
    n_estimated_states) gives the estimated initial states (required when there are any,
    else ``ValueError``).  See :class:`graybox.simulate.contract.SimResult` for the shapes;
    a set whose integration fails has ``ok`` False and NaN outputs, the others are
    unaffected."""
    theta = np.atleast_2d(np.asarray(theta, dtype=float))
    n_sets = theta.shape[0]
    spec = funcs.spec
    n_est = len(timeline.estimated_states)
    if n_est and x0_est is None:
        raise ValueError("estimated initial states need x0_est")
    if x0_est is not None:
        x0_est = np.asarray(x0_est, float).reshape(n_sets, len(timeline.segments), n_est)
    n_c = n_columns(funcs, timeline)
    b = Batch(funcs, theta.T.copy(), n_c)
    rec = timeline.record
    outputs = {o: np.full((n_sets, rec.outputs[o].t.size), np.nan) for o in spec.output_names}
    sens_out = {o: np.full((n_sets, rec.outputs[o].t.size, n_c), np.nan) for o in spec.output_names} if sens else None
    ok = np.ones(n_sets, bool)
    methods, messages = [], []
    n_steps = 0
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        for seg in timeline.segments:
            if spec.is_static:
                _static_segment(b, funcs, seg, outputs, sens_out, n_c)
                methods.append("static")
                continue
            x0, S0, ok0 = initial_states(b, funcs, seg, timeline, x0_est, sens)
            if not ok0.all():
                messages.append(f"segment {seg.index + 1}: no steady state found for {int((~ok0).sum())} set(s)")
            ok &= ok0
            method = _choose_method(b, x0, seg, tol)
            methods.append(method)
            seg_ok, steps = _integrate_segment(b, funcs, seg, x0, S0, ok.copy(), method, tol, outputs, sens_out,
                                               timeline.linear)
            n_steps += steps
            ok &= seg_ok
    for o in outputs:  # a non-finite compared output fails its set ...
        ok &= np.all(np.isfinite(outputs[o][:, timeline.used[o]]), axis=1)
    for o in outputs:  # ... and every output of a failed set is NaN (all outputs, after all checks)
        outputs[o][~ok] = np.nan
        if sens_out is not None:
            sens_out[o][~ok] = np.nan
    return SimResult(outputs, sens_out, ok, methods, n_steps, messages)


def _observe(b: Batch, funcs, seg: SegmentPlan, k: int, x, S, outputs, sens_out, knot_obs) -> None:
    """Evaluate outputs (and sensitivities) at knot ``k`` where some output is observed."""
    u = seg.u[k]
    g = np.zeros((funcs.n_y, b.n_sets))
    funcs.fns["g"](x, u, b.p, g)
    if sens_out is not None:
        gx = np.zeros((funcs.n_y, funcs.n_x, b.n_sets))
        funcs.fns["gx"](x, u, b.p, gx)
        gs = np.einsum("rjs,jcs->rcs", gx, S) if S is not None else np.zeros((funcs.n_y, b.n_c, b.n_sets))
        if funcs.n_p:
            gp = np.zeros((funcs.n_y, funcs.n_p, b.n_sets))
            funcs.fns["gp"](x, u, b.p, gp)
            gs[:, : funcs.n_p] += gp
    for r, o, j in knot_obs.get(k, ()):
        outputs[o][:, j] = g[r]
        if sens_out is not None:
            sens_out[o][:, j, :] = gs[r].T


def _knot_observations(funcs, seg: SegmentPlan) -> dict[int, list[tuple[int, str, int]]]:
    by_knot: dict[int, list[tuple[int, str, int]]] = {}
    for r, o in enumerate(funcs.spec.output_names):
        for k, j in zip(seg.obs_knot[o], seg.obs_index[o]):
            by_knot.setdefault(int(k), []).append((r, o, int(j)))
    return by_knot


def _static_segment(b: Batch, funcs, seg: SegmentPlan, outputs, sens_out, n_c) -> None:
    """Outputs of a model without states, vectorised over knots and parameter sets at once:
    inputs broadcast as (n_u, n_knots, 1) against parameters (n_p, 1, n_sets)."""
    knots, u, knot_rows = seg.observed_knots
    if knots.size == 0:
        return
    p = b.p[:, None, :]
    x = np.zeros((0, knots.size, b.n_sets))
    g = np.zeros((funcs.n_y, knots.size, b.n_sets))
    funcs.fns["g"](x, u, p, g)
    gp = None
    if sens_out is not None and funcs.n_p:
        gp = np.zeros((funcs.n_y, funcs.n_p, knots.size, b.n_sets))
        funcs.fns["gp"](x, u, p, gp)
    for r, o in enumerate(funcs.spec.output_names):
        rows = knot_rows[o]
        idx = seg.obs_index[o]
        outputs[o][:, idx] = g[r][rows].T
        if sens_out is not None:
            sens_out[o][:, idx, :] = 0.0
            if gp is not None:
                sens_out[o][:, idx, : funcs.n_p] = np.moveaxis(gp[r][:, rows, :], 0, -1).transpose(1, 0, 2)


def h_min(span: float) -> float:
    """The smallest step (s) allowed in a knot interval of length ``span`` (s): 1e-12 of the
    interval, and never below 1e-12 s; the kernels use the same rule."""
    return 1e-12 * max(span, 1.0)


def _integrate_segment(b: Batch, funcs, seg, x, S, ok, method, tol: Tolerances, outputs, sens_out, lin_mask):
    step_fn, order = STEPPERS[method]
    knot_obs = _knot_observations(funcs, seg)
    if 0 in knot_obs:
        _observe(b, funcs, seg, 0, x, S, outputs, sens_out, knot_obs)
    h = None
    n_steps = 0
    linear_mask = lin_mask
    linear = bool(linear_mask.any())
    for k in range(seg.n_knots - 1):
        t0, t1 = seg.t[k], seg.t[k + 1]
        span = t1 - t0
        slope = np.where(linear_mask, (seg.u[k + 1] - seg.u[k]) / span, 0.0) if linear else np.zeros(funcs.n_u)
        iv = Interval(seg.u[k], slope, linear)
        s = 0.0
        h = span if h is None else min(h, span)
        steps_here = 0
        while s < span:
            h = min(h, span - s)
            # the step starts at offset s into the interval: linear inputs from u(t0 + s)
            here = Interval(iv.at(s), iv.slope, True) if linear else iv
            x_new, S_new, err = step_fn(b, x, S, here, h)
            en = error_norm(err, x, x_new, tol.rtol, tol.atol)
            finite = np.all(np.isfinite(x_new), axis=0) & np.isfinite(en)
            newly_bad = ok & ~finite
            steps_here += 1
            if newly_bad.any():
                if h > h_min(span):
                    h *= 0.2  # a blow-up is treated as a rejected step first
                    continue
                ok &= finite  # these sets cannot be integrated: flag them, go on with the rest
            worst = float(np.max(en[ok], initial=0.0))
            if worst <= 1.0:
                s = s + h if span - s - h > 1e-12 * span else span
                x, S = x_new, S_new
                n_steps += 1
                h *= 5.0 if worst == 0.0 else min(5.0, max(0.2, 0.9 * worst ** (-1.0 / order)))
            else:
                h *= max(0.2, 0.9 * worst ** (-1.0 / order))
            if steps_here > MAX_STEPS_PER_INTERVAL or (h < h_min(span) and worst > 1.0):
                ok[:] = False
                return ok, n_steps
        if k + 1 in knot_obs:
            _observe(b, funcs, seg, k + 1, x, S, outputs, sens_out, knot_obs)
    return ok, n_steps


def finite_difference_sensitivities(funcs, timeline: Timeline, theta, x0_est, tol: Tolerances) -> SimResult:
    """Sensitivities of a Python right-hand side: central differences, every perturbed set in
    the same batch as the nominal one, so they share one step sequence (differences of
    smooth functions, not of step-size decisions).

    Per parameter set one reference batch of 1 + 2 * n_c rows (nominal, then +h and -h per
    column, h = 1e-6 * max(1, |value|) in the column's units); the result is a
    :class:`graybox.simulate.contract.SimResult` whose ``sens`` holds the differences,
    ``ok`` is False for a set when any of its rows failed and ``n_steps`` sums the batches'
    steps."""
    theta = np.atleast_2d(np.asarray(theta, float))
    n_sets, n_p = theta.shape
    n_seg, n_est = len(timeline.segments), len(timeline.estimated_states)
    x0 = None if x0_est is None else np.asarray(x0_est, float).reshape(n_sets, n_seg, n_est)
    n_c = n_columns(funcs, timeline)
    out_sens = {o: np.full((n_sets, timeline.record.outputs[o].t.size, n_c), np.nan) for o in funcs.spec.output_names}
    nominal = None
    ok_all = np.ones(n_sets, bool)
    for s in range(n_sets):
        rows_t, rows_x, steps = [theta[s]], [None if x0 is None else x0[s]], []
        for c in range(n_c):
            if c < n_p:
                h = 1e-6 * max(1.0, abs(theta[s, c]))
                for sign in (1, -1):
                    t_ = theta[s].copy()
                    t_[c] += sign * h
                    rows_t.append(t_)
                    rows_x.append(None if x0 is None else x0[s])
            else:
                k = c - n_p
                seg, e = divmod(k, n_est)
                h = 1e-6 * max(1.0, abs(x0[s, seg, e]))
                for sign in (1, -1):
                    x_ = x0[s].copy()
                    x_[seg, e] += sign * h
                    rows_t.append(theta[s])
                    rows_x.append(x_)
            steps.append(h)
        xb = None if x0 is None else np.stack(rows_x)
        res = simulate(funcs, timeline, np.stack(rows_t), x0_est=xb, tol=tol)
        if nominal is None:
            nominal = SimResult({o: np.full((n_sets, v.shape[1]), np.nan) for o, v in res.outputs.items()},
                                out_sens, np.ones(n_sets, bool), res.methods, 0, list(res.messages))
        for o, v in res.outputs.items():
            nominal.outputs[o][s] = v[0]
            for c, h in enumerate(steps):
                out_sens[o][s, :, c] = (v[1 + 2 * c] - v[2 + 2 * c]) / (2 * h)
        ok_all[s] = bool(res.ok.all())
        nominal.n_steps += res.n_steps
    nominal.ok = ok_all
    return nominal
