"""Shared test helpers."""

import os

# One thread per test process, set before numpy or numba load: the suite runs one process
# per core (pytest -n 2), and a multithreaded BLAS or numba pool in each would oversubscribe
# the cores.  (Compiled models use the user-level cache: the on-disk cache is part of what
# is tested, and it is fine on CI machines.)
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS"):
    os.environ.setdefault(_var, "1")
os.environ.setdefault("MPLBACKEND", "Agg")

import pytest  # noqa: E402


def pytest_collection_modifyitems(config, items):
    """Slow-marked tests first (they take most of the suite's time): started early, they run
    beside the many quick ones instead of leaving one worker busy alone at the end."""
    items.sort(key=lambda item: item.get_closest_marker("slow") is None)


@pytest.fixture
def build():
    """Build a spec from plain dicts: build(model_dict, params_dict)."""
    from graybox.configkit import Table
    from graybox.model.build import build_spec

    def _build(model, params=None):
        return build_spec(Table(model, ("model",)), Table(params or {}, ("parameters",)))

    return _build
