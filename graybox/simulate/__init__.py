"""Simulation: inputs held (or linear) between samples, states integrated, many parameter
sets per call.  The package's public names are re-exported here; each module owns one part:

* :mod:`~graybox.simulate.contract`: what every engine shares (``Tolerances``,
  ``SimResult``, the ``SimulationEngine`` protocol, the sensitivity columns);
* :mod:`~graybox.simulate.engine`: the one dispatcher, ``Engine`` (compiled when it can);
* :mod:`~graybox.simulate.timeline`: the integration plan of a record (``plan``);
* :mod:`~graybox.simulate.generate`: the model functions and derivatives, numpy dialect;
* :mod:`~graybox.simulate.integrators`: the methods, their coefficients and shared rules;
* :mod:`~graybox.simulate.initial`: initial states of a segment (steady by Newton);
* :mod:`~graybox.simulate.reference`: the readable numpy engine;
* :mod:`~graybox.simulate.compiled`: the compiled core at run time (numba);
* ``kernel_emit``, ``kernel_fast``, ``kernel_general``, ``kernel_source``: the generator of
  the compiled core's module text; :mod:`~graybox.simulate.cache`: its on-disk home.
"""

from __future__ import annotations

from graybox.simulate.contract import SimResult, SimulationEngine, Tolerances
from graybox.simulate.engine import ENGINES, Engine
from graybox.simulate.generate import generate
from graybox.simulate.reference import finite_difference_sensitivities
from graybox.simulate.reference import simulate as simulate_reference
from graybox.simulate.timeline import Timeline, plan

__all__ = ["ENGINES", "Engine", "SimResult", "SimulationEngine", "Timeline", "Tolerances",
           "finite_difference_sensitivities", "generate", "plan", "simulate_reference"]
