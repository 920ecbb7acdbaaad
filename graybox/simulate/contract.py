"""What every simulation engine shares: the tolerances it takes, the result it returns, the
protocol it implements, and the layout of sensitivity columns.

The reference engine (:mod:`graybox.simulate.reference`), the compiled core
(:mod:`graybox.simulate.compiled`) and the dispatcher in front of them
(:class:`graybox.simulate.engine.Engine`) all speak these types, so none of them imports
another to learn what a result looks like.  The contract (DEVELOPERS.md): the same
:meth:`SimulationEngine.simulate` semantics for every engine, agreeing to 1e-9.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Protocol, runtime_checkable

import numpy as np

from graybox.simulate.integrators import AUTO

if TYPE_CHECKING:  # pragma: no cover - annotations only
    from graybox.simulate.timeline import Timeline


@dataclass(frozen=True)
class Tolerances:
    """Integration tolerances and method choice, shared by every engine.

    ``rtol`` (relative, dimensionless) and ``atol`` (absolute, in each state's own units) enter
    the error norm ``RMS_i(err_i / (atol + rtol * max(|x_old_i|, |x_new_i|)))`` that the
    step-size controller keeps at or below one.  ``method`` is ``"auto"`` (explicit unless the
    segment is stiff, see :data:`graybox.simulate.integrators.STIFF_RATIO`), ``"explicit"``
    (Dormand-Prince 5(4)) or ``"implicit"`` (Rodas4); an engine raises ``ValueError`` for any
    other value when it simulates."""

    rtol: float = 1e-8
    atol: float = 1e-10  # absolute, in state units
    method: str = AUTO


@dataclass
class SimResult:
    """The outcome of one simulation call over a batch of ``n_sets`` parameter sets.

    ``outputs``: output name -> array (n_sets, n_obs), the simulated value at *every*
    observation time of that output in the record (NaN where the observation is not
    compared, see ``Timeline.used``, and for every output of a failed set).  ``sens``: output
    name -> array (n_sets, n_obs, n_cols) of exact derivatives d output / d column (columns:
    see :func:`n_columns`), or ``None`` when not asked for.  ``ok``: (n_sets,) bool, False
    for a set whose integration failed (non-finite values, step-size underflow, too many
    steps, no steady state).  ``methods``: the method used per segment (``"explicit"``,
    ``"implicit"`` or ``"static"``).  ``n_steps``: accepted steps over all segments (the
    reference counts a step shared by the batch once; the compiled core, one step size per
    set, sums every set's steps).  ``messages``: notes for the user (e.g. a segment without
    steady state)."""

    outputs: dict[str, np.ndarray]  # output -> (n_sets, n_obs) at ALL its observations (NaN where not compared)
    sens: dict[str, np.ndarray] | None  # output -> (n_sets, n_obs, n_cols)
    ok: np.ndarray  # (n_sets,) bool
    methods: list[str]  # method used per segment
    n_steps: int
    messages: list[str]


@runtime_checkable
class SimulationEngine(Protocol):
    """What the layers above simulation call (the estimator, the sampler, the workflow):
    :class:`graybox.simulate.engine.Engine` implements it for every engine it dispatches to.

    ``name`` is the engine actually used (``"compiled"`` or ``"reference"``) and ``note``
    says why when that is not the one asked for (empty otherwise)."""

    name: str
    note: str

    def simulate(self, timeline: Timeline, theta, *, x0_est=None, sens: bool = False) -> SimResult:
        """Outputs (and, with ``sens``, their sensitivities) at the observation times of
        ``timeline`` for each row of ``theta`` (n_sets, n_p) in the spec's parameter order;
        ``x0_est`` (n_sets, n_segments * n_estimated_states) the estimated initial states."""
        ...

    def sse(self, timeline: Timeline, theta, *, x0_est=None) -> tuple[np.ndarray, np.ndarray]:
        """Per set and output the sum of squared residuals (observed - simulated) over the
        compared observations, shape (n_sets, n_outputs), NaN for a failed set; and ok
        (n_sets,)."""
        ...


def n_columns(funcs, timeline: Timeline) -> int:
    """Number of sensitivity columns of a :class:`SimResult`: every parameter of the spec
    (``funcs.n_p``, in the spec's order), then each segment's estimated initial states
    (segment-major, in ``timeline.estimated_states`` order)."""
    return funcs.n_p + len(timeline.segments) * len(timeline.estimated_states)


__all__ = ["SimResult", "SimulationEngine", "Tolerances", "n_columns"]
