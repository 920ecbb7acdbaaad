"""The compiled simulation core at run time: one adaptive step size per parameter set, in
machine code numba compiled from the model's generated module.

:func:`compile_model` gets the module's text from :mod:`graybox.simulate.kernel_source`,
writes it into the on-disk cache and imports it (:mod:`graybox.simulate.cache`), so a second
process running the same model loads machine code instead of compiling.
:class:`CompiledModel` lays a timeline out as flat tables for the kernels (once per
timeline), finds the initial states and the method per segment in numpy (the reference's
routines), and calls the entry kernels.

The algorithm is the reference's (:mod:`graybox.simulate.reference`, same coefficients, error
norm, step-size controller, restarts at every knot, failure rules, initial states and method
choice), with one deliberate difference: every parameter set of a batch has its *own*
adaptive step (the reference shares one step over the batch).  A one-set batch therefore
takes the same steps as the reference and agrees with it to rounding.

Memory grows with observations x parameter sets x outputs (the results), never with the
number of steps; :meth:`CompiledModel.sse` and :meth:`CompiledModel.innovation_sse` keep only
(n_sets, n_outputs) sums and no trajectory at all.  No thread pool is used (one thread per
process; fleet batches parallelise over processes); the kernel releases the GIL.
"""

from __future__ import annotations

import math
import threading
import weakref
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from types import ModuleType
from typing import Mapping

import numpy as np

from graybox.model.spec import ModelSpec
from graybox.simulate.contract import SimResult, Tolerances, n_columns
from graybox.simulate.generate import ModelFunctions, generate, spec_digest
from graybox.simulate.initial import initial_states
from graybox.simulate.integrators import (
    AUTO,
    EXPLICIT,
    IMPLICIT,
    METHODS,
    STIFF_RATIO,
    Batch,
    spectral_radius,
)
from graybox.simulate.kernel_source import module_source
from graybox.simulate.timeline import SegmentPlan, Timeline

MODE_STORE, MODE_SSE = 0, 1
PYTHON_RHS_NOTE = "the model's right-hand side is a Python function: reference path used"
_EMPTY2, _EMPTY3 = np.zeros((0, 0)), np.zeros((0, 0, 0))  # placeholders for unused kernel arguments
_WARM: dict[str, set[str]] = {}  # generated module -> entry kernels already called in this process


# ---------------------------------------------------------------------------------------------
# Timeline tables for the kernel (built once per timeline and model, cached)


@dataclass(frozen=True)
class SegmentTable:
    """One segment as flat arrays: knots, inputs, observations grouped by knot (CSR)."""

    t: np.ndarray  # (n_k,)
    u: np.ndarray  # (n_k, n_u) C-contiguous
    knot_ptr: np.ndarray  # (n_k + 1,) observations of knot k are entries knot_ptr[k]:knot_ptr[k+1]
    obs_r: np.ndarray  # (n_e,) output index of each entry
    obs_col: np.ndarray  # (n_e,) flat column: offset of the output + index of its observation
    h_typ: float  # median knot interval (for the choice of method)


@dataclass(frozen=True)
class TimelineTables:
    """A whole timeline as the kernels read it: every output's observations side by side in one
    flat column range (``offsets[o]`` to ``offsets[o] + sizes[o]``, all observations of the
    record, compared or not), the observed values ``y_obs`` (n_cols,) in the record's (model)
    units, one :class:`SegmentTable` per segment, the linear-input mask ``lin`` (n_u,) and the
    number of compared observations per output ``n_used`` (n_outputs,)."""

    offsets: dict[str, int]  # output -> first flat column
    sizes: dict[str, int]  # output -> number of observations (all, compared or not)
    n_cols: int
    y_obs: np.ndarray  # (n_cols,) observed values (compared ones are finite)
    segments: tuple[SegmentTable, ...]
    lin: np.ndarray  # (n_u,) bool
    n_used: np.ndarray  # (n_outputs,) compared observations per output


def segment_table(seg: SegmentPlan, output_names: list[str], offsets: Mapping[str, int]) -> SegmentTable:
    """The flat tables of one segment: knot times (s) and inputs copied as fresh C-contiguous,
    writeable arrays (numba compiles a read-only array as another type), and the compared
    observations sorted by knot in CSR form (``knot_ptr``), each with its output row and flat
    column (``offsets`` from :func:`timeline_tables`)."""
    knots, rows, cols = [], [], []
    for r, o in enumerate(output_names):
        k = np.asarray(seg.obs_knot[o], np.int64)
        knots.append(k)
        rows.append(np.full(k.size, r, np.int64))
        cols.append(offsets[o] + np.asarray(seg.obs_index[o], np.int64))
    knot = np.concatenate(knots) if knots else np.zeros(0, np.int64)
    order = np.argsort(knot, kind="stable")
    counts = np.bincount(knot, minlength=seg.n_knots) if knot.size else np.zeros(seg.n_knots, np.int64)
    ptr = np.zeros(seg.n_knots + 1, np.int64)
    np.cumsum(counts, out=ptr[1:])
    # fresh writeable copies: numba types a read-only array differently (another compilation)
    h_typ = float(np.median(np.diff(seg.t))) if seg.n_knots >= 2 else 0.0
    return SegmentTable(_own(seg.t, float), _own(seg.u, float), ptr,
                        _own(np.concatenate(rows)[order], np.int64), _own(np.concatenate(cols)[order], np.int64), h_typ)


def _own(a, dtype) -> np.ndarray:
    """A C-contiguous, writeable copy."""
    return np.array(a, dtype=dtype, order="C", copy=True)


def timeline_tables(spec: ModelSpec, timeline: Timeline) -> TimelineTables:
    """The kernel tables of ``timeline`` for ``spec``'s outputs (see :class:`TimelineTables`);
    pure, built once per timeline by :meth:`CompiledModel.tables`."""
    names = spec.output_names
    rec = timeline.record
    sizes = {o: int(rec.outputs[o].t.size) for o in names}
    offsets, at = {}, 0
    for o in names:
        offsets[o] = at
        at += sizes[o]
    y_obs = np.concatenate([np.asarray(rec.outputs[o].values, float) for o in names]) if names else np.zeros(0)
    segs = tuple(segment_table(seg, names, offsets) for seg in timeline.segments)
    lin = _own(np.asarray(timeline.linear, bool).reshape(len(spec.inputs)), bool)
    n_used = np.array([timeline.n_obs_of(o) for o in names], dtype=np.int64)
    return TimelineTables(offsets, sizes, at, y_obs, segs, lin, n_used)


# ---------------------------------------------------------------------------------------------
# The compiled model


def largest_rate(b: Batch, x0: np.ndarray, u: np.ndarray) -> float:
    """The spectral radius of f_x over the batch (as integrators.spectral_radius; for one
    state the eigenvalue is the entry itself, which skips the eigenvalue routine)."""
    if b.n_x != 1:
        return spectral_radius(b, x0, u)
    largest = float(np.abs(b.fx(x0, u)).max())
    return largest if math.isfinite(largest) else np.inf  # NaN propagates through max


def choose_method(b: Batch, x0: np.ndarray, seg: SegmentPlan, h_typ: float, tol: Tolerances) -> str:
    """The reference's rule: implicit when the spectral radius of f_x at the start (largest
    over the batch) times the median knot interval ``h_typ`` exceeds STIFF_RATIO."""
    if tol.method != AUTO:
        return tol.method
    if seg.n_knots < 2:
        return EXPLICIT
    return IMPLICIT if largest_rate(b, x0, seg.u[0]) * h_typ > STIFF_RATIO else EXPLICIT


@dataclass
class _Run:
    """Per-call arrays shared by the segments of one call."""

    ok: np.ndarray
    steps: np.ndarray
    methods: list[str]
    messages: list[str]


class CompiledModel:
    """The compiled simulator of one spec (build it with :func:`compile_model`).

    ``module`` is the imported generated module (:func:`graybox.simulate.kernel_source.module_source`);
    ``fast_path=False`` keeps explicit runs without sensitivities on the general kernel (the
    reference's order of operations).  Raises ``ValueError`` for a spec whose right-hand side
    is a Python function (nothing to compile).  Safe to share between threads: the per-timeline
    tables are built under a lock, the kernels hold no state between calls."""

    def __init__(self, spec: ModelSpec, module: ModuleType, fast_path: bool = True):
        if spec.python_rhs is not None:
            raise ValueError(PYTHON_RHS_NOTE)
        self.spec = spec
        self.module = module
        self.fast_path = fast_path
        self.funcs: ModelFunctions = generate(spec)  # numpy functions: initial states, method choice
        self.digest = spec_digest(spec)
        self._tables: dict[int, tuple[weakref.ref, TimelineTables]] = {}
        self._lock = threading.Lock()
        self._ones = np.ones(len(spec.outputs))  # default weights, phi and dt_ref

    # -- public ------------------------------------------------------------------------------
    def simulate(self, timeline: Timeline, theta, *, x0_est=None, sens: bool = False,
                 tol: Tolerances = Tolerances()) -> SimResult:
        """Outputs at observation times for each parameter set (rows of ``theta``, shape
        (n_sets, n_p)), with ``sens`` also their sensitivities: the same result as
        :func:`graybox.simulate.reference.simulate` (see
        :class:`graybox.simulate.contract.SimResult` for shapes).  ``x0_est`` (n_sets,
        n_segments * n_estimated_states) is required when the spec estimates initial states.
        Raises ``ValueError`` for an unknown ``tol.method``, a ``theta`` of the wrong width or
        a missing ``x0_est``."""
        theta, x0_est = self._check(timeline, theta, x0_est, tol)
        tab = self.tables(timeline)
        n_sets = theta.shape[0]
        n_c = n_columns(self.funcs, timeline) if sens else 0
        out_y = np.full((n_sets, tab.n_cols), np.nan)
        out_s = np.full((n_sets, tab.n_cols, n_c), np.nan) if sens else np.zeros((0, 0, 0))
        run = self._run(timeline, tab, theta, x0_est, sens, tol, MODE_STORE, out_y, out_s, None, None, None, None)
        ok = run.ok  # (the kernel fails a set at a non-finite output: all outputs are compared ones)
        out_y[~ok] = np.nan
        outputs = {o: out_y[:, tab.offsets[o]:tab.offsets[o] + tab.sizes[o]] for o in self.spec.output_names}
        sens_out = None
        if sens:
            out_s[~ok] = np.nan
            sens_out = {o: out_s[:, tab.offsets[o]:tab.offsets[o] + tab.sizes[o]] for o in self.spec.output_names}
        return SimResult(outputs, sens_out, ok, run.methods, int(run.steps.sum()), run.messages)

    def sse(self, timeline: Timeline, theta, weights: Mapping[str, float] | None = None, *, x0_est=None,
            tol: Tolerances = Tolerances()) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Per set and output the weighted sum of squared residuals (observed - simulated)
        over the compared observations (``timeline.used``), without storing trajectories.

        ``weights``: per output name a factor on its squared residuals (default 1; an
        unknown output is a ``ValueError``).  Returns ``sse`` (n_sets, n_outputs; NaN for a
        set that failed), ``n_used`` (n_outputs,) and ``ok`` (n_sets,)."""
        theta, x0_est = self._check(timeline, theta, x0_est, tol)
        w = self._weights(weights)
        tab = self.tables(timeline)
        sse = np.zeros((theta.shape[0], len(self.spec.outputs)))
        run = self._run(timeline, tab, theta, x0_est, False, tol, MODE_SSE, None, None, w, sse, None, None)
        sse[~run.ok] = np.nan
        return sse, self._n_used(timeline), run.ok

    def innovation_sse(self, timeline: Timeline, theta, phi, weights: Mapping[str, float] | None = None, *,
                       dt_ref=None, x0_est=None, tol: Tolerances = Tolerances()
                       ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Sums of squared AR(1) innovations of the residuals r_j (observed - simulated):
        per set and output, the weighted sum over consecutive compared observations of one
        segment of ``(r_j - phi_eff * r_{j-1})**2`` with ``phi_eff = phi**(dt / dt_ref)``
        (dt the time between the two observations).

        ``phi``: per output, in [0, 1) (a mapping by output name or a sequence in output
        order); ``dt_ref``: per output, the time step ``phi`` refers to (default: the median
        interval between the output's compared observations).  Returns ``(sse, ssa, n_pairs,
        ok)``: the plain weighted SSE (as :meth:`sse`), the innovation sums (both
        (n_sets, n_outputs), NaN for a failed set), the number of pairs per output and ok."""
        theta, x0_est = self._check(timeline, theta, x0_est, tol)
        names = self.spec.output_names
        phi_v = self._per_output(phi, "phi")
        if np.any(~np.isfinite(phi_v)) or np.any(phi_v < 0.0) or np.any(phi_v >= 1.0):
            raise ValueError("phi must be in [0, 1) for every output")
        dt_v = self._default_dt_ref(timeline) if dt_ref is None else self._per_output(dt_ref, "dt_ref")
        if np.any(~(dt_v > 0.0)) or np.any(~np.isfinite(dt_v)):
            raise ValueError("dt_ref must be positive and finite for every output")
        w = self._weights(weights)
        tab = self.tables(timeline)
        sse = np.zeros((theta.shape[0], len(names)))
        ssa = np.zeros_like(sse)
        run = self._run(timeline, tab, theta, x0_est, False, tol, MODE_SSE, None, None, w, sse,
                        (phi_v, dt_v), ssa)
        sse[~run.ok] = np.nan
        ssa[~run.ok] = np.nan
        n_pairs = np.array([sum(max(len(seg.obs_knot[o]) - 1, 0) for seg in timeline.segments) for o in names])
        return sse, ssa, n_pairs, run.ok

    def tables(self, timeline: Timeline) -> TimelineTables:
        """The kernel's flat tables of ``timeline`` (built once per timeline)."""
        key = id(timeline)
        with self._lock:
            hit = self._tables.get(key)
            if hit is not None and hit[0]() is timeline:
                return hit[1]
        tab = timeline_tables(self.spec, timeline)
        with self._lock:
            if len(self._tables) > 32:
                self._tables = {k: v for k, v in self._tables.items() if v[0]() is not None}
            self._tables[key] = (weakref.ref(timeline), tab)
        return tab

    # -- internals ---------------------------------------------------------------------------
    def _check(self, timeline: Timeline, theta, x0_est, tol: Tolerances):
        if tol.method not in METHODS:
            raise ValueError(f"method must be one of {METHODS}")
        theta = _own(np.atleast_2d(np.asarray(theta, dtype=float)), float)
        if theta.ndim != 2 or theta.shape[1] != len(self.spec.parameters):
            raise ValueError(f"theta must have {len(self.spec.parameters)} columns (one per parameter)")
        n_est = len(timeline.estimated_states)
        if n_est and x0_est is None:
            raise ValueError("estimated initial states need x0_est")
        if x0_est is not None:
            x0_est = np.asarray(x0_est, float).reshape(theta.shape[0], len(timeline.segments), n_est)
        return theta, x0_est

    def _weights(self, weights: Mapping[str, float] | None) -> np.ndarray:
        if weights is None:
            return np.ones(len(self.spec.outputs))
        unknown = set(weights) - set(self.spec.output_names)
        if unknown:
            raise ValueError(f"weights for unknown output(s): {', '.join(sorted(unknown))}")
        return np.array([float(weights.get(o, 1.0)) for o in self.spec.output_names])

    def _per_output(self, value, what: str) -> np.ndarray:
        names = self.spec.output_names
        if isinstance(value, Mapping):
            missing = [o for o in names if o not in value]
            if missing:
                raise ValueError(f"{what} missing for output(s): {', '.join(missing)}")
            return np.array([float(value[o]) for o in names])
        arr = np.broadcast_to(np.asarray(value, float), (len(names),)).copy()
        return arr

    def _default_dt_ref(self, timeline: Timeline) -> np.ndarray:
        out = []
        for o in self.spec.output_names:
            gaps = [np.diff(seg.t[np.sort(seg.obs_knot[o])]) for seg in timeline.segments]
            gaps = np.concatenate(gaps) if gaps else np.zeros(0)
            out.append(float(np.median(gaps)) if gaps.size else 1.0)
        return np.array(out)

    def _n_used(self, timeline: Timeline) -> np.ndarray:
        return self.tables(timeline).n_used.copy()

    def _start(self, b: Batch, seg: SegmentPlan, st: SegmentTable, timeline: Timeline, x0_est, sens: bool,
               tol: Tolerances):
        """Initial states (the reference's routine, numpy) and the segment's method."""
        if self.spec.is_static:
            n_sets = b.n_sets
            return (np.zeros((n_sets, 0)), np.zeros((n_sets, 0, b.n_c)), np.ones(n_sets, bool), "static")
        with np.errstate(all="ignore"):
            x0, S0, ok0 = initial_states(b, self.funcs, seg, timeline, x0_est, sens)
            method = choose_method(b, x0, seg, st.h_typ, tol)
        S0 = np.zeros((b.n_sets, b.n_x, 0)) if S0 is None else np.ascontiguousarray(np.moveaxis(S0, -1, 0))
        return np.ascontiguousarray(x0.T), S0, ok0, method

    def _run(self, timeline, tab, theta, x0_est, sens, tol, mode, out_y, out_s, w, sse, ar, ssa) -> _Run:
        n_sets = theta.shape[0]
        n_c = n_columns(self.funcs, timeline) if sens else 0
        b = Batch(self.funcs, theta.T.copy(), n_c)
        run = _Run(np.ones(n_sets, bool), np.zeros(n_sets, np.int64), [], [])
        empty2, empty3, ones = _EMPTY2, _EMPTY3, self._ones  # read-only in the kernels
        w = ones if w is None else w
        sse = empty2 if sse is None else sse
        ssa = empty2 if ssa is None else ssa
        phi, dt_ref = (ones, ones) if ar is None else ar
        out_y = empty2 if out_y is None else out_y
        out_s = empty3 if out_s is None else out_s
        any_linear = bool(tab.lin.any())
        for seg, st in zip(timeline.segments, tab.segments):
            x0, S0, ok0, method = self._start(b, seg, st, timeline, x0_est, sens, tol)
            if not ok0.all():
                run.messages.append(f"segment {seg.index + 1}: no steady state found for {int((~ok0).sum())} set(s)")
            run.ok &= ok0
            run.methods.append(method)
            args = (float(tol.rtol), float(tol.atol), st.knot_ptr, st.obs_r, st.obs_col, mode, out_y, out_s,
                    tab.y_obs, w, ar is not None, phi, dt_ref, sse, ssa)
            retry = np.zeros(n_sets, bool)
            kernel = self.kernel_for(method, sens, any_linear)
            self._invoke(kernel, st.t, st.u, tab.lin, theta, x0, S0, run.ok, run.steps, retry, bool(sens), *args)
            if retry.any():  # sets the fast path handed back: the general explicit path
                again = retry.copy()
                self._invoke("run_dopri", st.t, st.u, tab.lin, theta, x0, S0, again, run.steps, retry, bool(sens),
                             *args)
                run.ok[retry] = again[retry]
        return run

    def kernel_for(self, method: str, sens: bool, any_linear: bool) -> str:
        """The name of the entry kernel for a segment: the scalar fast path when it applies."""
        if method == IMPLICIT:
            return "run_rodas"
        if self.fast_path and method == EXPLICIT and not sens and not any_linear and not self.spec.is_static:
            return "run_fast"
        return "run_dopri"

    def _invoke(self, name: str, *args) -> None:
        """Call an entry kernel.  Its first call in this process (which compiles it, or loads
        it from numba's cache) holds a lock file beside the module, so that processes starting
        the same model together compile it once."""
        kernel = getattr(self.module, name)
        warm = _WARM.setdefault(self.module.__name__, set())
        if name in warm:
            kernel(*args)
            return
        from graybox.simulate.cache import exclusive

        with exclusive(Path(self.module.__file__).with_suffix(f".{name}.lock")):
            kernel(*args)
        warm.add(name)


# ---------------------------------------------------------------------------------------------
# Entry points


def compiled_available(spec: ModelSpec) -> bool:
    """True when the compiled core can run ``spec`` (trees, not a Python right-hand side, and
    numba importable)."""
    if spec.python_rhs is not None:
        return False
    try:
        import numba  # noqa: F401
    except ImportError:
        return False
    return True


@lru_cache(maxsize=64)
def _module_for(digest: str, source: str) -> ModuleType:
    from graybox.simulate.cache import load_generated

    return load_generated(digest, source)


@lru_cache(maxsize=64)
def _compile_cached(spec: ModelSpec, fast_path: bool) -> CompiledModel:
    return CompiledModel(spec, _module_for(spec_digest(spec), module_source(spec)), fast_path)


def compile_model(spec: ModelSpec, *, fast_path: bool = True) -> CompiledModel:
    """The compiled simulator of ``spec`` (cached in-process per spec, on disk per model).

    ``fast_path=False`` sends explicit runs without sensitivities through the general kernel,
    whose arithmetic is in the reference's order of operations (bit-for-bit the same step
    decisions as a one-set reference run); the default scalar fast path differs from it by
    rounding only (a reciprocal instead of a division, reassociated stage sums).  Raises
    ``ValueError`` when the compiled core cannot run ``spec`` (a Python right-hand side, or
    numba not importable: see :func:`compiled_available`)."""
    if not compiled_available(spec):
        raise ValueError(PYTHON_RHS_NOTE if spec.python_rhs is not None else "numba is not available")
    return _compile_cached(spec, bool(fast_path))


__all__ = ["CompiledModel", "compile_model", "compiled_available", "timeline_tables"]
