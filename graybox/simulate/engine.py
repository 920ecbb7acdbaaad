"""The one engine dispatcher: which simulator runs a spec, chosen once per spec.

:class:`Engine` is what the layers above simulation hold (it implements
:class:`graybox.simulate.contract.SimulationEngine`).  ``"auto"`` takes the compiled core
(:mod:`graybox.simulate.compiled`) when it can run the spec and the numpy reference
(:mod:`graybox.simulate.reference`) otherwise: for a static model (no states, where the
vectorised numpy outputs are as fast as compiled code, without the compile time) and for a
right-hand side given as a Python function (its sensitivities then come from central
differences).  :attr:`Engine.note` says why the reference path was taken.
:func:`simulate_auto` is a single call through the same decision.
"""

from __future__ import annotations

import numpy as np

from graybox.simulate.compiled import PYTHON_RHS_NOTE, compile_model, compiled_available
from graybox.simulate.contract import SimResult, Tolerances
from graybox.simulate.generate import generate
from graybox.simulate.reference import finite_difference_sensitivities
from graybox.simulate.reference import simulate as simulate_reference
from graybox.simulate.timeline import Timeline

ENGINES = ("auto", "compiled", "reference")
STATIC_NOTE = "static model (no states): outputs evaluated by the vectorised reference path"


class Engine:
    """Simulates one spec with the chosen engine (``auto``: compiled when it can).

    ``engine`` is one of :data:`ENGINES` (else ``ValueError``); ``tol`` applies to every call.
    After construction ``name`` is the engine actually used (``"compiled"`` or
    ``"reference"``) and ``note`` the reason when the compiled core was asked for (or
    ``auto``) but not used, else empty.  Building the compiled core may compile the model's
    generated module (seconds on first use; cached on disk).  ``engine="compiled"`` re-raises
    an ImportError of the compiled core instead of falling back."""

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
            self.note = STATIC_NOTE
        if engine in ("auto", "compiled"):
            try:
                if compiled_available(spec):
                    self.compiled = compile_model(spec)
                else:
                    self.note = PYTHON_RHS_NOTE
            except ImportError as exc:  # numba missing: the reference path still works
                if engine == "compiled":
                    raise
                self.note = f"compiled core unavailable ({exc}); reference path used"
        self.name = "compiled" if self.compiled is not None else "reference"

    def simulate(self, timeline: Timeline, theta, *, x0_est=None, sens: bool = False) -> SimResult:
        """Outputs at the observation times of ``timeline`` for each row of ``theta``
        (n_sets, n_p), optionally with sensitivities: see
        :meth:`graybox.simulate.contract.SimulationEngine.simulate`.  Raises ``ValueError``
        for a ``theta`` of the wrong width or missing ``x0_est`` for estimated states."""
        if self.compiled is not None:
            return self.compiled.simulate(timeline, theta, x0_est=x0_est, sens=sens, tol=self.tol)
        if sens and self.spec.python_rhs is not None:
            return finite_difference_sensitivities(self.funcs, timeline, theta, x0_est, self.tol)
        return simulate_reference(self.funcs, timeline, theta, x0_est=x0_est, sens=sens, tol=self.tol)

    def sse(self, timeline: Timeline, theta, *, x0_est=None):
        """Per set and output the sum of squared residuals (observed - simulated) over the
        compared observations, and ok flags: the compiled core keeps no trajectory for it;
        the reference path simulates and sums."""
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


def simulate_auto(spec, timeline: Timeline, theta, *, x0_est=None, sens: bool = False,
                  tol: Tolerances = Tolerances()) -> SimResult:
    """One simulation through :class:`Engine` with ``engine="auto"``; when the reference path
    is taken, the engine's note (why) is appended to the result's ``messages``."""
    engine = Engine(spec, "auto", tol)
    res = engine.simulate(timeline, theta, x0_est=x0_est, sens=sens)
    if engine.note:
        res.messages.append(engine.note)
    return res


__all__ = ["ENGINES", "Engine", "simulate_auto"]
