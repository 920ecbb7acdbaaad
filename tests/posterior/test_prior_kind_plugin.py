"""A prior kind added the way a new one is added (one class, one registry entry) is read from
a parameter's ``prior`` table, validated (keys, positive scale, centre inside the bounds) and
evaluated with no other change.  The kind here, a Cauchy prior, is checked against
scipy.stats.cauchy (reference library) up to the constant the sampler does not need."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from graybox.errors import SampleError
from graybox.posterior.config import priors_from_spec
from graybox.posterior.priors import REGISTRY, Prior
from tests.posterior.helpers import LINEAR_MODEL, problem_of, spec_of


class Cauchy:
    """``cauchy``: keys ``location``, ``scale``."""

    name, keys, scales, shaped, written = "cauchy", ("location", "scale"), ("scale",), True, True

    def support(self, lo, hi):
        return lo, hi

    def log_density(self, loc, scale, x):
        return -np.log1p(((x - loc) / scale) ** 2)

    def build(self, name, lo, hi, log_scale, values, t, proper):
        return Prior(name, self.name, lo, hi, log_scale, values["location"], values["scale"]), values["location"], \
            "location"

    def describe(self, p):
        return f"cauchy(location {p.loc:g}, scale {p.scale:g})"

    def entries(self, p):
        return {"location": p.loc, "scale": p.scale}


@pytest.fixture
def registered(monkeypatch):
    monkeypatch.setitem(REGISTRY, Cauchy.name, Cauchy())


def prior_of_b(prior: dict, bounds=(-20.0, 40.0)) -> Prior:
    spec = spec_of(LINEAR_MODEL, {"a": {"guess": 1.0, "bounds": [-5, 5]},
                                  "b": {"guess": 2.0, "bounds": list(bounds), "prior": prior}})
    x = np.linspace(0.0, 1.0, 12)
    return priors_from_spec(spec, problem_of(spec, np.arange(12.0), {"x": x}, {"y": 1 + 2 * x}))[1]


def test_plugged_in_prior_matches_scipy(registered):
    p = prior_of_b({"kind": "cauchy", "location": 3.0, "scale": 2.5})
    x = np.linspace(-19.0, 39.0, 40)
    diff = p.log_density(x) - stats.cauchy(3.0, 2.5).logpdf(x)
    assert np.ptp(diff) < 1e-12
    assert np.all(np.isneginf(p.log_density(np.array([-21.0, 41.0]))))
    assert p.to_dict() == {"kind": "cauchy", "bounds": [-20.0, 40.0], "log_scale": False, "location": 3.0,
                           "scale": 2.5}
    assert p.describe() == "cauchy(location 3, scale 2.5) truncated to [-20, 40]"
    assert math.isfinite(p.log_density_sampled(np.array([2.0]))[0])


def test_plugged_in_prior_is_validated(registered):
    with pytest.raises(SampleError, match="scale must be positive") as bad_scale:
        prior_of_b({"kind": "cauchy", "location": 3.0, "scale": 0.0})
    assert "key 'scale'" in bad_scale.value.where
    with pytest.raises(SampleError, match="centred at 50"):
        prior_of_b({"kind": "cauchy", "location": 50.0, "scale": 1.0})
    with pytest.raises(SampleError):
        prior_of_b({"kind": "cauchy", "location": 3.0, "scale": 1.0, "sd": 2.0})
