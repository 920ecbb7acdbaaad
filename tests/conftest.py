"""Shared test helpers."""

import os

import pytest

# Compiled-model cache inside the test session's temp space is not wanted: the on-disk cache
# is part of what is tested, and a user-level cache is fine on CI machines.
os.environ.setdefault("MPLBACKEND", "Agg")


@pytest.fixture
def build():
    """Build a spec from plain dicts: build(model_dict, params_dict)."""
    from graybox.configkit import Table
    from graybox.model.build import build_spec

    def _build(model, params=None):
        return build_spec(Table(model, ("model",)), Table(params or {}, ("parameters",)))

    return _build
