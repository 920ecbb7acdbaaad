"""Least-squares estimation with lmfit, exact Jacobians and honest intervals.

Noise, per measured output:

* ``sigma`` given: residuals are divided by it, the covariance is not rescaled
  (``scale_covar=False``) and intervals use normal quantiles;
* ``sigma`` estimated (the default): the concentrated (profile) Gaussian likelihood, whose
  stationary point is reached by reweighting: fit with weights 1/sigma_o, set
  sigma_o^2 = SSE_o / n_o, refit until the sigmas settle.  Outputs in K and in m are then
  weighed by their own scatter, not by their units.  For the covariance the sigmas carry the
  usual small-sample correction n/(n - p) (exactly s^2 = SSE/(n - p) for one output, as in
  ordinary regression), and intervals use Student-t quantiles with n - p degrees of freedom.

The optimiser is lmfit's ``least_squares`` (scipy's trust-region reflective method: bounds
handled natively, so no transformation distorts the Jacobian), with the exact Jacobian from
the forward sensitivities.  A trial point whose simulation fails returns non-finite
residuals, which the trust-region method treats as a rejected step; only a failure at the
initial guess is a user error.  After convergence the point is polished to the stationary
point of the SSE, for the last digits: Gauss-Newton steps (exact Jacobian, SVD solve), then
Newton steps with the full Hessian where Gauss-Newton contracts slowly, judged by the
relative offset of the residuals rather than by SSE differences, which are rounding there
(see ``_polish``).

The covariance is (J^T J)^-1 at the optimum from an SVD (a rank-deficient Jacobian is
reported, never silently inverted).  AIC and BIC come from the full Gaussian
log-likelihood, constants and sigmas included, so that models can be compared later.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

import lmfit
import numpy as np
from scipy import stats

from graybox.errors import FitError
from graybox.estimate.problem import Problem

LOG_UNIFORM_SPAN = 100.0  # bounds spanning more than this factor are sampled log-uniformly


@dataclass(frozen=True)
class FitSettings:
    sigmas: dict[str, float | None] = field(default_factory=dict)  # output -> given sigma (None: estimate)
    multistart: int = 0
    max_nfev: int = 2000
    xtol: float = 1e-15
    ftol: float = 1e-15
    gtol: float = 1e-15
    polish: bool = True
    max_reweight: int = 20
    seed: int = 0


@dataclass
class ParameterEstimate:
    name: str
    estimate: float
    stderr: float
    ci95: tuple[float, float]
    units: str
    fixed: bool
    at_bound: str | None = None  # "lower" / "upper"
    one_sided: bool = False
    guess: float = float("nan")
    lower: float = -np.inf
    upper: float = np.inf

    def to_dict(self) -> dict:
        return {
            "estimate": self.estimate,
            "stderr": self.stderr,
            "ci95": list(self.ci95),
            "units": self.units,
            "fixed": self.fixed,
            "at_bound": self.at_bound,
            "interval": "one-sided" if self.one_sided else "two-sided",
            "guess": self.guess,
            "bounds": [self.lower, self.upper],
        }


@dataclass
class FitResult:
    names: list[str]
    x: np.ndarray
    parameters: dict[str, ParameterEstimate]
    covariance: np.ndarray
    correlation: np.ndarray
    sigmas: dict[str, float]
    sigma_estimated: dict[str, bool]
    sse: float
    sse_per_output: dict[str, float]
    n_obs: int
    n_obs_per_output: dict[str, int]
    n_free: int
    loglik: float
    aic: float
    bic: float
    converged: bool
    message: str
    nfev: int
    rank: int
    condition: float
    starts: list[dict] = field(default_factory=list)
    wall_s: float = 0.0
    warnings: list[str] = field(default_factory=list)
    quantile: float = 1.96
    dof: int = 0

    def fit_dict(self) -> dict:
        return {
            "n_obs": self.n_obs,
            "n_free": self.n_free,
            "dof": self.dof,
            "sse": self.sse,
            "sse_per_output": self.sse_per_output,
            "weighted_sse": float(sum(self.sse_per_output[o] / self.sigmas[o] ** 2 for o in self.sigmas)),
            "loglik": self.loglik,
            "aic": self.aic,
            "bic": self.bic,
            "converged": self.converged,
            "message": self.message,
            "nfev": self.nfev,
            "jacobian_rank": self.rank,
            "condition_number": self.condition,
            "interval_quantile": self.quantile,
            "correlation": {"names": self.names, "matrix": self.correlation.tolist()},
            "starts": self.starts,
            "warnings": self.warnings,
        }

    def noise_dict(self) -> dict:
        return {o: {"sigma": self.sigmas[o], "estimated": self.sigma_estimated[o], "n_obs": self.n_obs_per_output[o]}
                for o in self.sigmas}

    def summary(self) -> str:
        from graybox.estimate.summary import fit_summary

        return fit_summary(self)


# ---------------------------------------------------------------------------------------------


def _lmfit_params(problem: Problem, x0: np.ndarray) -> lmfit.Parameters:
    params = lmfit.Parameters()
    for f, v in zip(problem.free, x0):
        lo = None if not np.isfinite(f.lower) else f.lower
        hi = None if not np.isfinite(f.upper) else f.upper
        params.add(f.key, value=float(v), min=lo if lo is not None else -np.inf, max=hi if hi is not None else np.inf)
    return params


def _vector(problem: Problem, params: lmfit.Parameters) -> np.ndarray:
    return np.array([params[f.key].value for f in problem.free])


def check_start(problem: Problem, x0: np.ndarray, sigmas: np.ndarray) -> None:
    """The initial guess must simulate to finite outputs: otherwise a user error."""
    res = problem.residuals(x0, sigmas)
    if not np.all(np.isfinite(res)):
        values = ", ".join(f"{n} = {v:.6g}" for n, v in zip(problem.names, x0))
        raise FitError(f"the model gives NaN or overflow at the initial guess ({values})",
                       hint="check the guesses, units and initial states; a division by zero or a log of a "
                            "negative number at the start is the usual cause")


def _least_squares(problem: Problem, x0: np.ndarray, sigmas: np.ndarray, st: FitSettings):
    params = _lmfit_params(problem, x0)

    def resid(p):
        return problem.residuals(_vector(problem, p), sigmas)

    def jac(p):
        J = problem.jacobian(_vector(problem, p), sigmas)
        return np.where(np.isfinite(J), J, 0.0)

    mini = lmfit.Minimizer(resid, params, nan_policy="propagate", scale_covar=False)
    out = mini.minimize(method="least_squares", Dfun=jac, xtol=st.xtol, ftol=st.ftol, gtol=st.gtol,
                        max_nfev=st.max_nfev, x_scale="jac")
    x = _vector(problem, out.params)
    message = str(getattr(out, "message", "")) or "finished"
    status = int(getattr(out, "status", 0))
    converged = bool(out.success) and status > 0
    return x, converged, message, int(out.nfev)


def _sse(problem: Problem, x: np.ndarray, sigmas: np.ndarray) -> float:
    r = problem.residuals(x, sigmas)
    return float(r @ r) if np.all(np.isfinite(r)) else np.inf


EPS = np.finfo(float).eps
SLOW_CONTRACTION = 0.1  # Gauss-Newton offsets shrinking slower than this per step: switch to Newton
NEGLIGIBLE_STEP = 1e-9  # polishing stops once no value would move by this fraction of its std. error


@dataclass
class _Point:
    """Residuals, Jacobian and the derived convergence measures at one free vector."""

    x: np.ndarray
    r: np.ndarray
    J: np.ndarray
    sse: float
    offset: float  # relative offset ||P_J r|| / ||r|| (0 at a stationary point)
    gn_step: np.ndarray
    se: np.ndarray  # s * sqrt(diag((J^T J)^-1)), s^2 = SSE/(n - p): each value's uncertainty

    def step_is_negligible(self) -> bool:
        """The Gauss-Newton step moves no value by more than NEGLIGIBLE_STEP of its standard
        error: further digits are below what the data (or the integration tolerance of a
        dynamic model) can mean."""
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = np.abs(self.gn_step) / self.se
        return bool(np.all(np.isfinite(ratio)) and ratio.max(initial=0.0) < NEGLIGIBLE_STEP)


def _evaluate(problem: Problem, x: np.ndarray, sigmas: np.ndarray) -> _Point | None:
    """The point at ``x``, or None where the model fails there."""
    r = problem.residuals(x, sigmas)
    if not np.all(np.isfinite(r)):
        return None
    J = problem.jacobian(x, sigmas)
    if not np.all(np.isfinite(J)):
        return None
    scale = np.linalg.norm(J, axis=0)
    scale[scale == 0] = 1.0
    try:
        U, s, Vt = np.linalg.svd(J / scale, full_matrices=False)
    except np.linalg.LinAlgError:
        return None
    keep = s > s.max(initial=0.0) * max(J.shape) * EPS
    ur = U[:, keep].T @ r
    norm_r = float(np.linalg.norm(r))
    offset = float(np.linalg.norm(ur) / norm_r) if norm_r > 0 else 0.0
    step = -(Vt[keep].T @ (ur / s[keep])) / scale
    dof = max(r.size - x.size, 1)
    # the residual scale enters: the weights may still be provisional (sigma = 1 before the
    # first reweighting), and the step is judged against the uncertainty the data imply
    se = np.sqrt(np.sum((Vt[keep] / s[keep, None]) ** 2, axis=0)) / scale * np.sqrt(float(r @ r) / dof)
    return _Point(x, r, J, float(r @ r), offset, step, se)


def _sse_rounding(problem: Problem, point: _Point, sigmas: np.ndarray) -> float:
    """The level below which computed SSE differences are rounding: each weighted residual
    (y - f)/sigma carries an error of a few ulps of (|y| + |f|)/sigma."""
    observed = np.concatenate([problem.observed(e, o) / sigmas[k]
                               for e in range(len(problem.experiments))
                               for k, o in enumerate(problem.spec.output_names)])
    size = np.abs(observed) + np.abs(observed - point.r)
    return float(16 * EPS * np.sum(np.abs(point.r) * size))


def _newton_step(problem: Problem, point: _Point, sigmas: np.ndarray) -> np.ndarray | None:
    """Newton step on the SSE with the full Hessian: central differences of the exact
    gradient J^T r (step eps^(1/3) relative).  None where the Hessian is not positive
    definite in column-scaled variables, or a difference point fails or leaves the bounds."""
    x = point.x
    lo, hi = problem.bounds()
    scale = np.linalg.norm(point.J, axis=0)
    scale[scale == 0] = 1.0
    H = np.empty((x.size, x.size))
    for j in range(x.size):
        h = EPS ** (1 / 3) * (abs(x[j]) if x[j] != 0 else 1.0 / scale[j])
        grads = []
        for sign in (1.0, -1.0):
            xs = x.copy()
            xs[j] += sign * h
            if not lo[j] < xs[j] < hi[j]:
                return None
            r = problem.residuals(xs, sigmas)
            J = problem.jacobian(xs, sigmas)
            if not (np.all(np.isfinite(r)) and np.all(np.isfinite(J))):
                return None
            grads.append(J.T @ r)
        H[:, j] = (grads[0] - grads[1]) / (2 * h)
    Hs = H / np.outer(scale, scale)
    Hs = 0.5 * (Hs + Hs.T)
    w, V = np.linalg.eigh(Hs)
    if not w.min() > w.max() * x.size * EPS:
        return None
    gs = (point.J.T @ point.r) / scale
    return -(V @ ((V.T @ gs) / w)) / scale


def _polish(problem: Problem, x: np.ndarray, sigmas: np.ndarray, max_steps: int = 30) -> tuple[np.ndarray, int]:
    """Refine a converged point to the stationary point of the SSE.

    At the optimum SSE differences drown in rounding long before the estimates have their
    last digits, so progress is judged by the relative offset ||P_J r|| / ||r|| (the cosine
    between the residuals and the model's tangent plane; Bates and Watts 1981), which stays
    accurate there.  Gauss-Newton steps (exact Jacobian, SVD in column-scaled variables) are
    taken while they lower the offset and do not raise the SSE beyond its rounding level.
    Gauss-Newton converges only linearly where residuals are large against the curvature;
    once it contracts slowly, Newton steps with the full Hessian (central differences of the
    exact gradient) take over.  Polishing stops once the next step would move no value by
    more than 1e-9 of its standard error.  Parameters at a bound are left where
    they are."""
    lo, hi = problem.bounds()
    point = _evaluate(problem, x, sigmas)
    if point is None or not np.all((x > lo) & (x < hi)):
        return x, 0
    steps = 0
    newton = False
    for _ in range(max_steps):
        if point.offset == 0.0 or point.step_is_negligible():
            break
        noise = _sse_rounding(problem, point, sigmas)
        trials = [_newton_step(problem, point, sigmas), point.gn_step] if newton else [point.gn_step]
        accepted = None
        for k, step in enumerate(trials):
            if step is None:
                continue
            x_new = point.x + step
            if np.any(x_new <= lo) or np.any(x_new >= hi) or np.array_equal(x_new, point.x):
                continue
            new = _evaluate(problem, x_new, sigmas)
            if new is not None and new.offset < point.offset and new.sse <= point.sse + noise:
                accepted = (new, newton and k == 0)
                break
        if accepted is None:
            break
        new, was_newton = accepted
        if not was_newton and new.offset > SLOW_CONTRACTION * point.offset:
            newton = True
        point = new
        steps += 1
    return point.x, steps


def _latin_starts(problem: Problem, n: int, rng: np.random.Generator) -> np.ndarray:
    lo, hi = problem.bounds()
    if not (np.all(np.isfinite(lo)) and np.all(np.isfinite(hi))):
        raise FitError("multi-start needs finite bounds on every free value",
                       hint="give bounds = [low, high] to every free parameter and estimated initial state")
    from scipy.stats import qmc

    u = qmc.LatinHypercube(d=problem.n_free, seed=rng).random(n)
    log = (lo > 0) & (hi / np.where(lo > 0, lo, 1.0) > LOG_UNIFORM_SPAN)
    starts = lo + u * (hi - lo)
    if log.any():
        starts[:, log] = np.exp(np.log(lo[log]) + u[:, log] * (np.log(hi[log]) - np.log(lo[log])))
    return starts


def covariance_from_jacobian(J: np.ndarray) -> tuple[np.ndarray, int, float]:
    """(J^T J)^-1 by SVD; returns the covariance (NaN rows/cols for directions the data do
    not determine), the numerical rank and the condition number of J."""
    n = J.shape[1]
    scale = np.linalg.norm(J, axis=0)
    scale[scale == 0] = 1.0
    try:
        U, s, Vt = np.linalg.svd(J / scale, full_matrices=False)
    except np.linalg.LinAlgError:  # e.g. noise-free data: weights blow up, no covariance
        return np.full((n, n), np.nan), 0, np.inf
    tol = s.max(initial=0.0) * max(J.shape) * np.finfo(float).eps
    rank = int(np.sum(s > tol))
    cond = float(s[0] / s[-1]) if s.size and s[-1] > 0 else np.inf
    if rank < n:
        cov = np.full((n, n), np.nan)
        # still report what is determined: the pseudo-inverse on the determined subspace
        return cov, rank, cond
    inv = (Vt.T / s**2) @ Vt
    cov = inv / np.outer(scale, scale)
    return cov, rank, cond


def fit(problem: Problem, settings: FitSettings = FitSettings()) -> FitResult:
    """Estimate the free values; see the module docstring for the statistics."""
    t_start = time.perf_counter()
    outputs = problem.spec.output_names
    given = {o: settings.sigmas.get(o) for o in outputs}
    estimated = {o: given[o] is None for o in outputs}
    sig = np.array([given[o] if given[o] is not None else 1.0 for o in outputs], dtype=float)
    x0 = problem.guess()
    check_start(problem, x0, sig)
    if any(estimated.values()):
        sig = _update_sigmas(problem, x0, sig, estimated, outputs)

    starts_info = []
    candidates = [x0]
    if settings.multistart > 0:
        rng = np.random.default_rng(settings.seed)
        candidates += list(_latin_starts(problem, settings.multistart, rng))

    best = None
    for i, start in enumerate(candidates):
        x, conv, msg, nfev, sig_i = _fit_from(problem, start, sig.copy(), estimated, outputs, settings)
        s_out, _ = problem.sse_per_output(x)
        ll = _loglik(s_out[0], sig_i, problem, outputs, estimated)
        starts_info.append({"start": [float(v) for v in start], "estimate": [float(v) for v in x],
                            "loglik": float(ll), "converged": bool(conv)})
        if best is None or ll > best[5]:
            best = (x, conv, msg, nfev, sig_i, ll)
    x, converged, message, nfev, sig, loglik = best
    return _result(problem, x, sig, estimated, outputs, converged, message, nfev, starts_info,
                   time.perf_counter() - t_start, settings)


def _fit_from(problem, start, sig, estimated, outputs, st: FitSettings):
    lo, hi = problem.bounds()
    start = np.clip(start, lo, hi)
    nfev_total = 0
    x = start
    converged, message = False, ""
    for _ in range(st.max_reweight if any(estimated.values()) else 1):
        x, converged, message, nfev = _least_squares(problem, x, sig, st)
        nfev_total += nfev
        if st.polish:
            x, _ = _polish(problem, x, sig)
        if not any(estimated.values()):
            break
        new = _update_sigmas(problem, x, sig, estimated, outputs)
        change = np.max(np.abs(new - sig) / sig)
        sig = new
        if change < 1e-10 or len(outputs) == 1:
            break
    else:
        message += "; noise levels still changing at the reweighting limit"
        converged = False
    return x, converged, message, nfev_total, sig


def _update_sigmas(problem, x, sig, estimated, outputs) -> np.ndarray:
    """Maximum-likelihood sigmas for the estimated outputs: sqrt(SSE_o / n_o)."""
    sse, ok = problem.sse_per_output(x)
    new = sig.copy()
    for r, o in enumerate(outputs):
        if estimated[o]:
            n_o = problem.n_obs_per_output[o]
            new[r] = max(np.sqrt(sse[0, r] / n_o), 1e-300) if np.isfinite(sse[0, r]) else sig[r]
    return new


def _loglik(sse_o: np.ndarray, sig: np.ndarray, problem, outputs, estimated) -> float:
    """Full Gaussian log-likelihood; estimated sigmas at their maximum-likelihood values."""
    ll = 0.0
    for r, o in enumerate(outputs):
        n_o = problem.n_obs_per_output[o]
        s2 = sse_o[r] / n_o if estimated[o] else sig[r] ** 2
        if not np.isfinite(sse_o[r]) or s2 <= 0:
            return -np.inf
        ll += -0.5 * (n_o * np.log(2 * np.pi * s2) + sse_o[r] / s2)
    return float(ll)


def _result(problem: Problem, x, sig, estimated, outputs, converged, message, nfev, starts, wall, st) -> FitResult:
    n, p = problem.n_obs, problem.n_free
    sse_o, _ = problem.sse_per_output(x)
    sse_o = sse_o[0]
    loglik = _loglik(sse_o, sig, problem, outputs, estimated)
    k = p + sum(estimated.values())
    dof = n - p
    if dof <= 0:
        raise FitError(f"{n} observations cannot determine {p} free values", hint="add data or fix parameters")
    # sigmas for the covariance: small-sample corrected where estimated
    sig_cov = np.array([np.sqrt(sse_o[r] / problem.n_obs_per_output[o] * n / dof) if estimated[o] else sig[r]
                        for r, o in enumerate(outputs)])
    J = problem.jacobian(x, sig_cov)
    cov, rank, cond = covariance_from_jacobian(J)
    se = np.sqrt(np.diag(cov)) if rank == p else np.full(p, np.nan)
    q = float(stats.t.ppf(0.975, dof)) if any(estimated.values()) else float(stats.norm.ppf(0.975))
    q1 = float(stats.t.ppf(0.95, dof)) if any(estimated.values()) else float(stats.norm.ppf(0.95))
    lo, hi = problem.bounds()
    warnings: list[str] = []
    params: dict[str, ParameterEstimate] = {}
    for j, f in enumerate(problem.free):
        at = None
        tol_b = 1e-10 * max(1.0, abs(x[j]))
        if np.isfinite(lo[j]) and x[j] - lo[j] <= tol_b:
            at = "lower"
        elif np.isfinite(hi[j]) and hi[j] - x[j] <= tol_b:
            at = "upper"
        if at == "lower":
            ci = (float(lo[j]), float(min(hi[j], x[j] + q1 * se[j])))
        elif at == "upper":
            ci = (float(max(lo[j], x[j] - q1 * se[j])), float(hi[j]))
        else:
            ci = (float(x[j] - q * se[j]), float(x[j] + q * se[j]))
        if at:
            warnings.append(f"{f.name} is at its {at} bound ({x[j]:.6g}): its interval is one-sided and the "
                            "bound, not the data, decides the estimate")
        params[f.name] = ParameterEstimate(f.name, float(x[j]), float(se[j]), ci, f.units, False, at, at is not None,
                                           f.guess, float(lo[j]), float(hi[j]))
    for k_, pdef in enumerate(problem.spec.parameters):
        if pdef.fixed:
            params[pdef.name] = ParameterEstimate(pdef.name, pdef.guess, 0.0, (pdef.guess, pdef.guess), pdef.units,
                                                  True, None, False, pdef.guess, pdef.lower, pdef.upper)
    if rank < p:
        warnings.append(f"the Jacobian has rank {rank} < {p}: the data do not determine every free value "
                        "(covariance not available); fix or reparametrise the unidentifiable ones")
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = cov / np.outer(se, se)
    return FitResult(
        names=problem.names, x=x, parameters=params, covariance=cov, correlation=corr,
        sigmas={o: float(sig_cov[r]) if estimated[o] else float(sig[r]) for r, o in enumerate(outputs)},
        sigma_estimated=dict(estimated), sse=float(sse_o.sum()),
        sse_per_output={o: float(sse_o[r]) for r, o in enumerate(outputs)}, n_obs=n,
        n_obs_per_output=dict(problem.n_obs_per_output), n_free=p, loglik=loglik,
        aic=float(2 * k - 2 * loglik), bic=float(k * np.log(n) - 2 * loglik), converged=converged,
        message=message, nfev=nfev, rank=rank, condition=cond, starts=starts, wall_s=wall,
        warnings=warnings, quantile=q, dof=dof,
    )
