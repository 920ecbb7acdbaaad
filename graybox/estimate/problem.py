"""The estimation problem: a model, one or more experiments, and the vector of free values.

The free vector holds, in order: each free shared parameter; each free local parameter once
per experiment; each estimated initial state once per experiment and segment.  Names shown
to users are ``UA``, ``UA[exp2]``, ``T0[main]`` or ``T0[main:2]``; lmfit gets safe keys
(``UA``, ``UA__exp2``, ...).

Residuals are ``(measured - model) / sigma_output`` at every compared observation, in a
fixed order (experiment, output, observation), so the Jacobian from the sensitivities lines
up with them exactly.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np

from graybox.errors import FitError
from graybox.model.spec import SCOPE_LOCAL, ModelSpec
from graybox.simulate import Engine, SimResult, Timeline


@dataclass(frozen=True)
class FreeValue:
    """One entry of the free vector."""

    name: str  # shown to users
    key: str  # safe for lmfit
    kind: str  # "parameter" or "initial"
    index: int  # model parameter index, or state index for an initial state
    experiment: int | None  # None: shared by all experiments
    segment: int | None
    guess: float
    lower: float
    upper: float
    units: str
    log_scale: bool = False


def _safe_key(text: str) -> str:
    return re.sub(r"[^0-9a-zA-Z_]", "_", text)


@dataclass
class Experiment:
    """One experiment of a problem: its name and the simulation timeline planned from its record."""

    name: str
    timeline: Timeline

    @property
    def record(self):
        """The experiment's data (:class:`graybox.data.record.Record`) the timeline was planned from."""
        return self.timeline.record


class Problem:
    """Maps free vectors to simulations and weighted residuals."""

    def __init__(self, spec: ModelSpec, experiments: list[Experiment], engine: Engine):
        if not experiments:
            raise FitError("no experiment to fit")
        self.spec = spec
        self.experiments = experiments
        self.engine = engine
        self.free = self._layout()
        if not self.free:
            raise FitError("every parameter is fixed: there is nothing to estimate",
                           hint="set fixed = false for at least one parameter")
        self._observed = [
            {o: e.record.outputs[o].values[e.timeline.used[o]] for o in spec.output_names} for e in experiments
        ]
        self.n_obs_per_output = {o: int(sum(e.timeline.n_obs_of(o) for e in experiments)) for o in spec.output_names}

    # -- layout --------------------------------------------------------------------------------
    def _layout(self) -> list[FreeValue]:
        spec, exps = self.spec, self.experiments
        out: list[FreeValue] = []
        for k, p in enumerate(spec.parameters):
            if p.fixed:
                continue
            if p.scope == SCOPE_LOCAL and len(exps) > 1:
                for e, ex in enumerate(exps):
                    out.append(FreeValue(f"{p.name}[{ex.name}]", _safe_key(f"{p.name}__{ex.name}"), "parameter", k, e,
                                         None, p.guess, p.lower, p.upper, p.units, p.log_scale))
            else:
                out.append(FreeValue(p.name, _safe_key(p.name), "parameter", k, None, None, p.guess, p.lower, p.upper,
                                     p.units, p.log_scale))
        for e, ex in enumerate(exps):
            tl = ex.timeline
            for seg in tl.segments:
                for name in tl.estimated_states:
                    i = spec.state_names.index(name)
                    s = spec.states[i]
                    guess = _initial_guess(ex, seg.index, name, spec)
                    label = f"{name}0[{ex.name}]" if len(tl.segments) == 1 else f"{name}0[{ex.name}:{seg.index + 1}]"
                    lo, hi = s.initial_bounds
                    out.append(FreeValue(label, _safe_key(f"init_{name}__{ex.name}_{seg.index + 1}"), "initial", i, e,
                                         seg.index, float(np.clip(guess, lo, hi)), lo, hi, s.units))
        return out

    @property
    def names(self) -> list[str]:
        """The free values' names, in the order of the free vector."""
        return [f.name for f in self.free]

    @property
    def n_free(self) -> int:
        """The number of free values (parameters and estimated initial states)."""
        return len(self.free)

    @property
    def n_obs(self) -> int:
        """The number of valid observations over every experiment and output."""
        return sum(self.n_obs_per_output.values())

    def guess(self) -> np.ndarray:
        """The starting free vector, shape (n_free,)."""
        return np.array([f.guess for f in self.free])

    def bounds(self) -> tuple[np.ndarray, np.ndarray]:
        """The lower and upper bounds of the free vector, each shape (n_free,) (may be infinite)."""
        return np.array([f.lower for f in self.free]), np.array([f.upper for f in self.free])

    # -- mapping free vectors to model arguments -----------------------------------------------
    def model_arguments(self, X: np.ndarray, e: int) -> tuple[np.ndarray, np.ndarray | None]:
        """theta (n_sets, n_p) and x0_est (n_sets, n_seg, n_est) of experiment ``e``."""
        X = np.atleast_2d(X)
        n_sets = X.shape[0]
        theta = np.tile(self.spec.guesses(), (n_sets, 1))
        tl = self.experiments[e].timeline
        n_est = len(tl.estimated_states)
        x0 = np.zeros((n_sets, len(tl.segments), n_est)) if n_est else None
        for j, f in enumerate(self.free):
            if f.experiment is not None and f.experiment != e:
                continue
            if f.kind == "parameter":
                theta[:, f.index] = X[:, j]
            else:
                x0[:, f.segment, tl.estimated_states.index(self.spec.state_names[f.index])] = X[:, j]
        return theta, x0

    def column_map(self, e: int) -> list[tuple[int, int]]:
        """(free column, sensitivity column) pairs for experiment ``e``."""
        tl = self.experiments[e].timeline
        n_p = len(self.spec.parameters)
        pairs = []
        for j, f in enumerate(self.free):
            if f.experiment is not None and f.experiment != e:
                continue
            if f.kind == "parameter":
                pairs.append((j, f.index))
            else:
                e_idx = tl.estimated_states.index(self.spec.state_names[f.index])
                pairs.append((j, n_p + f.segment * len(tl.estimated_states) + e_idx))
        return pairs

    # -- simulation ----------------------------------------------------------------------------
    def simulate(self, X: np.ndarray, sens: bool = False) -> list[SimResult]:
        """Each experiment simulated at the free vectors ``X`` (n_free,) or (n_sets, n_free):
        one :class:`~graybox.simulate.SimResult` per experiment, with forward sensitivities
        when ``sens``."""
        out = []
        for e, ex in enumerate(self.experiments):
            theta, x0 = self.model_arguments(X, e)
            out.append(self.engine.simulate(ex.timeline, theta, x0_est=x0, sens=sens))
        return out

    def predictions(self, X: np.ndarray) -> tuple[list[dict[str, np.ndarray]], np.ndarray]:
        """Model outputs at compared observations: per experiment {output: (n_sets, n_used)}."""
        sims = self.simulate(X)
        ok = np.all([s.ok for s in sims], axis=0)
        preds = [{o: s.outputs[o][:, ex.timeline.used[o]] for o in self.spec.output_names}
                 for s, ex in zip(sims, self.experiments)]
        return preds, ok

    def sse_per_output(self, X: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Unweighted SSE per output (n_sets, n_outputs) and ok flags."""
        preds, ok = self.predictions(X)
        X = np.atleast_2d(X)
        sse = np.zeros((X.shape[0], len(self.spec.outputs)))
        for e, pred in enumerate(preds):
            for r, o in enumerate(self.spec.output_names):
                sse[:, r] += np.sum((self._observed[e][o][None, :] - pred[o]) ** 2, axis=1)
        sse[~ok] = np.inf
        return sse, ok

    def sse_by_experiment(self, X: np.ndarray) -> tuple[list[np.ndarray], np.ndarray]:
        """Per experiment the unweighted SSE per output (n_sets, n_outputs), from the engine's
        SSE mode (no trajectories kept), and ok flags over all experiments."""
        X = np.atleast_2d(X)
        out, ok = [], np.ones(X.shape[0], bool)
        for e, ex in enumerate(self.experiments):
            theta, x0 = self.model_arguments(X, e)
            sse, ok_e = self.engine.sse(ex.timeline, theta, x0_est=x0)
            out.append(sse)
            ok &= ok_e
        return out, ok

    def residuals(self, x: np.ndarray, sigmas: np.ndarray) -> np.ndarray:
        """Weighted residuals for one free vector (NaN-free; +inf-free): 1-D array."""
        preds, ok = self.predictions(np.atleast_2d(x))
        parts = []
        for e, pred in enumerate(preds):
            for r, o in enumerate(self.spec.output_names):
                parts.append((self._observed[e][o] - pred[o][0]) / sigmas[r])
        res = np.concatenate(parts)
        if not ok[0] or not np.all(np.isfinite(res)):
            return np.full(res.size, np.nan)
        return res

    def jacobian(self, x: np.ndarray, sigmas: np.ndarray) -> np.ndarray:
        """d residual / d free value, from the forward sensitivities: (n_res, n_free)."""
        sims = self.simulate(np.atleast_2d(x), sens=True)
        blocks = []
        for e, (sim, ex) in enumerate(zip(sims, self.experiments)):
            pairs = self.column_map(e)
            for r, o in enumerate(self.spec.output_names):
                S = sim.sens[o][0][ex.timeline.used[o]]  # (n_used, n_cols)
                block = np.zeros((S.shape[0], self.n_free))
                for j, c in pairs:
                    block[:, j] = -S[:, c] / sigmas[r]
                blocks.append(block)
        return np.vstack(blocks)

    def observed(self, e: int, output: str) -> np.ndarray:
        """The measured values of ``output`` in experiment ``e`` (model units, valid samples only)."""
        return self._observed[e][output]


def _initial_guess(ex: Experiment, seg_index: int, state: str, spec: ModelSpec) -> float:
    """Guess for an estimated initial state: its first measurement if measured, else 1."""
    for o in spec.outputs:
        if o.state == state:
            series = ex.record.outputs[o.name]
            seg = ex.record.segments[seg_index]
            ok = np.flatnonzero(series.mask & seg.contains(series.t))
            if ok.size:
                return float(series.values[ok[0]])
    return 1.0
