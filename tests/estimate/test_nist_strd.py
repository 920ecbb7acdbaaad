"""NIST StRD nonlinear regression, fitted through graybox's study-file path.

Reference: NIST Information Technology Laboratory, Statistical Reference Datasets (StRD),
nonlinear regression problems, certified values (files in tests/reference/nist_strd/).
Score: the log relative error (LRE) of McCullough (1999), "Assessing the reliability of
statistical software: Part II", The American Statistician 53(2), capped at the 11
certified digits.

Each problem is written as a study file (static regression: the predictors are inputs,
the response an output with NIST's model as its expression, guesses = NIST's start, no
bounds, sigma estimated, multi-start off) and a CSV of ``repr`` floats, then loaded with
``load_study`` / ``prepare`` and fitted with ``fit``.  The marks (from the issue): LRE >= 6
on every estimate and on the residual sum of squares, LRE >= 4 on every standard error
(NIST's certified "Standard Deviation", sqrt(diag(s^2 (J^T J)^-1)), s^2 = SSE/(n - p)).
They are required for every lower-difficulty problem from both starts and every
average-difficulty problem from start 2; the remaining problem-starts are held to the
same marks where graybox meets them.  The full table: benchmarks/nist_lre_table.py.

Misra1a, BoxBOD and Rat43 are not in the reference folder, so they are not run.

Lanczos1 (certified SSE 1.43e-25, residuals ~1e-13 on data of 13 significant digits) is
the one exception: its data rounded to binary64 move the exact least-squares SSE by 9e-4
relative (``test_lanczos1_sse_is_limited_by_binary64_data`` shows it in exact arithmetic),
so no program reading the data as doubles can reach LRE 4 on s = sqrt(SSE/(n - p)).
Its standard-error and SSE checks are strict expected failures for that reason.
"""

from __future__ import annotations

import functools
import math
import tempfile
from pathlib import Path

import numpy as np
import pytest

from tests.estimate import nist

pytestmark = pytest.mark.reference

ESTIMATE_MARK = 6.0
STDERR_MARK = 4.0
SSE_MARK = 6.0

LANCZOS1_REASON = ("Lanczos1: the data rounded to binary64 change the exact least-squares SSE by 9e-4 relative "
                   "(LRE 3.1 in exact arithmetic; about 3.4 for s = sqrt(SSE/(n-p))), below the marks")
BINARY64_LIMITED = {"Lanczos1"}

PROBLEMS = {name: nist.load(name) for name in nist.available()}
CASES = [(name, start) for name in PROBLEMS for start in (1, 2)]
REQUIRED = [c for c in CASES if nist.required(PROBLEMS[c[0]], c[1])]
OTHERS = [c for c in CASES if c not in REQUIRED]


def case_id(case: tuple[str, int]) -> str:
    return f"NIST StRD, {case[0]}, start {case[1]}, certified values"


@functools.lru_cache(maxsize=None)
def _folder() -> Path:
    return Path(tempfile.mkdtemp(prefix="graybox-nist-"))


@functools.lru_cache(maxsize=None)
def fitted(name: str, start: int):
    """(prepared, result, score) of one problem-start, fitted once per test session."""
    problem = PROBLEMS[name]
    _, prepared, result = nist.fit_through_config(problem, start, _folder())
    return prepared, result, nist.score(problem, start, result)


def _table(values: dict[str, float], lres: dict[str, float], certified) -> str:
    return "; ".join(f"{p} = {values[p]!r} (certified {c!r}, LRE {lres[p]:.2f})"
                     for p, c in zip(values, certified))


def check_estimates(name: str, start: int) -> None:
    _, _, sc = fitted(name, start)
    assert sc.min_estimate >= ESTIMATE_MARK, _table(sc.estimates, sc.lre_estimates, PROBLEMS[name].certified)


def check_stderrs(name: str, start: int) -> None:
    _, _, sc = fitted(name, start)
    assert sc.min_stderr >= STDERR_MARK, _table(sc.stderrs, sc.lre_stderrs, PROBLEMS[name].certified_sd)


def check_sse(name: str, start: int) -> None:
    _, res, sc = fitted(name, start)
    assert sc.lre_sse >= SSE_MARK, (f"SSE {res.sse!r}, certified {PROBLEMS[name].certified_sse!r}, "
                                    f"LRE {sc.lre_sse:.2f}")


def _limited(cases, checks_precision: bool):
    """Parameters for ``cases``; Lanczos1's SSE and standard-error checks as strict xfails."""
    out = []
    for c in cases:
        marks = ()
        if checks_precision and c[0] in BINARY64_LIMITED:
            marks = (pytest.mark.xfail(strict=True, reason=LANCZOS1_REASON),)
        out.append(pytest.param(*c, id=case_id(c), marks=marks))
    return out


# -- the issue's marks ---------------------------------------------------------------------------
@pytest.mark.parametrize("name,start", _limited(REQUIRED, False))
def test_required_estimates(name, start):
    """NIST StRD, certified parameter values: LRE >= 6 on every estimate."""
    check_estimates(name, start)


@pytest.mark.parametrize("name,start", _limited(REQUIRED, True))
def test_required_stderrs(name, start):
    """NIST StRD, certified standard deviations: LRE >= 4 on every standard error."""
    check_stderrs(name, start)


@pytest.mark.parametrize("name,start", _limited(REQUIRED, True))
def test_required_sse(name, start):
    """NIST StRD, certified residual sum of squares: LRE >= 6."""
    check_sse(name, start)


# -- the other problem-starts, held to the same marks -------------------------------------------
@pytest.mark.parametrize("name,start", _limited(OTHERS, False))
def test_other_estimates(name, start):
    """NIST StRD (average difficulty from start 1, higher difficulty), certified values: LRE >= 6."""
    check_estimates(name, start)


@pytest.mark.parametrize("name,start", _limited(OTHERS, True))
def test_other_stderrs(name, start):
    """NIST StRD (average difficulty from start 1, higher difficulty), certified SDs: LRE >= 4."""
    check_stderrs(name, start)


@pytest.mark.parametrize("name,start", _limited(OTHERS, True))
def test_other_sse(name, start):
    """NIST StRD (average difficulty from start 1, higher difficulty), certified SSE: LRE >= 6."""
    check_sse(name, start)


# -- the config path delivers NIST's problem exactly ---------------------------------------------
@pytest.mark.parametrize("name", list(PROBLEMS))
def test_config_path_delivers_the_certified_problem(name):
    """NIST StRD file header: number of observations, parameters and degrees of freedom;
    the data reach the estimator bit for bit (the CSV holds repr floats)."""
    problem = PROBLEMS[name]
    prepared, res, _ = fitted(name, 1)
    P = prepared.problem
    assert P.n_obs == problem.n
    assert P.names == list(problem.parameters)
    assert res.dof == problem.dof
    assert np.array_equal(P.observed(0, problem.response), problem.y)
    rec = P.experiments[0].record
    t = rec.outputs[problem.response].t
    for col in problem.predictors:
        assert np.array_equal(rec.inputs[col].at(t), problem.X[col])
    assert not any(s.fixed for s in P.spec.parameters)
    assert all(math.isinf(f.lower) and math.isinf(f.upper) for f in P.free)


def test_difficulty_levels_match_the_issue():
    """NIST StRD file headers: the levels of difficulty the issue lists."""
    lower = {"Misra1a", "Chwirut2", "Chwirut1", "Lanczos3", "Gauss1", "Gauss2", "DanWood", "Misra1b"}
    average = {"Kirby2", "Hahn1", "Nelson", "MGH17", "Lanczos1", "Lanczos2", "Gauss3", "Misra1c", "Misra1d",
               "Roszman1", "ENSO"}
    for name, problem in PROBLEMS.items():
        expected = "lower" if name in lower else "average" if name in average else "higher"
        assert problem.difficulty == expected, name


# -- why Lanczos1 cannot meet the SSE and standard-error marks in binary64 -------------------------
def _exact_lanczos_sse(x_text: list[str], y_text: list[str], start: list[str]) -> float:
    """Minimum SSE of the Lanczos model in 40-digit arithmetic (Gauss-Newton from ``start``);
    the data are given as decimal text and read at that precision."""
    import mpmath as mp

    with mp.workdps(40):
        x = [mp.mpf(v) for v in x_text]
        y = [mp.mpf(v) for v in y_text]
        b = mp.matrix([mp.mpf(v) for v in start])
        for _ in range(8):
            J = mp.matrix(len(x), 6)
            r = mp.matrix(len(x), 1)
            for i, xi in enumerate(x):
                e = [mp.exp(-b[2 * k + 1] * xi) for k in range(3)]
                r[i] = y[i] - sum(b[2 * k] * e[k] for k in range(3))
                for k in range(3):
                    J[i, 2 * k] = e[k]
                    J[i, 2 * k + 1] = -b[2 * k] * xi * e[k]
            b = b + mp.lu_solve(J.T * J, J.T * r)
        r = [y[i] - sum(b[2 * k] * mp.exp(-b[2 * k + 1] * xi) for k in range(3)) for i, xi in enumerate(x)]
        return float(mp.fsum(v * v for v in r))


def _binary64_text(text: str) -> str:
    """The exact decimal value of the binary64 number nearest to ``text``."""
    from decimal import Decimal

    return str(Decimal(float(text)))


def test_lanczos1_sse_is_limited_by_binary64_data():
    """NIST StRD, Lanczos1, certified SSE 1.4307867721E-25: exact arithmetic (mpmath, 40
    digits) reproduces it from the file's decimal data (LRE >= 10), but from the same data
    rounded to binary64 it reaches LRE < 4, so the SSE and s = sqrt(SSE/(n-p)) cannot meet
    the marks in double precision."""
    problem = PROBLEMS["Lanczos1"]
    lines = (nist.REFERENCE_DIR / "Lanczos1.dat").read_text().splitlines()
    first, last = nist._line_range(lines, "Data")
    rows = [line.split() for line in lines[first - 1:last] if line.strip()]
    start = [repr(c) for c in problem.certified]
    decimal = _exact_lanczos_sse([r[1] for r in rows], [r[0] for r in rows], start)
    as_double = [[_binary64_text(v) for v in r] for r in rows]
    binary = _exact_lanczos_sse([r[1] for r in as_double], [r[0] for r in as_double], start)
    assert nist.lre(decimal, problem.certified_sse) >= 10
    assert nist.lre(binary, problem.certified_sse) < STDERR_MARK
