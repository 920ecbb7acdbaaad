"""Posterior sampling with emcee's affine-invariant ensemble sampler.

``run_posterior`` samples the free values (the least-squares layout: parameters and
estimated initial states) and the noise parameters, with the priors of
:mod:`graybox.posterior.priors` and the likelihoods of :mod:`graybox.posterior.noise`.

* Sampler: ``emcee.EnsembleSampler`` (Foreman-Mackey et al., PASP 125 (2013) 306) driven
  directly with ``vectorize=True`` so that each call simulates half the ensemble in one
  batch; moves: differential evolution (default) or the stretch move
  (Goodman & Weare, Comm. App. Math. Comp. Sci. 5 (2010) 65), see :func:`emcee_moves`.
* Start: walkers in a small ball around the least-squares optimum
  (:mod:`graybox.posterior.start`).
* Randomness: one ``numpy.random.Generator`` from the seed draws the ball and seeds emcee's
  legacy ``RandomState``, so a seed fixes every number.
* Stop rule: :func:`graybox.posterior.convergence.check_convergence`, checked every
  ``check_every`` steps.  A run stopped by ``max_steps`` is "not converged" wherever it is
  reported.
* Result: :class:`graybox.posterior.result.PosteriorResult`.
* Threads: the compiled simulation core releases the GIL, so each half-ensemble's rows are
  shared out over up to :func:`sampler_threads` threads; every row is simulated alone, so
  the samples do not depend on the thread count.
"""

from __future__ import annotations

import os
import sys
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Callable

import emcee
import numpy as np

from graybox.errors import SampleError
from graybox.estimate.result import FitResult
from graybox.estimate.problem import Problem
from graybox.posterior.checks import residual_checks
from graybox.posterior.config import SamplerSettings, priors_from_spec
from graybox.posterior.convergence import burn_and_thin, check_convergence, worst
from graybox.posterior.likelihood import LogPosterior
from graybox.posterior.noise import noise_layout
from graybox.posterior.priors import Prior
from graybox.posterior.result import PosteriorResult, quantity_stats
from graybox.posterior.start import initial_ensemble, start_distribution

SEED_STREAM = 0x706F7374  # separates the sampler's stream from other uses of the study seed


def check_walkers(n_walkers: int, n_dim: int) -> None:
    """Refuse an odd walker count or fewer than two walkers per sampled quantity."""
    if n_walkers % 2:
        raise SampleError(f"the walker count must be even (the ensemble moves in two halves), got {n_walkers}",
                          hint="set [sampling] walkers to an even number")
    if n_walkers < 2 * n_dim:
        raise SampleError(f"{n_walkers} walkers are too few for {n_dim} sampled quantities (at least {2 * n_dim})",
                          hint=f"set [sampling] walkers to at least {max(32, 4 * n_dim)}, or leave it out")


def emcee_moves(name: str):
    """The proposal.  "differential": the differential-evolution move (ter Braak, Statistics
    and Computing 16 (2006) 239; emcee's ``DEMove``); on near-Gaussian posteriors its
    autocorrelation time is several times shorter than the stretch move's.  "stretch":
    Goodman & Weare (2010).  emcee's snooker variant (``DESnookerMove``) is deliberately not
    used: in tests/posterior/test_coverage.py (a two-dimensional Student-t posterior) emcee
    3.1.6's snooker move gave 95% intervals 43% too narrow, and a 0.8/0.2 DE/snooker mixture
    6% too narrow, while DE alone and the stretch move matched the exact interval."""
    if name == "stretch":
        return emcee.moves.StretchMove()
    return emcee.moves.DEMove()


def _progress_bar(st: SamplerSettings):
    show = st.progress if isinstance(st.progress, bool) else sys.stderr.isatty()
    if not show:
        return None
    from tqdm import tqdm

    return tqdm(total=st.max_steps, desc="sampling", unit="step", file=sys.stderr, leave=False)


def sampler_threads(engine_name: str, environ=os.environ) -> int:
    """Threads for one log-posterior batch: with the compiled core (which releases the GIL)
    the cores this process may run on, at most ``NUMBA_NUM_THREADS`` when that is set
    (fleet jobs and the test suite set it to 1: they parallelise over processes); one for
    the numpy reference path."""
    if engine_name != "compiled":
        return 1
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # not on every platform
        cores = os.cpu_count() or 1
    limit = environ.get("NUMBA_NUM_THREADS", "").strip()
    if limit.isdigit() and int(limit) > 0:
        cores = min(cores, int(limit))
    return max(1, cores)


class BatchEvaluator:
    """The log-posterior of a batch of rows (emcee's ``vectorize=True`` call), the rows
    shared out in contiguous blocks over ``n_threads`` threads.  Each row is simulated on
    its own (its own adaptive step), so the values do not depend on the blocks.  Counts the
    rows inside the prior's support (the simulated parameter sets) itself."""

    def __init__(self, post: LogPosterior, n_threads: int):
        self.post = post
        self.n_threads = max(1, int(n_threads))
        self.n_sets = 0
        self._pool = ThreadPoolExecutor(self.n_threads, thread_name_prefix="graybox-lp") if self.n_threads > 1 \
            else None

    def __call__(self, Z: np.ndarray) -> np.ndarray:
        Z = np.atleast_2d(np.asarray(Z, float))
        self.n_sets += int(np.count_nonzero(np.isfinite(self.post.log_prior(Z))))
        if self._pool is None or Z.shape[0] < 2:
            return self.post(Z)
        blocks = np.array_split(Z, min(self.n_threads, Z.shape[0]))
        return np.concatenate(list(self._pool.map(self.post, blocks)))

    def close(self) -> None:
        """Shut the thread pool down."""
        if self._pool is not None:
            self._pool.shutdown(wait=True)


def run_posterior(problem: Problem, fit_result: FitResult, noise: dict | tuple, settings: SamplerSettings, seed: int, *,
                  priors: list[Prior] | None = None, file: Path | None = None,
                  _criterion: Callable | None = None, _threads: int | None = None) -> PosteriorResult:
    """Sample the posterior; ``noise``: the study's validated noise models
    (``study.noise_models``, used as they are) or output -> NoiseSpec (``study.noise``,
    validated here); ``seed``: the
    study's seed, used unless ``settings.seed`` is given; ``file``: the study file, for error
    locations.  Private, for benchmarks/bench_stop_rule.py and the tests: ``_criterion``, a
    replacement for :func:`check_convergence` with its signature; ``_threads``, the thread
    count instead of :func:`sampler_threads`."""
    criterion = check_convergence if _criterion is None else _criterion
    t0 = time.perf_counter()
    st = settings
    used_seed = int(st.seed if st.seed is not None else seed)
    priors = priors if priors is not None else priors_from_spec(problem.spec, problem, file)
    layout = noise_layout(noise, problem, file)
    post = LogPosterior(problem, priors, layout)
    n_dim = post.n_dim
    n_walkers = st.n_walkers(n_dim)
    check_walkers(n_walkers, n_dim)
    rng = np.random.default_rng(np.random.SeedSequence([used_seed, SEED_STREAM]))
    start = start_distribution(post, fit_result)
    Z0, lp0 = initial_ensemble(post, start, n_walkers, rng)
    n_start_sets = post.n_sets  # the start's evaluations (single-threaded)
    evaluate = BatchEvaluator(post, sampler_threads(problem.engine.name) if _threads is None else _threads)
    sampler = emcee.EnsembleSampler(n_walkers, n_dim, evaluate, vectorize=True, moves=emcee_moves(st.moves))
    sampler.random_state = np.random.RandomState(int(rng.integers(0, 2**32 - 1))).get_state()
    state = emcee.State(Z0, log_prob=lp0)
    bar = _progress_bar(st)
    history: list[dict] = []
    check = before = None
    try:
        while sampler.iteration < st.max_steps:
            n = min(st.check_every, st.max_steps - sampler.iteration)
            for state in sampler.sample(state, iterations=n, skip_initial_state_check=sampler.iteration > 0):
                if bar is not None:
                    bar.update(1)
            raw = sampler.get_chain()
            chain = post.natural(raw.reshape(-1, n_dim)).reshape(raw.shape)
            before, check = check, criterion(chain, check, st)
            history.append(check.to_dict())
            if check.converged:
                break
    except ValueError as exc:  # emcee refuses a degenerate initial ensemble
        raise SampleError(f"the sampler could not start: {exc}",
                          hint="the starting walkers are degenerate; check for parameters the data do not determine")
    finally:
        evaluate.close()
        if bar is not None:
            bar.close()
    raw = sampler.get_chain()  # (steps, walkers, dim), sampled space
    chain = post.natural(raw.reshape(-1, n_dim)).reshape(raw.shape).transpose(1, 0, 2)
    if not check.converged:  # the summaries still need R-hat and ESS
        check = criterion(chain.transpose(1, 0, 2), before, st, always_diagnose=True)
    log_prob = sampler.get_log_prob().T
    converged = check.converged
    if converged:
        k = worst(check.tau_change / check.tau_tol)
        reason = (f"converged after {check.steps} steps: chain after burn-in > {st.tau_factor:g} x tau_max, tau "
                  f"stable within its noise ({100 * float(check.tau_change[k]):.1f}% from its estimate on the "
                  f"first three quarters, less its bias's creep, < {100 * float(check.tau_tol[k]):.1f}%), "
                  f"R-hat < {st.rhat_max:g}, bulk, tail and interval-end ESS >= {st.min_ess:g}")
    else:
        reason = f"not converged: stopped at the step limit of {st.max_steps} steps; " + "; ".join(check.failed(st))
    burn = check.burn_in
    _, thin = burn_and_thin(check.tau, chain.shape[1])
    stats = {name: quantity_stats(chain[:, burn:, d], check, d, converged) for d, name in enumerate(post.names)}
    med = np.median(chain[:, burn:, :].reshape(-1, n_dim), axis=0)
    med_noise = post.sampled(med[None, :])[:, post.n_free:]
    natural_noise = {m.output: layout.at(med_noise, m.output) for m in layout.models}
    warnings = residual_checks(layout, post.residuals(med[: post.n_free]), natural_noise, problem.spec.output_names)
    if not converged:
        warnings.insert(0, "the sampler stopped at its step limit before converging: the posterior summaries are "
                           "not final")
    return PosteriorResult(
        names=post.names, n_free=post.n_free, chain=chain, log_prob=log_prob, burn_in=burn, thin=thin,
        tau=check.tau, acceptance=np.asarray(sampler.acceptance_fraction, float), converged=converged, reason=reason,
        check=check, history=history, priors=priors, layout=layout, settings=st, seed=used_seed,
        start_method=start.method, fit_x=np.asarray(fit_result.x, float), warnings=warnings,
        n_evaluations=n_start_sets + evaluate.n_sets, wall_s=time.perf_counter() - t0, engine=problem.engine.name,
        stats=stats,
    )


from graybox.posterior.bands import PredictiveBand, predictive_bands  # noqa: E402  (re-exported)

__all__ = ["PosteriorResult", "PredictiveBand", "predictive_bands", "run_posterior"]
