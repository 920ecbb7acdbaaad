"""A model linear in its parameters, fitted through graybox's study-file path, against
ordinary least squares in statsmodels (reference library: ``sm.OLS(y, X).fit()``).

With sigma estimated (the default) graybox's standard errors are sqrt(diag(s^2 (J^T J)^-1)),
s^2 = SSE/(n - p), and its 95% intervals use Student-t quantiles with n - p degrees of
freedom: exactly statsmodels' ``bse`` and ``conf_int(0.05)`` for a linear model.
The data are invented (a quadratic with fixed-seed Gaussian noise).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import statsmodels.api as sm

from graybox.study import load_study
from graybox.estimate.fit import fit
from graybox.workflow import prepare

pytestmark = pytest.mark.reference

NAMES = ("a", "b", "c")
STUDY = """\
[study]
name = "quadratic"

[model.inputs]
x = ""

[model.outputs]
y = { expr = "a + b*x + c*x**2" }

[parameters.a]
guess = 0.0
[parameters.b]
guess = 1.0
[parameters.c]
guess = 0.0

[data]
files = ["quadratic.csv"]

[data.tags]
x = "x"
y = "y"
"""


def invented_data(seed: int = 11, n: int = 35) -> tuple[np.ndarray, np.ndarray]:
    """x on [0, 8], y = 1.2 - 0.7 x + 0.15 x^2 plus N(0, 0.3^2) noise."""
    rng = np.random.default_rng(seed)
    x = np.linspace(0.0, 8.0, n)
    return x, 1.2 - 0.7 * x + 0.15 * x**2 + 0.3 * rng.standard_normal(n)


def write_study(folder: Path, x: np.ndarray, y: np.ndarray) -> Path:
    """The study file and a static CSV of repr floats."""
    rows = "".join(f"{float(a)!r},{float(b)!r}\n" for a, b in zip(x, y))
    (folder / "quadratic.csv").write_text("x,y\n" + rows)
    path = folder / "quadratic.toml"
    path.write_text(STUDY)
    return path


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    x, y = invented_data()
    study = load_study(write_study(tmp_path_factory.mktemp("ols"), x, y), sample=False)  # least squares only
    res = fit(prepare(study).problem, study.fit)
    ols = sm.OLS(y, np.column_stack([np.ones_like(x), x, x**2])).fit()
    return res, ols


def test_estimates_match_statsmodels(fitted):
    """statsmodels OLS ``params``."""
    res, ols = fitted
    assert [res.parameters[n].estimate for n in NAMES] == pytest.approx(ols.params, rel=1e-9)


def test_standard_errors_match_statsmodels(fitted):
    """statsmodels OLS ``bse`` (s^2 = SSE/(n - p))."""
    res, ols = fitted
    assert [res.parameters[n].stderr for n in NAMES] == pytest.approx(ols.bse, rel=1e-6)


def test_95_percent_intervals_match_statsmodels(fitted):
    """statsmodels OLS ``conf_int(0.05)`` (Student t, n - p degrees of freedom)."""
    res, ols = fitted
    ci = ols.conf_int(0.05)
    for k, n in enumerate(NAMES):
        assert res.parameters[n].ci95 == pytest.approx(tuple(ci[k]), rel=1e-6)


def test_residual_scale_and_dof_match_statsmodels(fitted):
    """statsmodels OLS ``ssr``, ``df_resid`` and ``scale`` (= s^2)."""
    res, ols = fitted
    assert res.sse == pytest.approx(ols.ssr, rel=1e-9)
    assert res.dof == ols.df_resid
    assert res.sigmas["y"] ** 2 == pytest.approx(ols.scale, rel=1e-9)
