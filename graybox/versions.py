"""Installed versions of graybox's packages: for the run record and the cluster check."""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError, version

# graybox's own version (pyproject.toml says the same; ``graybox.__version__`` is this)
GRAYBOX_VERSION = "0.1.0"

# the packages a run's numbers depend on (recorded with every run)
PACKAGES = ("numpy", "scipy", "pandas", "lmfit", "emcee", "numba", "pint", "matplotlib")


def installed_versions(names=PACKAGES, missing: str = "not installed") -> dict[str, str]:
    """Each named distribution's installed version (``missing`` where it is not installed)."""
    out = {}
    for name in names:
        try:
            out[name] = version(name)
        except PackageNotFoundError:
            out[name] = missing
    return out
