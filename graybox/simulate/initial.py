"""Initial states of a segment, shared by both engines: given, measured, estimated or steady.

Per state the spec says how its value at the segment's start is found
(:mod:`graybox.simulate.timeline` describes the modes): a given number, the segment's first
valid measurement, a free value per segment (``x0_est``), or the steady state at the
segment's first inputs, found by a damped Newton iteration from a few starting guesses.  With
sensitivities the initial sensitivity matrix follows: a unit column per estimated state, and
for steady states the implicit function theorem on ``f_steady(x) = 0``.
"""

from __future__ import annotations

import numpy as np

from graybox.model.spec import INITIAL_ESTIMATE, INITIAL_MEASURED, INITIAL_STEADY
from graybox.simulate.integrators import Batch
from graybox.simulate.timeline import SegmentPlan, Timeline


def steady_state(b: Batch, x_guess: np.ndarray, u: np.ndarray, rows: np.ndarray,
                 tol: float = 1e-12, max_iter: int = 60) -> tuple[np.ndarray, np.ndarray]:
    """Newton on f_rows(x) = 0 for the states ``rows`` (others held), batched; exact
    Jacobian.  Returns x and a per-set convergence flag."""
    x = x_guess.copy()
    ok = np.zeros(b.n_sets, bool)
    if rows.size == 0:
        return x, np.ones(b.n_sets, bool)
    for _ in range(max_iter):
        f = b.f(x, u)[rows]
        J = b.fx(x, u)[np.ix_(rows, rows)]
        scale = 1.0 + np.abs(x[rows])
        ok = np.all(np.abs(f) <= tol * scale / 1e-3, axis=0) & np.all(np.isfinite(f), axis=0)
        try:
            dx = np.linalg.solve(np.moveaxis(J, -1, 0), np.moveaxis(f, -1, 0)[..., None])[..., 0].T
        except np.linalg.LinAlgError:
            break
        # damped Newton: limit relative moves
        lim = np.max(np.abs(dx) / scale, axis=0, initial=0.0)
        damp = np.where(lim > 1.0, 1.0 / np.maximum(lim, 1e-300), 1.0)
        x[rows] -= dx * damp
        if np.all(np.abs(dx) <= 1e-14 * scale):
            f = b.f(x, u)[rows]
            ok = np.all(np.isfinite(f), axis=0)
            break
    return x, ok & np.all(np.isfinite(x), axis=0)


def initial_states(b: Batch, funcs, seg: SegmentPlan, timeline: Timeline, x0_est, want_sens: bool):
    """The states at the start of segment ``seg`` for every set of the batch ``b``:
    ``x0`` (n_x, n_sets) in the states' units, ``S0`` (n_x, n_c, n_sets) = d x0 / d column
    when ``want_sens`` (else None), and ``ok`` (n_sets,) False where no steady state was
    found.  ``x0_est`` (n_sets, n_segments, n_estimated) holds the estimated initial states
    (read only for states whose mode is ``estimate``)."""
    spec = funcs.spec
    n_x, n_sets = b.n_x, b.n_sets
    x0 = np.zeros((n_x, n_sets))
    est = list(timeline.estimated_states)
    steady_rows = []
    for i, s in enumerate(spec.states):
        if s.initial == INITIAL_MEASURED:
            x0[i] = seg.x0_measured[s.name]
        elif s.initial == INITIAL_STEADY:
            steady_rows.append(i)
            guess = s.initial_bounds
            x0[i] = np.clip(1.0, *guess) if np.all(np.isfinite(guess)) else 1.0
        elif s.initial == INITIAL_ESTIMATE:
            x0[i] = x0_est[:, seg.index, est.index(s.name)]
        else:
            x0[i] = float(s.initial)
    rows = np.array(steady_rows, int)
    ok = np.ones(n_sets, bool)
    u0 = seg.u[0]
    if rows.size:
        x0, ok = _steady_with_guesses(b, x0, u0, rows)
    S0 = None
    if want_sens:
        n_c = b.n_c
        S0 = np.zeros((n_x, n_c, n_sets))
        base = funcs.n_p + seg.index * len(est)
        for e, name in enumerate(est):
            S0[spec.state_names.index(name), base + e] = 1.0
        if rows.size:
            # implicit function theorem on the steady rows: f_r(x_r, x_other, p) = 0
            J = b.fx(x0, u0)
            Jrr = np.moveaxis(J[np.ix_(rows, rows)], -1, 0)
            rhs = np.zeros((rows.size, n_c, n_sets))
            if funcs.n_p:
                fp = np.zeros((n_x, funcs.n_p, n_sets))
                funcs.fns["fp"](x0, u0, b.p, fp)
                rhs[:, : funcs.n_p] = fp[rows]
            other = np.setdiff1d(np.arange(n_x), rows)
            if other.size:
                rhs += np.einsum("ros,ocs->rcs", J[np.ix_(rows, other)], S0[other])
            with np.errstate(all="ignore"):
                try:
                    sol = np.linalg.solve(Jrr, np.moveaxis(rhs, -1, 0))
                except np.linalg.LinAlgError:
                    sol = np.full_like(np.moveaxis(rhs, -1, 0), np.nan)
            S0[rows] = -np.moveaxis(sol, 0, -1)
    return x0, S0, ok


def _steady_with_guesses(b: Batch, x0, u0, rows):
    """Steady state from a few starting guesses (Newton's basin is not global)."""
    best = x0.copy()
    ok = np.zeros(b.n_sets, bool)
    for start in (1.0, 0.0, 10.0, 300.0, -1.0, 1e3):
        trial = x0.copy()
        trial[rows] = start
        x, good = steady_state(b, trial, u0, rows)
        take = good & ~ok
        best[:, take] = x[:, take]
        ok |= good
        if ok.all():
            break
    return best, ok

