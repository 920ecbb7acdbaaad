"""Simulation: inputs held (or linear) between samples, states integrated, many parameter
sets per call.  Two engines share one interface:

* the compiled core (:mod:`graybox.simulate.compiled`, numba), used when available;
* the readable numpy reference (:mod:`graybox.simulate.reference`).
"""

from __future__ import annotations

from graybox.simulate.generate import generate
from graybox.simulate.reference import SimResult, Tolerances
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
        return simulate_reference(self.funcs, timeline, theta, x0_est=x0_est, sens=sens, tol=self.tol)


__all__ = ["Engine", "SimResult", "Timeline", "Tolerances", "plan", "simulate_reference", "generate"]
