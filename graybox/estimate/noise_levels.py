"""Estimated noise levels: groups of outputs sharing one sigma, the concentrated likelihood
and its stationary point.

Each output's sigma is given, or estimated; estimated sigmas belong to *groups*: one output
alone, or several outputs in the same units that share one sigma (declared in the study
file's ``[noise.groups]``; classical unweighted multi-response least squares when every
output is in one group).  For fixed free values theta the maximum-likelihood variance of a
group g is the pooled

    sigma_g^2 = sum_{o in g} SSE_o / sum_{o in g} n_o,

and substituting it leaves the concentrated (profile) negative log-likelihood

    F(theta) = sum_g (n_g / 2) log SSE_g(theta) + sum_{o given} SSE_o(theta) / (2 sigma_o^2)

(constants dropped; for one group of all outputs F is a monotone function of the SSE, so its
minimiser is the ordinary least-squares one).  With the weights 1/sigma evaluated at theta
itself, grad F = J_w^T r_w (weighted Jacobian and residuals), so the reweighting iteration
"fit with weights 1/sigma_g, set sigma_g from the fit, repeat" has the stationary point of F
as its fixed point.  It converges only linearly: each weighted fit ignores how the weights
move with theta (the terms -2 sum_g (J_g^T r_g)(J_g^T r_g)^T n_g / SSE_g^2 of the Hessian of
F), and on a multi-response problem whose outputs pull the constants different ways the
contraction per pass can be slow.  Judging convergence by the relative change of the sigmas
between passes (the former rule, 1e-10) then labels a fit that is correct to many digits
"not converged" after 20 passes.

So the stationary point is reached and judged on F itself: the reweighting passes bring the
free values close; then Newton steps on F, with its Hessian from central differences of the
exact gradient J_w^T r_w (forward sensitivities), converge quadratically; and convergence is
judged by what matters to a user, the size of the next Newton step on F measured in
standard errors of the values.  A fit is *converged* when that step would move no value by
more than ``CONVERGED_STEP`` (1e-4) of its standard error: far below anything an interval
can show, and above the noise that integration tolerances put into the gradient of a
dynamic model.  Values at a bound are held there (the step is taken in the others).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from graybox.errors import FitError
from graybox.estimate.point import EPS, NEGLIGIBLE_STEP, Point, point_from, step_in_standard_errors

CONVERGED_STEP = 1e-4  # converged: the next step on F moves no value by more than this many std. errors
REWEIGHT_SETTLED = 1e-3  # reweighting passes stop once a pass moves no value by this many std. errors
MAX_NEWTON = 12
SIGMA_FLOOR = 1e-300


@dataclass(frozen=True)
class SigmaGroup:
    """Outputs sharing one estimated sigma (one output alone, or a declared group)."""

    name: str  # the group's name, or the output's own name
    members: tuple[int, ...]  # output indices, in model order
    declared: bool  # a [noise.groups] group (False: one output with its own sigma)


def sigma_groups(outputs: list[str], sigmas: dict[str, float | None],
                 groups: dict[str, tuple[str, ...]]) -> list[SigmaGroup]:
    """The estimated-sigma groups: each declared group, then every other output whose sigma
    is estimated, alone.  A declared group must name outputs whose sigma is estimated, each
    in at most one group (the study file is checked for this with located errors in
    graybox.config; this repeats the check for callers of the Python API)."""
    index = {o: k for k, o in enumerate(outputs)}
    out, taken = [], {}
    for name, members in groups.items():
        for o in members:
            if o not in index:
                raise FitError(f"noise group '{name}' names '{o}', which is not a measured output",
                               hint="outputs: " + ", ".join(outputs))
            if sigmas.get(o) is not None:
                raise FitError(f"noise group '{name}' shares an estimated sigma, but '{o}' has its sigma given",
                               hint=f"remove the given sigma of '{o}', or take it out of the group")
            if o in taken:
                raise FitError(f"output '{o}' is in noise groups '{taken[o]}' and '{name}'",
                               hint="an output can share its sigma with one group only")
            taken[o] = name
        out.append(SigmaGroup(name, tuple(sorted(index[o] for o in set(members))), True))
    for o in outputs:
        if sigmas.get(o) is None and o not in taken:
            out.append(SigmaGroup(o, (index[o],), False))
    return out


def needs_reweighting(groups: list[SigmaGroup], n_outputs: int) -> bool:
    """Whether the estimated sigmas change the relative weights of the residuals: not when
    nothing is estimated, nor when one group holds every output (its common weight scales
    the SSE without moving its minimiser)."""
    return bool(groups) and not (len(groups) == 1 and len(groups[0].members) == n_outputs)


def ml_sigmas(sse_o: np.ndarray, n_o: np.ndarray, given: np.ndarray, groups: list[SigmaGroup]) -> np.ndarray:
    """Per output: the given sigma, or its group's maximum-likelihood sigma
    sqrt(sum SSE / sum n) (NaN where an SSE is not finite)."""
    sig = np.array(given, float)
    for g in groups:
        m = list(g.members)
        total = float(np.sum(sse_o[m]))
        sig[m] = max(np.sqrt(total / float(np.sum(n_o[m]))), SIGMA_FLOOR) if np.isfinite(total) else np.nan
    return sig


def gaussian_loglik(sse_o: np.ndarray, n_o: np.ndarray, given: np.ndarray, groups: list[SigmaGroup]) -> float:
    """Full Gaussian log-likelihood, estimated sigmas at their maximum-likelihood values."""
    if not np.all(np.isfinite(sse_o)):
        return -np.inf
    sig = ml_sigmas(sse_o, n_o, given, groups)
    var = sig**2
    if not np.all(var > 0):
        return -np.inf
    return float(np.sum(-0.5 * (n_o * np.log(2 * np.pi * var) + sse_o / var)))


def rows_by_output(problem) -> np.ndarray:
    """The output index of each residual row (the problem's order: experiment, output, observation)."""
    parts = [np.full(problem.observed(e, o).size, k)
             for e in range(len(problem.experiments)) for k, o in enumerate(problem.spec.output_names)]
    return np.concatenate(parts) if parts else np.zeros(0, int)


@dataclass
class Concentrated:
    """F's gradient and the weighted point at one free vector, weights from the ML sigmas there."""

    x: np.ndarray
    sig: np.ndarray  # per output: given, or the group's ML sigma at x
    grad: np.ndarray  # J_w^T r_w = grad F
    point: Point


class ConcentratedLikelihood:
    """F(theta) of the module docstring for one problem; evaluations at free vectors."""

    def __init__(self, problem, given: np.ndarray, groups: list[SigmaGroup]):
        self.problem = problem
        self.given = np.asarray(given, float)
        self.groups = groups
        self.rows = rows_by_output(problem)
        self.n_o = np.array([problem.n_obs_per_output[o] for o in problem.spec.output_names], float)
        self.lo, self.hi = problem.bounds()
        self._ones = np.ones(len(problem.spec.output_names))

    def at(self, x: np.ndarray) -> Concentrated | None:
        """The weighted point at ``x`` (None where the model fails there)."""
        r = self.problem.residuals(x, self._ones)
        if not np.all(np.isfinite(r)):
            return None
        J = self.problem.jacobian(x, self._ones)
        if not np.all(np.isfinite(J)):
            return None
        sse_o = np.bincount(self.rows, weights=r**2, minlength=self.n_o.size)
        sig = ml_sigmas(sse_o, self.n_o, self.given, self.groups)
        if not np.all(np.isfinite(sig) & (sig > 0)):
            return None
        w = 1.0 / sig[self.rows]
        rw, Jw = r * w, J * w[:, None]
        point = point_from(x, rw, Jw)
        if point is None:
            return None
        return Concentrated(x, sig, Jw.T @ rw, point)

    def interior(self, x: np.ndarray) -> np.ndarray:
        """The values not at a bound (the Newton step moves only these)."""
        tol = 1e-10 * np.maximum(1.0, np.abs(x))
        return ~((np.isfinite(self.lo) & (x - self.lo <= tol)) | (np.isfinite(self.hi) & (self.hi - x <= tol)))

    def newton_step(self, c: Concentrated, free: np.ndarray) -> np.ndarray | None:
        """Newton step on F in the ``free`` values, the Hessian from central differences of
        the exact gradient (step eps^(1/3) relative); None where a difference point fails
        or leaves the bounds, or the Hessian is not positive definite (column-scaled)."""
        x = c.x
        idx = np.flatnonzero(free)
        if idx.size == 0:
            return np.zeros_like(x)
        scale = np.linalg.norm(c.point.J, axis=0)
        scale[scale == 0] = 1.0
        H = np.empty((x.size, idx.size))
        for col, j in enumerate(idx):
            h = EPS ** (1 / 3) * (abs(x[j]) if x[j] != 0 else 1.0 / scale[j])
            grads = []
            for sign in (1.0, -1.0):
                xs = x.copy()
                xs[j] += sign * h
                if not self.lo[j] < xs[j] < self.hi[j]:
                    return None
                other = self.at(xs)
                if other is None:
                    return None
                grads.append(other.grad)
            H[:, col] = (grads[0] - grads[1]) / (2 * h)
        Hf = H[idx] / np.outer(scale[idx], scale[idx])
        Hf = 0.5 * (Hf + Hf.T)
        w, V = np.linalg.eigh(Hf)
        if not w.min() > w.max() * idx.size * EPS:
            return None
        step = np.zeros_like(x)
        step[idx] = -(V @ ((V.T @ (c.grad[idx] / scale[idx])) / w)) / scale[idx]
        return step

    def gauss_newton_step(self, c: Concentrated, free: np.ndarray) -> np.ndarray:
        """The weighted Gauss-Newton step in the ``free`` values (one reweighting pass,
        linearised): the fallback where the Hessian of F is not positive definite."""
        step = np.zeros_like(c.x)
        idx = np.flatnonzero(free)
        if idx.size:
            step[idx] = -np.linalg.lstsq(c.point.J[:, idx], c.point.r, rcond=None)[0]
        return step

    def step(self, c: Concentrated) -> tuple[np.ndarray, str]:
        """The next step towards the stationary point of F, and which kind it is."""
        free = self.interior(c.x)
        newton = self.newton_step(c, free)
        if newton is not None:
            return newton, "newton"
        return self.gauss_newton_step(c, free), "gauss-newton"


@dataclass(frozen=True)
class Stationarity:
    """How far a point is from the stationary point of F, in standard errors."""

    x: np.ndarray
    sig: np.ndarray
    measure: float  # max |next step_j| / se_j
    worst: int  # the index of the value the next step moves most (in std. errors)
    steps: int  # Newton (or Gauss-Newton) steps taken
    kind: str  # kind of the last step computed

    @property
    def converged(self) -> bool:
        """Whether the next step moves every free value by less than ``CONVERGED_STEP`` standard errors."""
        return self.measure < CONVERGED_STEP


def _worst(step: np.ndarray, se: np.ndarray) -> int:
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(step != 0, np.abs(step) / se, 0.0)
    ratio = np.where(np.isfinite(ratio), ratio, np.inf)
    return int(np.argmax(ratio)) if ratio.size else 0


def stationary_point(lik: ConcentratedLikelihood, x: np.ndarray, sig: np.ndarray, *,
                     move: bool = True) -> Stationarity:
    """Newton steps on F from ``x`` while each lowers the next step's size (in standard
    errors) and keeps inside the bounds, until that size is below NEGLIGIBLE_STEP; with
    ``move`` False only the measure at ``x`` is computed.  The result holds the final point,
    its ML sigmas and the measure there."""
    c = lik.at(x)
    if c is None:
        return Stationarity(x, sig, float("inf"), 0, 0, "none")
    step, kind = lik.step(c)
    measure = step_in_standard_errors(step, c.point.se)
    taken = 0
    while move and taken < MAX_NEWTON and measure >= NEGLIGIBLE_STEP:
        x_new = c.x + step
        if np.any(x_new < lik.lo) or np.any(x_new > lik.hi) or np.array_equal(x_new, c.x):
            break
        new = lik.at(x_new)
        if new is None:
            break
        new_step, new_kind = lik.step(new)
        new_measure = step_in_standard_errors(new_step, new.point.se)
        if not new_measure < measure:
            break
        c, step, kind, measure = new, new_step, new_kind, new_measure
        taken += 1
    return Stationarity(c.x, c.sig, measure, _worst(step, c.point.se), taken, kind)
