"""The noise kinds, registered by the value of ``kind`` in ``[noise.OUTPUT]``.

The registry is the one place where a kind's name is looked up.  A new error model is one
new module in this package holding a class that follows
:class:`graybox.posterior.noise_kinds.base.NoiseKind`, and one entry in ``REGISTRY``.
"""

from __future__ import annotations

from graybox.posterior.noise_kinds.ar1 import AR1
from graybox.posterior.noise_kinds.base import NoiseKind, NoiseParam
from graybox.posterior.noise_kinds.gaussian import Gaussian
from graybox.posterior.noise_kinds.student_t import StudentT

REGISTRY: dict[str, NoiseKind] = {k.name: k for k in (Gaussian(), AR1(), StudentT())}
DEFAULT_KIND = Gaussian.name
NOISE_KINDS = tuple(REGISTRY)
NOISE_OPTIONS = tuple(dict.fromkeys(key for k in REGISTRY.values() for key in k.options))  # every kind's keys


def noise_kind(name: str) -> NoiseKind:
    """The registered noise kind called ``name`` (KeyError for an unknown one: validated
    names only; user text is checked against :data:`NOISE_KINDS` first)."""
    return REGISTRY[name]


def option_owner(key: str) -> str | None:
    """The kind that takes option ``key`` (None when none does)."""
    return next((k.name for k in REGISTRY.values() if key in k.options), None)


__all__ = ["DEFAULT_KIND", "NOISE_KINDS", "NOISE_OPTIONS", "REGISTRY", "NoiseKind", "NoiseParam", "noise_kind",
           "option_owner"]
