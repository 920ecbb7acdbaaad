"""Simulation: inputs held (or linear) between samples, states integrated, many parameter
sets per call.  Two engines share one interface:

* the compiled core (:mod:`graybox.simulate.compiled`, numba), used when available;
* the readable numpy reference (:mod:`graybox.simulate.reference`).
"""

from __future__ import annotations

from graybox.simulate.generate import generate
from graybox.simulate.contract import SimResult, Tolerances
from graybox.simulate.reference import simulate as simulate_reference
from graybox.simulate.timeline import Timeline, plan

ENGINES = ("auto", "compiled", "reference")


class Engine:
    """Simulates one spec with the chosen engine (``auto``: compiled when it can)."""

    def __init__(self, spec, engine: str = "auto", tol: Tolerances = Tolerances()):
        if engine not in ENGINES:
            raise ValueError(f"engine must be one of {ENGINES}")
        self.spec = spec
        self.tol = tol
        self.funcs = generate(spec)
        self.compiled = None
        self.note = ""
        if engine == "auto" and spec.is_static:
            # no states to integrate: the vectorised numpy outputs are as fast as compiled code
            # would be, without the compile time
            engine = "reference"
            self.note = "static model (no states): outputs evaluated by the vectorised reference path"
        if engine in ("auto", "compiled"):
            try:
                from graybox.simulate import compiled as _compiled

                if _compiled.compiled_available(spec):
                    self.compiled = _compiled.compile_model(spec)
                else:
                    self.note = "the model's right-hand side is a Python function: reference path used"
            except ImportError as exc:  # numba missing: the reference path still works
                if engine == "compiled":
                    raise
                self.note = f"compiled core unavailable ({exc}); reference path used"
        self.name = "compiled" if self.compiled is not None else "reference"

    def simulate(self, timeline: Timeline, theta, *, x0_est=None, sens: bool = False) -> SimResult:
        if self.compiled is not None:
            return self.compiled.simulate(timeline, theta, x0_est=x0_est, sens=sens, tol=self.tol)
        if sens and self.spec.python_rhs is not None:
            return finite_difference_sensitivities(self.funcs, timeline, theta, x0_est, self.tol)
        return simulate_reference(self.funcs, timeline, theta, x0_est=x0_est, sens=sens, tol=self.tol)


    def sse(self, timeline: Timeline, theta, *, x0_est=None):
        """Per set and output the sum of squared residuals (observed - simulated) over the
        compared observations, and ok flags: the compiled core keeps no trajectory for it;
        the reference path simulates and sums."""
        import numpy as np

        if self.compiled is not None:
            sse, _, ok = self.compiled.sse(timeline, theta, x0_est=x0_est, tol=self.tol)
            return sse, ok
        res = self.simulate(timeline, theta, x0_est=x0_est)
        sse = np.zeros((res.ok.size, len(self.spec.outputs)))
        for r, o in enumerate(self.spec.output_names):
            used = timeline.used[o]
            observed = timeline.record.outputs[o].values[used]
            sse[:, r] = np.sum((observed[None, :] - res.outputs[o][:, used]) ** 2, axis=1)
        sse[~res.ok] = np.nan
        return sse, res.ok


def finite_difference_sensitivities(funcs, timeline: Timeline, theta, x0_est, tol: Tolerances) -> SimResult:
    """Sensitivities of a Python right-hand side: central differences, every perturbed set in
    the same batch as the nominal one, so they share one step sequence (differences of
    smooth functions, not of step-size decisions)."""
    import numpy as np

    from graybox.simulate.contract import n_columns

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
        res = simulate_reference(funcs, timeline, np.stack(rows_t), x0_est=xb, tol=tol)
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


__all__ = ["Engine", "SimResult", "Timeline", "Tolerances", "plan", "simulate_reference", "generate"]
