"""Generated model functions: right-hand side, outputs and their exact derivatives.

Everything here is emitted from the checked spec's trees (:mod:`graybox.model.codegen`):
symbols become ``x[i]`` (states), ``u[m]`` (inputs) and ``p[k]`` (parameters); numbers are
``repr`` floats.  Each function writes into a preallocated, zero-filled ``out`` array so that
zero entries of sparse Jacobians cost nothing.  In the numpy dialect every entry may be an
array over parameter sets (shape ``(n_sets,)``): ``x`` is ``(n_x, n_sets)``, ``p`` is
``(n_p, n_sets)`` and ``u`` is ``(n_u,)``, broadcast against them.

Functions (``out`` shapes without the trailing set axis):

=========  ===========================================  =======================
name       value                                        out
=========  ===========================================  =======================
``f``      state rates                                  (n_x,)
``fx``     d f_i / d x_j                                (n_x, n_x)
``fp``     d f_i / d p_k                                (n_x, n_p)
``fu``     d f_i / d u_m                                (n_x, n_u)
``fxx``    d2 f_i / d x_j d x_l                         (n_x, n_x, n_x)
``fpx``    d2 f_i / d p_k d x_l                         (n_x, n_p, n_x)
``fxu``    d2 f_i / d x_j d u_m                         (n_x, n_x, n_u)
``fpu``    d2 f_i / d p_k d u_m                         (n_x, n_p, n_u)
``g``      measured outputs                             (n_y,)
``gx``     d g_r / d x_j                                (n_y, n_x)
``gp``     d g_r / d p_k                                (n_y, n_p)
=========  ===========================================  =======================
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from functools import lru_cache
from typing import Callable

from graybox.model.codegen import Emitter, compile_functions, function_source
from graybox.model.expr import ZERO, Node, diff
from graybox.model.spec import ModelSpec

ARGS = ("x", "u", "p", "out")


def symbol_env(spec: ModelSpec) -> dict[str, str]:
    """The access expression of every state (``x[i]``), input (``u[m]``) and parameter (``p[k]``)
    of ``spec``, by name, in the spec's order: the only way a symbol reaches generated code."""
    env = {name: f"x[{i}]" for i, name in enumerate(spec.state_names)}
    env.update({name: f"u[{m}]" for m, name in enumerate(spec.input_names)})
    env.update({name: f"p[{k}]" for k, name in enumerate(spec.parameter_names)})
    return env


@dataclass(frozen=True)
class TensorDef:
    """A function to generate: entries (index tuple -> tree), all others zero."""

    name: str
    shape: tuple[int, ...]
    entries: dict[tuple[int, ...], Node]


def _second(first: tuple[tuple[Node, ...], ...], variables: list[str]) -> dict[tuple[int, ...], Node]:
    out = {}
    for i, row in enumerate(first):
        for j, node in enumerate(row):
            if node == ZERO:
                continue
            for m, v in enumerate(variables):
                d = diff(node, v)
                if d != ZERO:
                    out[(i, j, m)] = d
    return out


def _matrix(rows: tuple[tuple[Node, ...], ...]) -> dict[tuple[int, ...], Node]:
    return {(i, j): n for i, row in enumerate(rows) for j, n in enumerate(row) if n != ZERO}


def tensor_defs(spec: ModelSpec) -> list[TensorDef]:
    """Every function of the table above, as trees (shared by all dialects)."""
    nx, nu, npar, ny = len(spec.states), len(spec.inputs), len(spec.parameters), len(spec.outputs)
    xs, us = spec.state_names, spec.input_names
    return [
        TensorDef("f", (nx,), {(i,): r for i, r in enumerate(spec.rates)}),
        TensorDef("fx", (nx, nx), _matrix(spec.jac_states)),
        TensorDef("fp", (nx, npar), _matrix(spec.jac_params)),
        TensorDef("fu", (nx, nu), _matrix(spec.jac_inputs)),
        TensorDef("fxx", (nx, nx, nx), _second(spec.jac_states, xs)),
        TensorDef("fpx", (nx, npar, nx), _second(spec.jac_params, xs)),
        TensorDef("fxu", (nx, nx, nu), _second(spec.jac_states, us)),
        TensorDef("fpu", (nx, npar, nu), _second(spec.jac_params, us)),
        TensorDef("g", (ny,), {(r,): h for r, h in enumerate(spec.output_exprs)}),
        TensorDef("gx", (ny, nx), _matrix(spec.out_jac_states)),
        TensorDef("gp", (ny, npar), _matrix(spec.out_jac_params)),
    ]


def tensor_source(defs: list[TensorDef], env: dict[str, str], dialect: str) -> str:
    """Source of one function per tensor.  Each function has its own temporaries."""
    chunks = []
    for d in defs:
        em = Emitter(env, dialect)
        for idx, node in sorted(d.entries.items()):
            em.assign(f"out[{', '.join(map(str, idx))}]", node)
        chunks.append(function_source(d.name, ARGS, em.lines))
    return "\n".join(chunks)


@dataclass(frozen=True)
class ModelFunctions:
    """The generated functions of one spec (numpy dialect), plus sizes and sparsity."""

    spec: ModelSpec
    source: str
    fns: dict[str, Callable] = field(repr=False)
    shapes: dict[str, tuple[int, ...]]
    nonzero: dict[str, int]
    digest: str

    def __getattr__(self, name: str):  # f, fx, ... as attributes
        fns = object.__getattribute__(self, "fns")
        if name in fns:
            return fns[name]
        raise AttributeError(name)

    @property
    def n_x(self) -> int:
        """Number of states."""
        return len(self.spec.states)

    @property
    def n_u(self) -> int:
        """Number of inputs."""
        return len(self.spec.inputs)

    @property
    def n_p(self) -> int:
        """Number of parameters (fixed ones included: the engines see every parameter)."""
        return len(self.spec.parameters)

    @property
    def n_y(self) -> int:
        """Number of measured outputs."""
        return len(self.spec.outputs)


def spec_digest(spec: ModelSpec) -> str:
    """A hash of what the generated code depends on (the inlined trees and symbol order)."""
    parts = [repr(id(spec.python_rhs)) if spec.python_rhs is not None else "",repr(spec.state_names), repr(spec.input_names), repr(spec.parameter_names), repr(spec.output_names),
             repr(spec.rates), repr(spec.output_exprs)]
    return hashlib.sha256("\n".join(parts).encode()).hexdigest()[:16]


@lru_cache(maxsize=64)
def _generate_cached(spec: ModelSpec) -> ModelFunctions:
    defs = tensor_defs(spec)
    if spec.python_rhs is not None:  # only the output functions come from trees
        defs = [d for d in defs if d.name in ("g", "gx", "gp")]
    source = "import numpy as np\n\n" + tensor_source(defs, symbol_env(spec), "numpy")
    fns = compile_functions(source, [d.name for d in defs], filename=f"<graybox model {spec.name}>")
    if spec.python_rhs is not None:
        fns.update(_python_functions(spec))
    shapes = {d.name: d.shape for d in tensor_defs(spec)}
    return ModelFunctions(spec, source, fns, shapes, {d.name: len(d.entries) for d in defs}, spec_digest(spec))


def _python_functions(spec: ModelSpec) -> dict[str, Callable]:
    """f from the user's function; f_x, f_p, f_u by central differences (step ~ eps**(1/3))."""
    import numpy as np

    f = spec.python_rhs
    n_x = len(spec.states)

    def central(which: int):
        def jac(x, u, p, out):
            args = [x, u, p]
            base = np.asarray(args[which], dtype=float)
            for j in range(base.shape[0]):
                h = 6e-6 * (1.0 + np.abs(base[j]))
                up, dn = base.copy(), base.copy()
                up[j] = base[j] + h
                dn[j] = base[j] - h
                fu_, fd_ = np.zeros_like(out[:, 0]), np.zeros_like(out[:, 0])
                a_up, a_dn = list(args), list(args)
                a_up[which], a_dn[which] = up, dn
                f(*a_up, fu_)
                f(*a_dn, fd_)
                out[:, j] = (fu_ - fd_) / (2 * h)
        return jac

    def no_second(*_):
        raise NotImplementedError("second derivatives of a Python right-hand side are not available")

    del n_x
    return {"f": f, "fx": central(0), "fu": central(1), "fp": central(2),
            "fxx": no_second, "fpx": no_second, "fxu": no_second, "fpu": no_second}


def generate(spec: ModelSpec) -> ModelFunctions:
    """Generated numpy-dialect functions for ``spec`` (cached per spec)."""
    return _generate_cached(spec)
