"""Least-squares estimation with lmfit, exact Jacobians and honest intervals.

Noise, per measured output:

* ``sigma`` given: residuals are divided by it, the covariance is not rescaled
  (``scale_covar=False``) and intervals use normal quantiles;
* ``sigma`` estimated (the default): the concentrated (profile) Gaussian likelihood, whose
  stationary point is reached by reweighting: fit with weights 1/sigma_o, set
  sigma_o^2 = SSE_o / n_o, refit; then Newton steps on the concentrated likelihood itself,
  and convergence is judged by the next step's size in standard errors
  (:mod:`graybox.estimate.noise_levels`).  Outputs in K and in m are then weighed by their
  own scatter, not by their units.  Outputs of one noise group share one sigma, pooled:
  sigma_g^2 = sum SSE_o / sum n_o over the group.  For the covariance the sigmas carry the
  usual small-sample correction n/(n - p) (exactly s^2 = SSE/(n - p) for one output, or one
  group of all outputs, as in ordinary regression), and intervals use Student-t quantiles
  with n - p degrees of freedom.

The optimiser is lmfit's ``least_squares`` (scipy's trust-region reflective method: bounds
handled natively, so no transformation distorts the Jacobian), with the exact Jacobian from
the forward sensitivities.  A trial point whose simulation fails returns non-finite
residuals, which the trust-region method treats as a rejected step; only a failure at the
initial guess is a user error.  After convergence the point is polished to the stationary
point of the SSE, for the last digits: Gauss-Newton steps (exact Jacobian, SVD solve), then
Newton steps with the full Hessian where Gauss-Newton contracts slowly, judged by the
relative offset of the residuals rather than by SSE differences, which are rounding there
(see ``_polish``).

Before any fitting every free value must influence an output: one that reaches no output
through the equations, or whose Jacobian column is zero at the guess, is a user error
naming it (it would otherwise cost every other value its standard error).

The covariance is (J^T J)^-1 at the optimum from an SVD.  A rank deficiency found only at
the optimum is reported, never silently inverted: the values the data do not determine are
named and get no standard error, the others keep theirs, computed on the determined subspace
(:func:`covariance_from_jacobian`).  A Wald interval never leaves the value's own bounds: it
is clipped there and marked (``ci95_clipped``, and a note in the summary).  AIC and BIC come
from the full Gaussian log-likelihood, constants and sigmas included, so that models can be
compared later.
"""

from __future__ import annotations

import time
import warnings as pywarnings
from dataclasses import dataclass, field

import lmfit
import numpy as np
from scipy import stats

from graybox.errors import FitError
from graybox.estimate.noise_levels import (CONVERGED_STEP, REWEIGHT_SETTLED, ConcentratedLikelihood, gaussian_loglik,
                                           ml_sigmas, needs_reweighting, rows_by_output, sigma_groups,
                                           stationary_point)
from graybox.estimate.point import EPS, Point, evaluate, step_in_standard_errors
from graybox.estimate.problem import Problem
from graybox.estimate.result import FitResult, ParameterEstimate

LOG_UNIFORM_SPAN = 100.0  # bounds spanning more than this factor are sampled log-uniformly


@dataclass(frozen=True)
class FitSettings:
    """How a least-squares fit runs (the study's ``[estimate]`` and ``[noise]`` tables): each
    output's given sigma (model units; None = estimated), the noise groups sharing one
    estimated sigma, extra random starts, the evaluation budget, lmfit's x/f/g tolerances,
    whether to polish the best start, the noise-level reweighting limit, and the seed of the
    random starts (the study's seed)."""

    sigmas: dict[str, float | None] = field(default_factory=dict)  # output -> given sigma (None: estimate)
    groups: dict[str, tuple[str, ...]] = field(default_factory=dict)  # group -> outputs sharing one estimated sigma
    multistart: int = 0
    max_nfev: int = 2000
    xtol: float = 1e-15
    ftol: float = 1e-15
    gtol: float = 1e-15
    polish: bool = True
    max_reweight: int = 20
    seed: int = 0


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
    with pywarnings.catch_warnings():  # lmfit's own covariance (not used: see _result) warns where it is singular
        pywarnings.simplefilter("ignore", RuntimeWarning)
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


SLOW_CONTRACTION = 0.1  # Gauss-Newton offsets shrinking slower than this per step: switch to Newton
_Point = Point
_evaluate = evaluate


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


@dataclass(frozen=True)
class Covariance:
    """(J^T J)^-1 of a weighted Jacobian, or its part the data determine."""

    matrix: np.ndarray  # NaN in the rows and columns of undetermined values
    rank: int
    condition: float
    determined: np.ndarray  # per free value: whether the data determine it


DETERMINED_TOL = 1.5e-8  # a value is determined when its unit vector has at most this in J's null space


def covariance_from_jacobian(J: np.ndarray) -> Covariance:
    """(J^T J)^-1 by SVD in column-scaled variables.

    With full rank the inverse.  With a rank deficiency the data do not determine some
    directions; a value is still determined when its unit vector e_j is orthogonal to the
    null space of J (e_j lies in the row space: an estimable function, whose variance
    e_j^T (J^T J)^- e_j is the same for every generalised inverse, the Moore-Penrose one
    included; e.g. Searle, *Linear Models*, ch. 5 -- from memory).  Those values get their
    variances and covariances from the pseudo-inverse (exactly what they would have with the
    undetermined values fixed at their estimates); the undetermined ones get NaN."""
    n = J.shape[1]
    scale = np.linalg.norm(J, axis=0)
    scale[scale == 0] = 1.0
    try:
        U, s, Vt = np.linalg.svd(J / scale, full_matrices=True)
    except np.linalg.LinAlgError:  # e.g. noise-free data: weights blow up, no covariance
        return Covariance(np.full((n, n), np.nan), 0, np.inf, np.zeros(n, bool))
    s = s[:n] if s.size >= n else np.concatenate([s, np.zeros(n - s.size)])
    tol = s.max(initial=0.0) * max(J.shape) * EPS
    rank = int(np.sum(s > tol))
    cond = float(s[0] / s[-1]) if s.size and s[-1] > 0 else np.inf
    keep = s > tol
    inv = (Vt[keep].T / s[keep] ** 2) @ Vt[keep]
    cov = inv / np.outer(scale, scale)
    null = Vt[~keep]
    determined = np.max(np.abs(null), axis=0, initial=0.0) <= DETERMINED_TOL
    cov[~determined, :] = np.nan
    cov[:, ~determined] = np.nan
    return Covariance(cov, rank, cond, determined)


def check_influence(problem: Problem, x0: np.ndarray, sigmas: np.ndarray) -> None:
    """Every free value must influence some measured output: structurally (it reaches an
    output through the equations) and at the initial guess (its Jacobian column is not zero
    there).  Otherwise a user error naming it, before any fitting."""
    from graybox.estimate.reach import unused_free_values, unused_message

    for value in unused_free_values(problem.spec):
        message, hint = unused_message(value)
        raise FitError(message, hint=hint)
    J = problem.jacobian(x0, sigmas)
    if not np.all(np.isfinite(J)):
        raise nonfinite_derivatives(problem, x0, J, "at the initial guess")
    dead = [j for j in range(J.shape[1]) if np.all(J[:, j] == 0)]
    if dead:
        names = ", ".join(f"{problem.names[j]} = {x0[j]:.6g}" for j in dead)
        raise FitError(f"no measured output depends on {names} at the initial guess (zero Jacobian column): "
                       "the fit could not move it, and its column would cost every other value its standard error",
                       hint="the data may not excite it (e.g. its input is zero throughout) or the guesses switch "
                            "it off (e.g. a product with a value guessed 0): change the guess, fix it, or remove it")


def nonfinite_derivatives(problem: Problem, x: np.ndarray, J: np.ndarray, at: str) -> FitError:
    """The user error for a Jacobian with inf or NaN entries where the residuals are finite:
    an equation overflows, or meets inf/inf, 0/0 or inf - inf, in its derivatives there.  The
    optimiser cannot see past such a point, so a fit ending there would be a wrong answer
    labelled converged.  Names the free values, the outputs and the equations involved."""
    from graybox.model.expr import symbols

    bad_cols = [j for j in range(J.shape[1]) if not np.all(np.isfinite(J[:, j]))]
    values = ", ".join(f"{problem.names[j]} = {x[j]:.6g}" for j in bad_cols)
    rows = rows_by_output(problem)
    bad_rows = ~np.all(np.isfinite(J), axis=1)
    outs = [o for k, o in enumerate(problem.spec.output_names) if np.any(bad_rows[rows == k])]
    spec = problem.spec
    params = {spec.parameters[problem.free[j].index].name for j in bad_cols if problem.free[j].kind == "parameter"}
    where = [f"the rate of state '{st.name}'" for st, rate in zip(spec.states, spec.rates) if symbols(rate) & params]
    where += [f"output '{o.name}'" for o, e in zip(spec.outputs, spec.output_exprs) if symbols(e) & params]
    return FitError(f"the derivatives of {', '.join(outs)} with respect to {values} are not finite {at} "
                    "(an equation overflows or meets inf/inf, 0/0 or inf - inf there"
                    + (f"; involved: {', '.join(where)}" if where else "") + ")",
                    hint="the optimiser cannot see past such a point, so a fit ending there would be a wrong answer: "
                         "rewrite the equation so that its intermediate values stay finite (e.g. exp(a)/exp(b) as "
                         "exp(a - b)), or bound the values away from where it fails")


def fit(problem: Problem, settings: FitSettings = FitSettings()) -> FitResult:
    """Estimate the free values; see the module docstring for the statistics and
    :mod:`graybox.estimate.noise_levels` for estimated (and shared) sigmas."""
    t_start = time.perf_counter()
    outputs = problem.spec.output_names
    given = {o: settings.sigmas.get(o) for o in outputs}
    groups = sigma_groups(outputs, given, settings.groups)
    estimated = {o: given[o] is None for o in outputs}
    sig = np.array([given[o] if given[o] is not None else 1.0 for o in outputs], dtype=float)
    x0 = problem.guess()
    check_start(problem, x0, sig)
    check_influence(problem, x0, sig)
    if groups:
        sig = _update_sigmas(problem, x0, sig, groups)

    starts_info = []
    candidates = [x0]
    if settings.multistart > 0:
        rng = np.random.default_rng(settings.seed)
        candidates += list(_latin_starts(problem, settings.multistart, rng))

    best = None
    for i, start in enumerate(candidates):
        x, conv, msg, nfev, sig_i, passes = _fit_from(problem, start, sig.copy(), groups, outputs, settings)
        s_out, _ = problem.sse_per_output(x)
        ll = _loglik(s_out[0], sig_i, problem, outputs, groups)
        starts_info.append({"start": [float(v) for v in start], "estimate": [float(v) for v in x],
                            "loglik": float(ll), "converged": bool(conv)})
        if best is None or ll > best[5]:
            best = (x, conv, msg, nfev, sig_i, ll, passes)
    x, converged, message, nfev, sig, loglik, passes = best
    reweighting = None
    if needs_reweighting(groups, len(outputs)):
        x, sig, converged, message, reweighting = _settle_noise_levels(problem, x, sig, groups, converged, message,
                                                                      passes, settings)
    else:
        converged, message = _judge_stationarity(problem, x, sig, groups, converged, message)
    return _result(problem, x, sig, estimated, groups, outputs, converged, message, nfev, starts_info,
                   time.perf_counter() - t_start, settings, reweighting)


def _fit_from(problem, start, sig, groups, outputs, st: FitSettings):
    """Least squares from ``start``; with estimated sigmas that change the relative weights,
    reweighting passes until a pass moves no value by more than REWEIGHT_SETTLED of its
    standard error (or ``max_reweight`` passes).  Returns x, converged, message, nfev,
    sigmas, passes."""
    lo, hi = problem.bounds()
    start = np.clip(start, lo, hi)
    nfev_total = 0
    x = start
    converged, message = False, ""
    reweight = needs_reweighting(groups, len(outputs))
    passes = 0
    for _ in range(st.max_reweight if reweight else 1):
        x_before = x
        x, converged, message, nfev = _least_squares(problem, x, sig, st)
        nfev_total += nfev
        passes += 1
        if st.polish:
            x, _ = _polish(problem, x, sig)
        if not groups:
            break
        sig = _update_sigmas(problem, x, sig, groups)
        if not reweight:
            break
        point = _evaluate(problem, x, sig)
        if point is not None and step_in_standard_errors(x - x_before, point.se) < REWEIGHT_SETTLED:
            break
    return x, converged, message, nfev_total, sig, passes


def _settle_noise_levels(problem, x, sig, groups, converged, message, passes, st: FitSettings):
    """Newton steps on the concentrated likelihood from the best reweighted point (unless
    polishing is off), then the convergence judgement of graybox.estimate.noise_levels."""
    given = np.array([st.sigmas.get(o) or np.nan for o in problem.spec.output_names], float)
    lik = ConcentratedLikelihood(problem, given, groups)
    where = stationary_point(lik, x, sig, move=st.polish)
    if np.isfinite(where.measure):
        x, sig = where.x, where.sig
    info = {"passes": passes, "newton_steps": where.steps, "last_step": where.kind,
            "step_in_std_errors": where.measure, "criterion_std_errors": CONVERGED_STEP}
    if not where.converged:
        name = problem.names[where.worst]
        message += (f"; noise levels still changing at the reweighting limit: the next step on the concentrated "
                    f"likelihood would move {name} by {where.measure:.3g} standard errors (converged below "
                    f"{CONVERGED_STEP:g})")
        converged = False
    info["converged"] = where.converged
    return x, sig, converged, message, info


def _judge_stationarity(problem, x, sig, groups, converged, message):
    """The optimiser's own stop (xtol, ftol, gtol) says the steps became small, not that the
    point is stationary: it also stops at the edge of a region where the model cannot be
    evaluated (trial points beyond give NaN or overflow and are rejected).  So the weighted
    Gauss-Newton step from the final point, in the values not at a bound and determined by
    the data, must move none of them by CONVERGED_STEP of its standard error or more
    (it is 0 at a stationary point, whatever the curvature); otherwise NOT CONVERGED."""
    estimated = np.zeros(len(sig), bool)
    for g in groups:
        estimated[list(g.members)] = True
    lik = ConcentratedLikelihood(problem, np.where(estimated, np.nan, sig), groups)
    c = lik.at(x)
    if c is None:
        return converged, message
    usable = lik.interior(x) & np.isfinite(c.point.se) & (c.point.se > 0)
    step = lik.gauss_newton_step(c, usable)
    measure = step_in_standard_errors(step, c.point.se)
    if measure >= CONVERGED_STEP:
        j = int(np.nanargmax(np.where(usable, np.abs(step) / np.where(usable, c.point.se, 1.0), -1.0)))
        message += (f"; the fit stopped where the next step would still move {problem.names[j]} by {measure:.3g} "
                    f"standard errors (converged below {CONVERGED_STEP:g}): the optimiser may have met values where "
                    "the model cannot be evaluated (NaN or overflow), or run out of evaluations")
        converged = False
    return converged, message


def _update_sigmas(problem, x, sig, groups) -> np.ndarray:
    """Maximum-likelihood sigmas of the estimated groups at ``x`` (pooled over each group's
    outputs); given sigmas, and any that cannot be computed there, kept."""
    sse, _ = problem.sse_per_output(x)
    n_o = np.array([problem.n_obs_per_output[o] for o in problem.spec.output_names], float)
    new = ml_sigmas(sse[0], n_o, sig, groups)
    return np.where(np.isfinite(new), new, sig)


def _loglik(sse_o: np.ndarray, sig: np.ndarray, problem, outputs, groups) -> float:
    """Full Gaussian log-likelihood; estimated sigmas at their maximum-likelihood values."""
    n_o = np.array([problem.n_obs_per_output[o] for o in outputs], float)
    return gaussian_loglik(sse_o, n_o, sig, groups)


def wald_interval(x: float, se: float, lo: float, hi: float, q: float, q1: float,
                  at: str | None) -> tuple[tuple[float, float], str | None]:
    """The 95% interval of one value and where it was clipped at the value's own bounds.

    Two-sided x -/+ q se inside the bounds; at a bound, one-sided from that bound to
    x +/- q1 se (q1 the one-sided 95% quantile).  An end beyond the other bound (or, two-
    sided, beyond either) is moved to the bound and reported: "lower", "upper" or "both"."""
    if at == "lower":
        a, b = lo, x + q1 * se
    elif at == "upper":
        a, b = x - q1 * se, hi
    else:
        a, b = x - q * se, x + q * se
    low_cut = at != "lower" and a < lo
    high_cut = at != "upper" and b > hi
    a, b = max(a, lo), min(b, hi)
    clipped = "both" if low_cut and high_cut else "lower" if low_cut else "upper" if high_cut else None
    return (float(a), float(b)), clipped


def _result(problem: Problem, x, sig, estimated, groups, outputs, converged, message, nfev, starts, wall, st,
            reweighting=None) -> FitResult:
    n, p = problem.n_obs, problem.n_free
    sse_o, _ = problem.sse_per_output(x)
    sse_o = sse_o[0]
    n_o = np.array([problem.n_obs_per_output[o] for o in outputs], float)
    given = np.array([sig[r] if not estimated[o] else np.nan for r, o in enumerate(outputs)])
    loglik = gaussian_loglik(sse_o, n_o, given, groups)
    k = p + len(groups)
    if n - p <= 0:
        raise FitError(f"{n} observations cannot determine {p} free values", hint="add data or fix parameters")
    # sigmas for the covariance: each group's pooled ML sigma, small-sample corrected by n/(n - rank)
    # (n - p at full rank; a rank deficiency leaves n - rank residual degrees of freedom, as in OLS)
    sig_ml = ml_sigmas(sse_o, n_o, np.where(np.isnan(given), 1.0, given), groups)
    rows = rows_by_output(problem)
    J1 = problem.jacobian(x, np.ones(len(outputs)))
    if not np.all(np.isfinite(J1)):
        raise nonfinite_derivatives(problem, x, J1, "at the estimate the fit stopped at")
    rank = covariance_from_jacobian(J1 / sig_ml[rows][:, None]).rank
    dof = n - rank
    sig_cov = np.array([np.sqrt(sig_ml[r] ** 2 * n / dof) if estimated[o] else sig[r] for r, o in enumerate(outputs)])
    cv = covariance_from_jacobian(J1 / sig_cov[rows][:, None])
    cov, rank, cond = cv.matrix, cv.rank, cv.condition
    se = np.sqrt(np.diag(cov))
    q = float(stats.t.ppf(0.975, dof)) if groups else float(stats.norm.ppf(0.975))
    q1 = float(stats.t.ppf(0.95, dof)) if groups else float(stats.norm.ppf(0.95))
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
        ci, clipped = wald_interval(float(x[j]), float(se[j]), float(lo[j]), float(hi[j]), q, q1, at)
        if at:
            warnings.append(f"{f.name} is at its {at} bound ({x[j]:.6g}): its interval is one-sided and the "
                            "bound, not the data, decides the estimate")
        if clipped:
            side = "both bounds" if clipped == "both" else f"its {clipped} bound"
            warnings.append(f"the 95% interval of {f.name} is clipped at {side}: the Wald interval reaches beyond "
                            "the values it may take, so near that bound it is not to be trusted (the data hardly "
                            "determine it there)")
        params[f.name] = ParameterEstimate(f.name, float(x[j]), float(se[j]), ci, f.units, False, at, at is not None,
                                           f.guess, float(lo[j]), float(hi[j]), clipped, bool(cv.determined[j]))
    for k_, pdef in enumerate(problem.spec.parameters):
        if pdef.fixed:
            params[pdef.name] = ParameterEstimate(pdef.name, pdef.guess, 0.0, (pdef.guess, pdef.guess), pdef.units,
                                                  True, None, False, pdef.guess, pdef.lower, pdef.upper)
    if rank < p:
        bad = [f.name for j, f in enumerate(problem.free) if not cv.determined[j]]
        warnings.append(f"the Jacobian has rank {rank} < {p} at the estimate: the data do not determine "
                        f"{', '.join(bad) if bad else 'some combination of the free values'} (standard errors not "
                        "available for them); the others' standard errors are those on the determined subspace, "
                        "as if the undetermined were fixed at their estimates; fix or reparametrise the "
                        "undetermined ones")
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = cov / np.outer(se, se)
    shared = {g.name: [outputs[m] for m in g.members] for g in groups if g.declared}
    return FitResult(
        names=problem.names, x=x, parameters=params, covariance=cov, correlation=corr,
        sigmas={o: float(sig_cov[r]) if estimated[o] else float(sig[r]) for r, o in enumerate(outputs)},
        sigma_estimated=dict(estimated), sse=float(sse_o.sum()),
        sse_per_output={o: float(sse_o[r]) for r, o in enumerate(outputs)}, n_obs=n,
        n_obs_per_output=dict(problem.n_obs_per_output), n_free=p, loglik=loglik,
        aic=float(2 * k - 2 * loglik), bic=float(k * np.log(n) - 2 * loglik), converged=converged,
        message=message, nfev=nfev, rank=rank, condition=cond, starts=starts, wall_s=wall,
        warnings=warnings, quantile=q, dof=dof, noise_groups=shared, reweighting=reweighting,
    )
