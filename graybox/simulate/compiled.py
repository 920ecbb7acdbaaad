"""The compiled simulation core: generated numba code, one adaptive step size per parameter set.

From a checked spec this module emits a Python module (only from the validated trees, through
the ``"scalar"`` dialect of :class:`graybox.model.codegen.Emitter`: generated names, ``repr``
floats, never user text), writes it into the on-disk cache (:mod:`graybox.simulate.cache`),
imports it and lets numba compile it (``@njit(cache=True, error_model='numpy', nogil=True)``),
so a second process running the same model loads machine code instead of compiling.

The generated module holds

* the model functions ``f, fx, fp, fu, fxx, fpx, fxu, fpu, g, gx, gp`` of
  :mod:`graybox.simulate.generate` for one parameter set (``x``, ``u``, ``p`` are vectors; each
  writes only the structurally non-zero entries of its preallocated, once-zeroed ``out``);
* the model sizes as module constants (numba freezes them, so loops over states unroll);
* a fixed integration kernel: Dormand-Prince 5(4) (Dormand & Prince 1980) with FSAL reuse
  inside an interval, and Rodas4 (Hairer & Wanner, *Solving Ordinary Differential Equations
  II*, 2nd ed., 1996, Sect. IV.7) with the exact Jacobian, a small dense LU with partial
  pivoting, and forward sensitivities through the block-triangular augmented system.

The algorithm is the reference's (:mod:`graybox.simulate.reference`, same coefficients, error
norm, step-size controller, restarts at every knot, failure rules, initial states and method
choice), with one deliberate difference: every parameter set of a batch has its *own*
adaptive step (the reference shares one step over the batch).  A one-set batch therefore
takes the same steps as the reference and agrees with it to rounding.

Memory grows with observations x parameter sets x outputs (the results), never with the
number of steps; :meth:`CompiledModel.sse` and :meth:`CompiledModel.innovation_sse` keep only
(n_sets, n_outputs) sums and no trajectory at all.  No thread pool is used (one thread per
process; fleet batches parallelise over processes); the kernel releases the GIL.
"""

from __future__ import annotations

import math
import threading
import weakref
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from types import ModuleType
from typing import Mapping

import numpy as np

from graybox.model.codegen import Emitter, function_source, literal
from graybox.model.expr import (
    BinOp,
    Call,
    Compare,
    IfElse,
    Logic,
    Neg,
    Node,
    Num,
    Sym,
    affine_parts,
    is_affine,
    symbols,
)
from graybox.model.spec import ModelSpec
from graybox.simulate import integrators as _itg
from graybox.simulate.contract import SimResult, Tolerances, n_columns
from graybox.simulate.generate import ModelFunctions, generate, spec_digest, symbol_env, tensor_defs
from graybox.simulate.initial import initial_states
from graybox.simulate.integrators import (
    AUTO,
    EXPLICIT,
    IMPLICIT,
    MAX_STEPS_PER_INTERVAL,
    METHODS,
    STIFF_RATIO,
    Batch,
    spectral_radius,
)
from graybox.simulate.timeline import SegmentPlan, Timeline

JIT_OPTIONS = "cache=True, error_model='numpy', nogil=True"
# Functions that never allocate run without numba's reference counting: otherwise every call
# with array arguments, even inlined, costs an atomic increment and decrement per array.
JIT_NO_ALLOC = JIT_OPTIONS + ", _nrt=False"
ARGS = ("x", "u", "p", "out")
MODE_STORE, MODE_SSE = 0, 1
PYTHON_RHS_NOTE = "the model's right-hand side is a Python function: reference path used"
_EMPTY2, _EMPTY3 = np.zeros((0, 0)), np.zeros((0, 0, 0))  # placeholders for unused kernel arguments
_WARM: dict[str, set[str]] = {}  # generated module -> entry kernels already called in this process

# ---------------------------------------------------------------------------------------------
# Code generation (from validated trees only)


class KernelEmitter(Emitter):
    """The scalar dialect for numba, with ``min``/``max`` as ``np.minimum``/``np.maximum`` so
    that a NaN argument propagates exactly as in the numpy dialect (the builtins would drop it
    depending on argument order).  ``seed`` pre-binds already computed nodes to names."""

    def __init__(self, env: Mapping[str, str], prefix: str = "_t", seed: Mapping[Node, str] | None = None):
        super().__init__(env, "scalar", prefix)
        if seed:
            self._memo.update(seed)

    def _expression(self, node: Node) -> str:
        if isinstance(node, Call) and node.fn in ("min", "max"):
            return f"np.{'minimum' if node.fn == 'min' else 'maximum'}({', '.join(self.value(a) for a in node.args)})"
        return super()._expression(node)

    def _inline(self, node: Node) -> str:
        if isinstance(node, Call) and node.fn in ("min", "max") and node not in self._memo:
            return f"np.{'minimum' if node.fn == 'min' else 'maximum'}({', '.join(self._inline(a) for a in node.args)})"
        return super()._inline(node)

    @property
    def bound(self) -> dict[Node, str]:
        """Every node this emitter has a name (or literal) for."""
        return dict(self._memo)


def _indent(lines: list[str], level: int) -> list[str]:
    pad = "    " * level
    return [pad + line if line else line for line in lines]


def model_functions_source(spec: ModelSpec) -> str:
    """One jitted function per tensor of :func:`tensor_defs` (vectors in, ``out`` written at
    its structurally non-zero entries only)."""
    env = symbol_env(spec)
    chunks = []
    for d in tensor_defs(spec):
        em = KernelEmitter(env)
        for idx, node in sorted(d.entries.items()):
            em.assign(f"out[{', '.join(map(str, idx))}]", node)
        chunks.append(f"@njit({JIT_NO_ALLOC})\n" + function_source(d.name, ARGS, em.lines))
        if d.name == "f":  # the rates into one row of a stage table (no view per call)
            em = KernelEmitter(env)
            for (i,), node in sorted(d.entries.items()):
                em.assign(f"out[row, {i}]", node)
            chunks.append(f"@njit({JIT_NO_ALLOC})\n" + function_source("f_into", (*ARGS, "row"), em.lines))
    return "\n\n".join(chunks)


def _array_literal(name: str, rows: list[list[float]], width: int) -> str:
    """A module-level constant table (zero padded) with exact ``repr`` floats."""
    body = ", ".join("(" + ", ".join(literal(v) for v in (list(r) + [0.0] * (width - len(r)))) + ",)" for r in rows)
    return f"{name} = np.array(({body},))"


def _vector_literal(name: str, values) -> str:
    return f"{name} = np.array(({', '.join(literal(float(v)) for v in values)},))"


def coefficients_source() -> str:
    """The method coefficients, taken from the reference module so both use the same bits."""
    lines = [
        _array_literal("DPA", [list(r) for r in _itg.DP_A], 6),
        _vector_literal("DPC", _itg.DP_C),
        _vector_literal("DPB", _itg.DP_B),
        _vector_literal("DPE", _itg.DP_E),
        f"R4_GAMMA = {literal(_itg.R4_GAMMA)}",
        _array_literal("R4A", [list(r) for r in _itg.R4_A], 5),
        _array_literal("R4C", [list(r) for r in _itg.R4_C], 5),
        _vector_literal("R4CT", _itg.R4_CT),
        _vector_literal("R4D", _itg.R4_D),
        f"MAX_STEPS = {int(MAX_STEPS_PER_INTERVAL)}",
        # below this error norm the controller's factor min(5, 0.9*en**-0.2) is exactly 5
        f"EN_GROW5 = {literal(0.99 * (0.9 / 5.0) ** 5)}",
    ]
    return "\n".join(lines)


def sizes_source(spec: ModelSpec) -> str:
    return (f"N_X = {len(spec.states)}\nN_U = {len(spec.inputs)}\nN_P = {len(spec.parameters)}\n"
            f"N_Y = {len(spec.outputs)}")


# -- snippets shared by the kernels (fixed text, names filled in) -------------------------------

def _accumulate_lines(res: str, r: str, tk: str) -> list[str]:
    """Add a compared residual to the sums (and the AR(1) innovation sums)."""
    return [
        f"sse[iset, {r}] += w[{r}] * {res} * {res}",
        "if ar:",
        f"    if has_prev[{r}]:",
        f"        pe = phi[{r}] ** (({tk} - prev_t[{r}]) / dt_ref[{r}])",
        f"        inn = {res} - pe * prev_r[{r}]",
        f"        ssa[iset, {r}] += w[{r}] * inn * inn",
        f"    prev_r[{r}] = {res}",
        f"    prev_t[{r}] = {tk}",
        f"    has_prev[{r}] = True",
    ]


def _step_control_lines(accept_extra: list[str], order: str) -> list[str]:
    """The reference's controller for one set, after ``en`` and ``finite`` are known.
    Runs inside ``while s < span``; sets ``good = False`` and breaks on failure."""
    return [
        "steps_here += 1",
        "if not finite:",
        "    if h > hmin:",
        "        h *= 0.2  # a blow-up is treated as a rejected step first",
        "        continue",
        "    good = False",
        "    break",
        "if en <= 1.0:",
        "    s = s + h if span - s - h > 1e-12 * span else span",
        *_indent(accept_extra, 1),
        "    n_acc += 1",
        "    if en == 0.0 or en < EN_GROW5:",
        "        h *= 5.0",
        "    else:",
        f"        h *= min(5.0, max(0.2, 0.9 * en ** (-1.0 / {order})))",
        "else:",
        f"    h *= max(0.2, 0.9 * en ** (-1.0 / {order}))",
        "if steps_here > MAX_STEPS or (h < hmin and en > 1.0):",
        "    good = False",
        "    break",
    ]


# -- the fast path: explicit, no sensitivities, held inputs; scalar locals -----------------------

def _hoistable(nodes, blocked: set[str]) -> list[Node]:
    """Maximal non-leaf subtrees that use none of the ``blocked`` symbols, in first-seen order."""
    out: list[Node] = []
    seen: set[Node] = set()
    stack = list(reversed(list(nodes)))
    while stack:
        n = stack.pop()
        if n in seen:
            continue
        seen.add(n)
        if isinstance(n, (Num, Sym)):
            continue
        if not (symbols(n) & blocked):
            out.append(n)
        else:
            stack.extend(reversed(n.children()))
    return out


_TINY = 2.2250738585072014e-308  # smallest normal float


def _safe_reciprocal(value: float) -> bool:
    """1/value is a normal finite float, so a*(1/value) is a/value to within an ulp."""
    r = 1.0 / value if value != 0.0 else math.inf
    return math.isfinite(r) and abs(r) >= _TINY


def reciprocal_rewrite(nodes: list[Node], variable: set[str], fixed: set[str]) -> tuple[list[Node], dict[Node, str]]:
    """Replace ``a / b`` by ``a * r`` where ``a`` uses a ``variable`` symbol and ``b`` only
    ``fixed`` ones (so r = 1/b is computed once per parameter set instead of a division per
    stage).  Returns the rewritten trees and, per denominator, the generated name of its
    reciprocal (names start with an underscore: they cannot clash with a model symbol).  A
    constant denominator becomes its reciprocal literal when that is a normal float."""
    names: dict[Node, str] = {}
    memo: dict[Node, Node] = {}

    def fixed_only(n: Node) -> bool:
        return not isinstance(n, Num) and symbols(n) <= fixed

    def rw(n: Node) -> Node:
        if n in memo:
            return memo[n]
        if isinstance(n, (Num, Sym)):
            out: Node = n
        elif isinstance(n, BinOp):
            a, b = rw(n.left), rw(n.right)
            if n.op == "/" and symbols(n.left) & variable:
                if isinstance(n.right, Num) and _safe_reciprocal(n.right.value):
                    out = BinOp("*", a, Num(1.0 / n.right.value))
                elif fixed_only(n.right):
                    name = names.setdefault(n.right, f"_rcp{len(names)}")
                    out = BinOp("*", a, Sym(name))
                else:
                    out = BinOp(n.op, a, b)
            else:
                out = BinOp(n.op, a, b)
        elif isinstance(n, Neg):
            out = Neg(rw(n.arg))
        elif isinstance(n, Call):
            out = Call(n.fn, tuple(rw(c) for c in n.args))
        elif isinstance(n, Compare):
            out = Compare(n.op, rw(n.left), rw(n.right))
        elif isinstance(n, Logic):
            out = Logic(n.op, rw(n.left), None if n.right is None else rw(n.right))
        elif isinstance(n, IfElse):
            out = IfElse(rw(n.cond), rw(n.then), rw(n.other))
        else:
            raise TypeError(n)
        memo[n] = out
        return out

    return [rw(n) for n in nodes], names


def affine_sum(nodes: list[Node], names: list[str], state_vars: list[str]) -> str:
    """``c0 + c_1 * x_1 + ...`` for an affine rate, zero coefficients left out."""
    terms = [names[0]] if not (isinstance(nodes[0], Num) and nodes[0].value == 0.0) else []
    terms += [f"{c} * {x}" for n, c, x in zip(nodes[1:], names[1:], state_vars)
              if not (isinstance(n, Num) and n.value == 0.0)]
    return " + ".join(terms) if terms else "0.0"


def fast_explicit_source(spec: ModelSpec) -> str:
    """``explicit_set``: Dormand-Prince 5(4) for one parameter set with every quantity a scalar
    local and the rates written out once per stage; sub-expressions without states are
    computed once per set (parameters only) or once per interval (inputs), a division by a
    parameter-only quantity becomes a product with its reciprocal, the stage sums are written
    as x + (h*a_1)*k_1 + ... (the latest stage last), and the last stage is reused as the
    first inside an interval.  Same method, controller and failure rules as the reference;
    the results differ from it by rounding only.  When a reciprocal would not be a normal
    float the set is handed back (n_acc = -1) for the general path."""
    xs, us_, ps = spec.state_names, spec.input_names, spec.parameter_names
    nx, ny = len(xs), len(spec.outputs)
    par_env = {name: f"p_{k}" for k, name in enumerate(ps)}
    in_env = {name: f"u_{m}" for m, name in enumerate(us_)}
    affine = all(is_affine(r, xs) for r in spec.rates)
    if affine:
        # rates c0 + C x: the coefficients (free of states) once per interval, two
        # operations per term in each stage
        parts = [affine_parts(r, xs) for r in spec.rates]
        flat, rcp = reciprocal_rewrite([n for c0, cs in parts for n in (c0, *cs)], set(us_), set(ps))
        rates = flat
    else:
        rates, rcp = reciprocal_rewrite(list(spec.rates), set(xs) | set(us_), set(ps))
    par_env.update({name: name for name in rcp.values()})
    outs = list(spec.output_exprs)

    set_em = KernelEmitter(par_env, "_q")
    rcp_lines = []
    for den, name in rcp.items():
        code = set_em.value(den)
        rcp_lines += [f"{name} = 1.0 / {code}",
                      f"if {code} != 0.0 and not (abs({name}) >= {literal(_TINY)} and abs({name}) < np.inf):",
                      "    return False, -1"]
    for node in _hoistable([*rates, *outs], set(xs) | set(us_)):
        set_em.value(node)
    int_em = KernelEmitter({**par_env, **in_env}, "_v", seed=set_em.bound)
    if affine:
        coef = [int_em.value(n) for n in rates]
        width = nx + 1
    for node in _hoistable(rates, set(xs)):
        int_em.value(node)

    def stage(label: str, state_vars: list[str], into: str) -> list[str]:
        if affine:
            return [f"{into}{i} = {affine_sum(rates[i * width:(i + 1) * width], coef[i * width:(i + 1) * width], state_vars)}"
                    for i in range(nx)]
        env = {**par_env, **in_env, **{x: v for x, v in zip(xs, state_vars)}}
        em = KernelEmitter(env, f"_s{label}_", seed=int_em.bound)
        values = [em.value(r) for r in rates]
        return em.lines + [f"{into}{i} = {v}" for i, v in enumerate(values)]

    coef_lines: list[str] = []

    def scaled(tag: str, coefs) -> list[str]:
        """Names of h*coef for the non-zero coefficients (zero ones: None)."""
        out = []
        for j, c in enumerate(coefs):
            if c == 0.0:
                out.append(None)
            else:
                coef_lines.append(f"h{tag}{j} = h * {literal(c)}")
                out.append(f"h{tag}{j}")
        return out

    def combo(base: str | None, hs: list[str | None], i: int) -> str:
        terms = ([base] if base else []) + [f"{c} * k{j + 1}_{i}" for j, c in enumerate(hs) if c is not None]
        return " + ".join(terms)

    x = [f"x_{i}" for i in range(nx)]
    body: list[str] = []
    for st in range(1, 6):  # stages 2..6
        hs = scaled(f"a{st}_", _itg.DP_A[st])
        yv = [f"y{st}_{i}" for i in range(nx)]
        body += [f"{yv[i]} = {combo(f'x_{i}', hs, i)}" for i in range(nx)]
        body += stage(str(st + 1), yv, f"k{st + 1}_")
    hb = scaled("b", _itg.DP_B)
    body += [f"xn_{i} = {combo(f'x_{i}', hb, i)}" for i in range(nx)]
    body += stage("7", [f"xn_{i}" for i in range(nx)], "k7_")
    he = scaled("e", _itg.DP_E)
    body += [f"err_{i} = {combo(None, he, i)}" for i in range(nx)]
    body.append("acc = 0.0")
    for i in range(nx):
        body.append(f"q = err_{i} / (atol + rtol * np.maximum(abs(x_{i}), abs(xn_{i})))")
        body.append("acc += q * q")
    body.append(f"en = np.sqrt(acc / {nx})")
    body.append("finite = np.isfinite(en)" + "".join(f" and np.isfinite(xn_{i})" for i in range(nx)))
    accept = [f"x_{i} = xn_{i}" for i in range(nx)] + [f"k1_{i} = k7_{i}" for i in range(nx)]
    body += _step_control_lines(accept, "5.0")

    obs_env = {**par_env, **{name: f"uo_{m}" for m, name in enumerate(us_)}, **dict(zip(xs, x))}
    obs_em = KernelEmitter(obs_env, "_o", seed=set_em.bound)
    g_vals = [obs_em.value(h_) for h_ in outs]
    observe = [f"uo_{m} = u[k, {m}]" for m in range(len(us_))] + obs_em.lines
    observe += [f"G_{r} = {v}" for r, v in enumerate(g_vals)]
    pick = ["gr = G_0"] if ny == 1 else (
        [f"{'if' if r == 0 else 'elif'} r == {r}:\n    gr = G_{r}" for r in range(ny - 1)]
        + [f"else:\n    gr = G_{ny - 1}"])
    observe += [
        "for e in range(knot_ptr[k], knot_ptr[k + 1]):",
        "    r = obs_r[e]",
        *_indent("\n".join(pick).split("\n"), 1),
        "    if mode == 0:",
        "        out_y[iset, obs_col[e]] = gr",
        "        if not np.isfinite(gr):  # every stored observation is a compared one",
        "            good = False",
        "            break",
        "    else:",
        "        res = y_obs[obs_col[e]] - gr",
        "        if not np.isfinite(res):",
        "            good = False",
        "            break",
        *_indent(_accumulate_lines("res", "r", "t[k]"), 2),
    ]

    lines = [
        f"@njit({JIT_NO_ALLOC})",
        "def explicit_set(iset, t, u, p, x0, rtol, atol, knot_ptr, obs_r, obs_col, mode, out_y, y_obs, w,",
        "                 ar, phi, dt_ref, sse, ssa, prev_r, prev_t, has_prev):",
        '    """One parameter set, explicit method, held inputs, no sensitivities."""',
        *[f"    p_{k} = p[{k}]" for k in range(len(ps))],
        *_indent(set_em.lines, 1),
        *_indent(rcp_lines, 1),
        *[f"    x_{i} = x0[{i}]" for i in range(nx)],
        *[f"    k1_{i} = 0.0" for i in range(nx)],
        "    n_k = t.shape[0]",
        "    good = True",
        "    n_acc = 0",
        "    h = -1.0",
        "    k = 0",
        "    while True:",
        "        if knot_ptr[k + 1] > knot_ptr[k]:",
        *_indent(observe, 3),
        "            if not good:",
        "                break",
        "        if k == n_k - 1:",
        "            break",
        "        span = t[k + 1] - t[k]",
        *[f"        u_{m} = u[k, {m}]" for m in range(len(us_))],
        *_indent(int_em.lines, 2),
        "        h = span if h < 0.0 else min(h, span)",
        "        hmin = 1e-12 * max(span, 1.0)",
        "        s = 0.0",
        "        steps_here = 0",
        *_indent(stage("1", x, "k1_"), 2),
        "        while s < span:",
        "            h = min(h, span - s)",
        *_indent(coef_lines, 3),
        *_indent(body, 3),
        "        if not good:",
        "            break",
        "        k += 1",
        "    return good, n_acc",
    ]
    return "\n".join(lines) + "\n"


# -- the general path: arrays over states and sensitivity columns -------------------------------

def _sens_rhs_lines(xv: str, Sv: str, uv: str, out: str) -> list[str]:
    """``out(i, c) = (f_x S)[i, c] + f_p[i, c]`` (out is a format with {i}, {c})."""
    return [
        f"fx({xv}, {uv}, p, FX)",
        "if N_P > 0:",
        f"    fp({xv}, {uv}, p, FP)",
        "for i in range(N_X):",
        "    for c in range(n_c):",
        "        acc = 0.0",
        "        for j in range(N_X):",
        f"            acc += FX[i, j] * {Sv}[j, c]",
        "        if c < N_P:",
        "            acc += FP[i, c]",
        f"        {out.format(i='i', c='c')} = acc",
    ]


def _lu_solve_lines(b: str) -> list[str]:
    """Solve (LU of E, pivots piv) y = b in place; b is a format with {i}."""
    return [
        "for kk in range(N_X):",
        "    jj = piv[kk]",
        "    if jj != kk:",
        f"        tmp = {b.format(i='kk')}",
        f"        {b.format(i='kk')} = {b.format(i='jj')}",
        f"        {b.format(i='jj')} = tmp",
        "for ii in range(N_X):",
        f"    acc = {b.format(i='ii')}",
        "    for jj in range(ii):",
        f"        acc -= E[ii, jj] * {b.format(i='jj')}",
        f"    {b.format(i='ii')} = acc",
        "for ii in range(N_X - 1, -1, -1):",
        f"    acc = {b.format(i='ii')}",
        "    for jj in range(ii + 1, N_X):",
        f"        acc -= E[ii, jj] * {b.format(i='jj')}",
        f"    {b.format(i='ii')} = acc / E[ii, ii]",
    ]


_LU_FACTOR = [
    "for kk in range(N_X):  # LU with partial pivoting, in place",
    "    best = kk",
    "    big = abs(E[kk, kk])",
    "    for ii in range(kk + 1, N_X):",
    "        if abs(E[ii, kk]) > big:",
    "            big = abs(E[ii, kk])",
    "            best = ii",
    "    piv[kk] = best",
    "    if best != kk:",
    "        for jj in range(N_X):",
    "            tmp = E[kk, jj]",
    "            E[kk, jj] = E[best, jj]",
    "            E[best, jj] = tmp",
    "    inv = 1.0 / E[kk, kk]",
    "    for ii in range(kk + 1, N_X):",
    "        E[ii, kk] *= inv",
    "        a = E[ii, kk]",
    "        for jj in range(kk + 1, N_X):",
    "            E[ii, jj] -= a * E[kk, jj]",
]


def _dopri_lines() -> list[str]:
    """One Dormand-Prince 5(4) step (arrays), as in integrators.dopri_step."""
    return [
        "for st in range(n_st):",
        "    if st == 0:",
        "        inputs_at(us, slope, any_lin, 0.0, ui)",
        "        if not have_k1:",
        "            f_into(x, ui, p, K, 0)",
        "        if sens:",
        *_indent(_sens_rhs_lines("x", "S", "ui", "KS[0, {i}, {c}]"), 3),
        "        continue",
        "    for i in range(N_X):",
        "        acc = 0.0",
        "        for j in range(st):",
        "            acc += DPA[st, j] * K[j, i]",
        "        xi[i] = x[i] + h * acc",
        "    if sens:",
        "        for i in range(N_X):",
        "            for c in range(n_c):",
        "                acc = 0.0",
        "                for j in range(st):",
        "                    acc += DPA[st, j] * KS[j, i, c]",
        "                Si[i, c] = S[i, c] + h * acc",
        "    inputs_at(us, slope, any_lin, DPC[st] * h, ui)",
        "    f_into(xi, ui, p, K, st)",
        "    if sens:",
        *_indent(_sens_rhs_lines("xi", "Si", "ui", "KS[st, {i}, {c}]"), 2),
        "for i in range(N_X):",
        "    acc = 0.0",
        "    for j in range(6):",
        "        acc += DPB[j] * K[j, i]",
        "    x_new[i] = x[i] + h * acc",
        "if sens:",
        "    for i in range(N_X):",
        "        for c in range(n_c):",
        "            acc = 0.0",
        "            for j in range(6):",
        "                acc += DPB[j] * KS[j, i, c]",
        "            S_new[i, c] = S[i, c] + h * acc",
        "inputs_at(us, slope, any_lin, h, ui)",
        "f_into(x_new, ui, p, K, 6)",
        "for i in range(N_X):",
        "    acc = 0.0",
        "    for j in range(6):",
        "        acc += DPE[j] * K[j, i]",
        "    err[i] = h * (acc + DPE[6] * K[6, i])",
    ]


def _rodas_lines() -> list[str]:
    """One Rodas4 step (arrays), as in integrators.rodas_step: exact Jacobian at the start,
    one LU of I/(h*gamma) - J for the states and every sensitivity column."""
    return [
        "fx(x, us, p, J)",
        "inv_hg = 1.0 / (h * R4_GAMMA)",
        "for i in range(N_X):",
        "    for j in range(N_X):",
        "        E[i, j] = -J[i, j]",
        "    E[i, i] += inv_hg",
        *_LU_FACTOR,
        "if sens:",
        "    fxx(x, us, p, FXX)",
        "    if N_P > 0:",
        "        fpx(x, us, p, FPX)",
        "    for i in range(N_X):",
        "        for c in range(n_c):",
        "            for l in range(N_X):",
        "                acc = 0.0",
        "                for j in range(N_X):",
        "                    acc += FXX[i, j, l] * S[j, c]",
        "                if c < N_P:",
        "                    acc += FPX[i, c, l]",
        "                Bt[i, c, l] = acc",
        "if any_lin:",
        "    fu(x, us, p, FU)",
        "    for i in range(N_X):",
        "        acc = 0.0",
        "        for m in range(N_U):",
        "            acc += FU[i, m] * slope[m]",
        "        ft[i] = acc",
        "    if sens:",
        "        fxu(x, us, p, FXU)",
        "        if N_P > 0:",
        "            fpu(x, us, p, FPU)",
        "        for i in range(N_X):",
        "            for c in range(n_c):",
        "                acc = 0.0",
        "                for j in range(N_X):",
        "                    dj = 0.0",
        "                    for m in range(N_U):",
        "                        dj += FXU[i, j, m] * slope[m]",
        "                    acc += dj * S[j, c]",
        "                if c < N_P:",
        "                    for m in range(N_U):",
        "                        acc += FPU[i, c, m] * slope[m]",
        "                St[i, c] = acc",
        "for st in range(n_st):",
        "    if st == 0:",
        "        for i in range(N_X):",
        "            xi[i] = x[i]",
        "        if sens:",
        "            for i in range(N_X):",
        "                for c in range(n_c):",
        "                    Si[i, c] = S[i, c]",
        "    elif st < 5:",
        "        for i in range(N_X):",
        "            acc = 0.0",
        "            for j in range(st):",
        "                acc += R4A[st, j] * K[j, i]",
        "            xi[i] = x[i] + acc",
        "        if sens:",
        "            for i in range(N_X):",
        "                for c in range(n_c):",
        "                    acc = 0.0",
        "                    for j in range(st):",
        "                        acc += R4A[st, j] * KS[j, i, c]",
        "                    Si[i, c] = S[i, c] + acc",
        "    else:  # stage 6 starts from the stage-5 solution plus k5 (stiffly accurate)",
        "        for i in range(N_X):",
        "            xi[i] = xi[i] + K[4, i]",
        "        if sens:",
        "            for i in range(N_X):",
        "                for c in range(n_c):",
        "                    Si[i, c] = Si[i, c] + KS[4, i, c]",
        "    inputs_at(us, slope, any_lin, R4CT[st] * h, ui)",
        "    f_into(xi, ui, p, K, st)",
        "    if st > 0:",
        "        for i in range(N_X):",
        "            acc = 0.0",
        "            for j in range(st):",
        "                acc += R4C[st, j] * K[j, i]",
        "            K[st, i] = K[st, i] + acc / h",
        "    if any_lin and R4D[st] != 0.0:",
        "        for i in range(N_X):",
        "            K[st, i] = K[st, i] + (h * R4D[st]) * ft[i]",
        *_indent(_lu_solve_lines("K[st, {i}]"), 1),
        "    if sens:",
        *_indent(_sens_rhs_lines("xi", "Si", "ui", "KS[st, {i}, {c}]"), 2),
        "        for i in range(N_X):",
        "            for c in range(n_c):",
        "                v = KS[st, i, c]",
        "                if st > 0:",
        "                    acc = 0.0",
        "                    for j in range(st):",
        "                        acc += R4C[st, j] * KS[j, i, c]",
        "                    v = v + acc / h",
        "                if any_lin and R4D[st] != 0.0:",
        "                    v = v + (h * R4D[st]) * St[i, c]",
        "                acc = 0.0",
        "                for l in range(N_X):",
        "                    acc += Bt[i, c, l] * K[st, l]",
        "                KS[st, i, c] = v + acc",
        "        for cc in range(n_c):",
        *_indent(_lu_solve_lines("KS[st, {i}, cc]"), 3),
        "for i in range(N_X):",
        "    x_new[i] = xi[i] + K[5, i]",
        "    err[i] = K[5, i]",
        "if sens:",
        "    for i in range(N_X):",
        "        for c in range(n_c):",
        "            S_new[i, c] = Si[i, c] + KS[5, i, c]",
    ]


def _generic_observe_lines() -> list[str]:
    return [
        "for m in range(N_U):  # (a copy, not a view: no reference counting per knot)",
        "    ui[m] = u[k, m]",
        "g(x, ui, p, G)",
        "if mode == 0:",
        "    if sens:",
        "        gx(x, ui, p, GX)",
        "        if N_P > 0:",
        "            gp(x, ui, p, GP)",
        "    for e in range(knot_ptr[k], knot_ptr[k + 1]):",
        "        r = obs_r[e]",
        "        c0 = obs_col[e]",
        "        out_y[iset, c0] = G[r]",
        "        if not np.isfinite(G[r]):  # every stored observation is a compared one",
        "            good = False",
        "            break",
        "        if sens:",
        "            for c in range(n_c):",
        "                acc = 0.0",
        "                for j in range(N_X):",
        "                    acc += GX[r, j] * S[j, c]",
        "                if c < N_P:",
        "                    acc += GP[r, c]",
        "                out_s[iset, c0, c] = acc",
        "else:",
        "    for e in range(knot_ptr[k], knot_ptr[k + 1]):",
        "        r = obs_r[e]",
        "        res = y_obs[obs_col[e]] - G[r]",
        "        if not np.isfinite(res):",
        "            good = False",
        "            break",
        *_indent(_accumulate_lines("res", "r", "t[k]"), 2),
    ]


def generic_source(method: str) -> str:
    """``dopri_set`` or ``rodas_set``: one parameter set, optional sensitivities, held or
    linear inputs (the step body written inline: no calls with array arguments per step).
    One function per method, so that a model compiles only the methods it uses."""
    explicit = method == EXPLICIT
    accept = [
        "for i in range(N_X):",
        "    x[i] = x_new[i]",
        "    K[0, i] = K[6, i]",
        "    for c in range(n_c):",
        "        S[i, c] = S_new[i, c]",
    ]
    step = [
        "h = min(h, span - s)",
        "for m in range(N_U):",
        "    us[m] = u[k, m] + slope[m] * s if any_lin else u[k, m]",
        *(_dopri_lines() if explicit else _rodas_lines()),
        f"have_k1 = {explicit}",
        "en = error_norm(err, x, x_new, rtol, atol)",
        "finite = np.isfinite(en) and all_finite(x_new)",
        *_step_control_lines(accept, "5.0" if explicit else "4.0"),
    ]
    lines = [
        f"@njit({JIT_NO_ALLOC})",
        f"def {'dopri' if explicit else 'rodas'}_set(iset, t, u, lin, any_lin, p, x, S, sens, rtol, atol, knot_ptr, obs_r, obs_col,",
        "                mode, out_y, out_s, y_obs, w, ar, phi, dt_ref, sse, ssa, prev_r, prev_t, has_prev,",
        "                x_new, xi, err, ft, S_new, Si, St, K, KS, Bt, us, ui, slope, J, FX, E, piv, FP, FU,",
        "                FXX, FPX, FXU, FPU, G, GX, GP):",
        f'    """One parameter set, {"Dormand-Prince 5(4)" if explicit else "Rodas4"}: sensitivities, held or linear inputs."""',
        "    n_k = t.shape[0]",
        "    n_c = S.shape[1]",
        "    n_st = K.shape[0] - 1  # 6 stages (a run-time count: the stage loop is not unrolled)",
        "    good = True",
        "    n_acc = 0",
        "    h = -1.0",
        "    k = 0",
        "    while True:",
        "        if knot_ptr[k + 1] > knot_ptr[k]:",
        *_indent(_generic_observe_lines(), 3),
        "            if not good:",
        "                break",
        "        if k == n_k - 1 or N_X == 0:",
        "            if k == n_k - 1:",
        "                break",
        "            k += 1",
        "            continue",
        "        span = t[k + 1] - t[k]",
        "        for m in range(N_U):",
        "            slope[m] = (u[k + 1, m] - u[k, m]) / span if lin[m] else 0.0",
        "        h = span if h < 0.0 else min(h, span)",
        "        hmin = 1e-12 * max(span, 1.0)",
        "        s = 0.0",
        "        steps_here = 0",
        "        have_k1 = False",
        "        while s < span:",
        *_indent(step, 3),
        "        if not good:",
        "            break",
        "        k += 1",
        "    return good, n_acc",
    ]
    return "\n".join(lines) + "\n"


HELPERS_SOURCE = '''
@JIT
def error_norm(err, x_old, x_new, rtol, atol):
    """RMS over states of err / (atol + rtol * max(|x_old|, |x_new|))."""
    if N_X == 0:
        return 0.0
    acc = 0.0
    for i in range(N_X):
        q = err[i] / (atol + rtol * np.maximum(abs(x_old[i]), abs(x_new[i])))
        acc += q * q
    return np.sqrt(acc / N_X)


@JIT
def all_finite(v):
    for i in range(v.shape[0]):
        if not np.isfinite(v[i]):
            return False
    return True


@JIT
def inputs_at(us, slope, any_lin, ds, out):
    """out = us + slope * ds (linear inputs), or us (held inputs)."""
    if any_lin:
        for m in range(N_U):
            out[m] = us[m] + slope[m] * ds
    else:
        for m in range(N_U):
            out[m] = us[m]
'''

_RUN_HEAD = '''
@JIT
def NAME(t, u, lin, theta, x0, S0, ok, steps, retry, sens, rtol, atol, knot_ptr, obs_r, obs_col, mode,
         out_y, out_s, y_obs, w, ar, phi, dt_ref, sse, ssa):
    """Integrate every parameter set (rows of theta) over one segment, each with its own
    adaptive step, restarted at every knot; observe at knots.  ok and steps are updated per
    set; a set already failed is skipped."""
    n_sets = theta.shape[0]
    n_c = S0.shape[2]
    any_lin = False
    for m in range(N_U):
        if lin[m]:
            any_lin = True
    prev_r = np.zeros(N_Y)
    prev_t = np.zeros(N_Y)
    has_prev = np.zeros(N_Y, np.bool_)
'''

_RUN_WORK = '''
    x = np.zeros(N_X)
    x_new = np.zeros(N_X)
    xi = np.zeros(N_X)
    err = np.zeros(N_X)
    ft = np.zeros(N_X)
    S = np.zeros((N_X, n_c))
    S_new = np.zeros((N_X, n_c))
    Si = np.zeros((N_X, n_c))
    St = np.zeros((N_X, n_c))
    K = np.zeros((7, N_X))
    KS = np.zeros((6, N_X, n_c))
    Bt = np.zeros((N_X, n_c, N_X))
    us = np.zeros(N_U)
    ui = np.zeros(N_U)
    slope = np.zeros(N_U)
    J = np.zeros((N_X, N_X))
    FX = np.zeros((N_X, N_X))
    E = np.zeros((N_X, N_X))
    piv = np.zeros(N_X, np.int64)
    FP = np.zeros((N_X, N_P))
    FU = np.zeros((N_X, N_U))
    FXX = np.zeros((N_X, N_X, N_X))
    FPX = np.zeros((N_X, N_P, N_X))
    FXU = np.zeros((N_X, N_X, N_U))
    FPU = np.zeros((N_X, N_P, N_U))
    G = np.zeros(N_Y)
    GX = np.zeros((N_Y, N_X))
    GP = np.zeros((N_Y, N_P))
'''

_RUN_LOOP_FAST = '''
    for iset in range(n_sets):
        if not ok[iset]:
            continue
        for r in range(N_Y):
            has_prev[r] = False
        good, n_acc = explicit_set(iset, t, u, theta[iset], x0[iset], rtol, atol, knot_ptr, obs_r, obs_col, mode,
                                   out_y, y_obs, w, ar, phi, dt_ref, sse, ssa, prev_r, prev_t, has_prev)
        if n_acc < 0:  # a reciprocal the fast path cannot use: the caller reruns the set
            retry[iset] = True
            continue
        ok[iset] = good
        steps[iset] += n_acc
'''

_RUN_LOOP_GENERIC = '''
    for iset in range(n_sets):
        if not ok[iset]:
            continue
        for r in range(N_Y):
            has_prev[r] = False
        for i in range(N_X):
            x[i] = x0[iset, i]
            for c in range(n_c):
                S[i, c] = S0[iset, i, c]
        good, n_acc = SETFN(iset, t, u, lin, any_lin, theta[iset], x, S, sens, rtol, atol, knot_ptr,
                            obs_r, obs_col, mode, out_y, out_s, y_obs, w, ar, phi, dt_ref, sse, ssa,
                            prev_r, prev_t, has_prev, x_new, xi, err, ft, S_new, Si, St, K, KS, Bt,
                            us, ui, slope, J, FX, E, piv, FP, FU, FXX, FPX, FXU, FPU, G, GX, GP)
        ok[iset] = good
        steps[iset] += n_acc
'''


def run_source(jit: str) -> str:
    """The three entry kernels (same signature): ``run_fast`` (explicit, no sensitivities,
    held inputs), ``run_dopri`` and ``run_rodas`` (the general paths).  Each compiles on first
    use only."""
    head = _RUN_HEAD.replace("@JIT", jit)
    return "\n".join([
        head.replace("NAME", "run_fast") + _RUN_LOOP_FAST,
        head.replace("NAME", "run_dopri") + _RUN_WORK + _RUN_LOOP_GENERIC.replace("SETFN", "dopri_set"),
        head.replace("NAME", "run_rodas") + _RUN_WORK + _RUN_LOOP_GENERIC.replace("SETFN", "rodas_set"),
    ])


def module_source(spec: ModelSpec) -> str:
    """The whole generated module for ``spec``."""
    header = ("# Generated by graybox.simulate.compiled from a checked model (digest "
              f"{spec_digest(spec)}); do not edit.\n"
              "import numpy as np\nfrom numba import njit\n")
    jit, bare = f"@njit({JIT_OPTIONS})", f"@njit({JIT_NO_ALLOC})"
    fast = fast_explicit_source(spec) if spec.states else (
        f"{bare}\ndef explicit_set(*args):\n    return False, 0\n")
    return "\n\n".join([header, sizes_source(spec), coefficients_source(), model_functions_source(spec),
                        HELPERS_SOURCE.replace("@JIT", bare), fast, generic_source(EXPLICIT),
                        generic_source(IMPLICIT), run_source(jit)])


# ---------------------------------------------------------------------------------------------
# Timeline tables for the kernel (built once per timeline and model, cached)


@dataclass(frozen=True)
class SegmentTable:
    """One segment as flat arrays: knots, inputs, observations grouped by knot (CSR)."""

    t: np.ndarray  # (n_k,)
    u: np.ndarray  # (n_k, n_u) C-contiguous
    knot_ptr: np.ndarray  # (n_k + 1,) observations of knot k are entries knot_ptr[k]:knot_ptr[k+1]
    obs_r: np.ndarray  # (n_e,) output index of each entry
    obs_col: np.ndarray  # (n_e,) flat column: offset of the output + index of its observation
    h_typ: float  # median knot interval (for the choice of method)


@dataclass(frozen=True)
class TimelineTables:
    offsets: dict[str, int]  # output -> first flat column
    sizes: dict[str, int]  # output -> number of observations (all, compared or not)
    n_cols: int
    y_obs: np.ndarray  # (n_cols,) observed values (compared ones are finite)
    segments: tuple[SegmentTable, ...]
    lin: np.ndarray  # (n_u,) bool
    n_used: np.ndarray  # (n_outputs,) compared observations per output


def segment_table(seg: SegmentPlan, output_names: list[str], offsets: Mapping[str, int]) -> SegmentTable:
    knots, rows, cols = [], [], []
    for r, o in enumerate(output_names):
        k = np.asarray(seg.obs_knot[o], np.int64)
        knots.append(k)
        rows.append(np.full(k.size, r, np.int64))
        cols.append(offsets[o] + np.asarray(seg.obs_index[o], np.int64))
    knot = np.concatenate(knots) if knots else np.zeros(0, np.int64)
    order = np.argsort(knot, kind="stable")
    counts = np.bincount(knot, minlength=seg.n_knots) if knot.size else np.zeros(seg.n_knots, np.int64)
    ptr = np.zeros(seg.n_knots + 1, np.int64)
    np.cumsum(counts, out=ptr[1:])
    # fresh writeable copies: numba types a read-only array differently (another compilation)
    h_typ = float(np.median(np.diff(seg.t))) if seg.n_knots >= 2 else 0.0
    return SegmentTable(_own(seg.t, float), _own(seg.u, float), ptr,
                        _own(np.concatenate(rows)[order], np.int64), _own(np.concatenate(cols)[order], np.int64), h_typ)


def _own(a, dtype) -> np.ndarray:
    """A C-contiguous, writeable copy."""
    return np.array(a, dtype=dtype, order="C", copy=True)


def timeline_tables(spec: ModelSpec, timeline: Timeline) -> TimelineTables:
    names = spec.output_names
    rec = timeline.record
    sizes = {o: int(rec.outputs[o].t.size) for o in names}
    offsets, at = {}, 0
    for o in names:
        offsets[o] = at
        at += sizes[o]
    y_obs = np.concatenate([np.asarray(rec.outputs[o].values, float) for o in names]) if names else np.zeros(0)
    segs = tuple(segment_table(seg, names, offsets) for seg in timeline.segments)
    lin = _own(np.asarray(timeline.linear, bool).reshape(len(spec.inputs)), bool)
    n_used = np.array([timeline.n_obs_of(o) for o in names], dtype=np.int64)
    return TimelineTables(offsets, sizes, at, y_obs, segs, lin, n_used)


# ---------------------------------------------------------------------------------------------
# The compiled model


def largest_rate(b: Batch, x0: np.ndarray, u: np.ndarray) -> float:
    """The spectral radius of f_x over the batch (as integrators.spectral_radius; for one
    state the eigenvalue is the entry itself, which skips the eigenvalue routine)."""
    if b.n_x != 1:
        return spectral_radius(b, x0, u)
    largest = float(np.abs(b.fx(x0, u)).max())
    return largest if math.isfinite(largest) else np.inf  # NaN propagates through max


def choose_method(b: Batch, x0: np.ndarray, seg: SegmentPlan, h_typ: float, tol: Tolerances) -> str:
    """The reference's rule: implicit when the spectral radius of f_x at the start (largest
    over the batch) times the median knot interval ``h_typ`` exceeds STIFF_RATIO."""
    if tol.method != AUTO:
        return tol.method
    if seg.n_knots < 2:
        return EXPLICIT
    return IMPLICIT if largest_rate(b, x0, seg.u[0]) * h_typ > STIFF_RATIO else EXPLICIT


@dataclass
class _Run:
    """Per-call arrays shared by the segments of one call."""

    ok: np.ndarray
    steps: np.ndarray
    methods: list[str]
    messages: list[str]


class CompiledModel:
    """The compiled simulator of one spec (build it with :func:`compile_model`)."""

    def __init__(self, spec: ModelSpec, module: ModuleType, fast_path: bool = True):
        if spec.python_rhs is not None:
            raise ValueError(PYTHON_RHS_NOTE)
        self.spec = spec
        self.module = module
        self.fast_path = fast_path
        self.funcs: ModelFunctions = generate(spec)  # numpy functions: initial states, method choice
        self.digest = spec_digest(spec)
        self._tables: dict[int, tuple[weakref.ref, TimelineTables]] = {}
        self._lock = threading.Lock()
        self._ones = np.ones(len(spec.outputs))  # default weights, phi and dt_ref

    # -- public ------------------------------------------------------------------------------
    def simulate(self, timeline: Timeline, theta, *, x0_est=None, sens: bool = False,
                 tol: Tolerances = Tolerances()) -> SimResult:
        """Outputs at observation times for each parameter set (rows of ``theta``): the same
        result as :func:`graybox.simulate.reference.simulate`."""
        theta, x0_est = self._check(timeline, theta, x0_est, tol)
        tab = self.tables(timeline)
        n_sets = theta.shape[0]
        n_c = n_columns(self.funcs, timeline) if sens else 0
        out_y = np.full((n_sets, tab.n_cols), np.nan)
        out_s = np.full((n_sets, tab.n_cols, n_c), np.nan) if sens else np.zeros((0, 0, 0))
        run = self._run(timeline, tab, theta, x0_est, sens, tol, MODE_STORE, out_y, out_s, None, None, None, None)
        ok = run.ok  # (the kernel fails a set at a non-finite output: all outputs are compared ones)
        out_y[~ok] = np.nan
        outputs = {o: out_y[:, tab.offsets[o]:tab.offsets[o] + tab.sizes[o]] for o in self.spec.output_names}
        sens_out = None
        if sens:
            out_s[~ok] = np.nan
            sens_out = {o: out_s[:, tab.offsets[o]:tab.offsets[o] + tab.sizes[o]] for o in self.spec.output_names}
        return SimResult(outputs, sens_out, ok, run.methods, int(run.steps.sum()), run.messages)

    def sse(self, timeline: Timeline, theta, weights: Mapping[str, float] | None = None, *, x0_est=None,
            tol: Tolerances = Tolerances()) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Per set and output the weighted sum of squared residuals (observed - simulated)
        over the compared observations (``timeline.used``), without storing trajectories.

        Returns ``sse`` (n_sets, n_outputs; NaN for a set that failed), ``n_used``
        (n_outputs,) and ``ok`` (n_sets,)."""
        theta, x0_est = self._check(timeline, theta, x0_est, tol)
        w = self._weights(weights)
        tab = self.tables(timeline)
        sse = np.zeros((theta.shape[0], len(self.spec.outputs)))
        run = self._run(timeline, tab, theta, x0_est, False, tol, MODE_SSE, None, None, w, sse, None, None)
        sse[~run.ok] = np.nan
        return sse, self._n_used(timeline), run.ok

    def innovation_sse(self, timeline: Timeline, theta, phi, weights: Mapping[str, float] | None = None, *,
                       dt_ref=None, x0_est=None, tol: Tolerances = Tolerances()
                       ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Sums of squared AR(1) innovations of the residuals r_j (observed - simulated):
        per set and output, the weighted sum over consecutive compared observations of one
        segment of ``(r_j - phi_eff * r_{j-1})**2`` with ``phi_eff = phi**(dt / dt_ref)``
        (dt the time between the two observations).

        ``phi``: per output, in [0, 1) (a mapping by output name or a sequence in output
        order); ``dt_ref``: per output, the time step ``phi`` refers to (default: the median
        interval between the output's compared observations).  Returns ``(sse, ssa, n_pairs,
        ok)``: the plain weighted SSE (as :meth:`sse`), the innovation sums (both
        (n_sets, n_outputs), NaN for a failed set), the number of pairs per output and ok."""
        theta, x0_est = self._check(timeline, theta, x0_est, tol)
        names = self.spec.output_names
        phi_v = self._per_output(phi, "phi")
        if np.any(~np.isfinite(phi_v)) or np.any(phi_v < 0.0) or np.any(phi_v >= 1.0):
            raise ValueError("phi must be in [0, 1) for every output")
        dt_v = self._default_dt_ref(timeline) if dt_ref is None else self._per_output(dt_ref, "dt_ref")
        if np.any(~(dt_v > 0.0)) or np.any(~np.isfinite(dt_v)):
            raise ValueError("dt_ref must be positive and finite for every output")
        w = self._weights(weights)
        tab = self.tables(timeline)
        sse = np.zeros((theta.shape[0], len(names)))
        ssa = np.zeros_like(sse)
        run = self._run(timeline, tab, theta, x0_est, False, tol, MODE_SSE, None, None, w, sse,
                        (phi_v, dt_v), ssa)
        sse[~run.ok] = np.nan
        ssa[~run.ok] = np.nan
        n_pairs = np.array([sum(max(len(seg.obs_knot[o]) - 1, 0) for seg in timeline.segments) for o in names])
        return sse, ssa, n_pairs, run.ok

    def tables(self, timeline: Timeline) -> TimelineTables:
        """The kernel's flat tables of ``timeline`` (built once per timeline)."""
        key = id(timeline)
        with self._lock:
            hit = self._tables.get(key)
            if hit is not None and hit[0]() is timeline:
                return hit[1]
        tab = timeline_tables(self.spec, timeline)
        with self._lock:
            if len(self._tables) > 32:
                self._tables = {k: v for k, v in self._tables.items() if v[0]() is not None}
            self._tables[key] = (weakref.ref(timeline), tab)
        return tab

    # -- internals ---------------------------------------------------------------------------
    def _check(self, timeline: Timeline, theta, x0_est, tol: Tolerances):
        if tol.method not in METHODS:
            raise ValueError(f"method must be one of {METHODS}")
        theta = _own(np.atleast_2d(np.asarray(theta, dtype=float)), float)
        if theta.ndim != 2 or theta.shape[1] != len(self.spec.parameters):
            raise ValueError(f"theta must have {len(self.spec.parameters)} columns (one per parameter)")
        n_est = len(timeline.estimated_states)
        if n_est and x0_est is None:
            raise ValueError("estimated initial states need x0_est")
        if x0_est is not None:
            x0_est = np.asarray(x0_est, float).reshape(theta.shape[0], len(timeline.segments), n_est)
        return theta, x0_est

    def _weights(self, weights: Mapping[str, float] | None) -> np.ndarray:
        if weights is None:
            return np.ones(len(self.spec.outputs))
        unknown = set(weights) - set(self.spec.output_names)
        if unknown:
            raise ValueError(f"weights for unknown output(s): {', '.join(sorted(unknown))}")
        return np.array([float(weights.get(o, 1.0)) for o in self.spec.output_names])

    def _per_output(self, value, what: str) -> np.ndarray:
        names = self.spec.output_names
        if isinstance(value, Mapping):
            missing = [o for o in names if o not in value]
            if missing:
                raise ValueError(f"{what} missing for output(s): {', '.join(missing)}")
            return np.array([float(value[o]) for o in names])
        arr = np.broadcast_to(np.asarray(value, float), (len(names),)).copy()
        return arr

    def _default_dt_ref(self, timeline: Timeline) -> np.ndarray:
        out = []
        for o in self.spec.output_names:
            gaps = [np.diff(seg.t[np.sort(seg.obs_knot[o])]) for seg in timeline.segments]
            gaps = np.concatenate(gaps) if gaps else np.zeros(0)
            out.append(float(np.median(gaps)) if gaps.size else 1.0)
        return np.array(out)

    def _n_used(self, timeline: Timeline) -> np.ndarray:
        return self.tables(timeline).n_used.copy()

    def _start(self, b: Batch, seg: SegmentPlan, st: SegmentTable, timeline: Timeline, x0_est, sens: bool,
               tol: Tolerances):
        """Initial states (the reference's routine, numpy) and the segment's method."""
        if self.spec.is_static:
            n_sets = b.n_sets
            return (np.zeros((n_sets, 0)), np.zeros((n_sets, 0, b.n_c)), np.ones(n_sets, bool), "static")
        with np.errstate(all="ignore"):
            x0, S0, ok0 = initial_states(b, self.funcs, seg, timeline, x0_est, sens)
            method = choose_method(b, x0, seg, st.h_typ, tol)
        S0 = np.zeros((b.n_sets, b.n_x, 0)) if S0 is None else np.ascontiguousarray(np.moveaxis(S0, -1, 0))
        return np.ascontiguousarray(x0.T), S0, ok0, method

    def _run(self, timeline, tab, theta, x0_est, sens, tol, mode, out_y, out_s, w, sse, ar, ssa) -> _Run:
        n_sets = theta.shape[0]
        n_c = n_columns(self.funcs, timeline) if sens else 0
        b = Batch(self.funcs, theta.T.copy(), n_c)
        run = _Run(np.ones(n_sets, bool), np.zeros(n_sets, np.int64), [], [])
        empty2, empty3, ones = _EMPTY2, _EMPTY3, self._ones  # read-only in the kernels
        w = ones if w is None else w
        sse = empty2 if sse is None else sse
        ssa = empty2 if ssa is None else ssa
        phi, dt_ref = (ones, ones) if ar is None else ar
        out_y = empty2 if out_y is None else out_y
        out_s = empty3 if out_s is None else out_s
        any_linear = bool(tab.lin.any())
        for seg, st in zip(timeline.segments, tab.segments):
            x0, S0, ok0, method = self._start(b, seg, st, timeline, x0_est, sens, tol)
            if not ok0.all():
                run.messages.append(f"segment {seg.index + 1}: no steady state found for {int((~ok0).sum())} set(s)")
            run.ok &= ok0
            run.methods.append(method)
            args = (float(tol.rtol), float(tol.atol), st.knot_ptr, st.obs_r, st.obs_col, mode, out_y, out_s,
                    tab.y_obs, w, ar is not None, phi, dt_ref, sse, ssa)
            retry = np.zeros(n_sets, bool)
            kernel = self.kernel_for(method, sens, any_linear)
            self._invoke(kernel, st.t, st.u, tab.lin, theta, x0, S0, run.ok, run.steps, retry, bool(sens), *args)
            if retry.any():  # sets the fast path handed back: the general explicit path
                again = retry.copy()
                self._invoke("run_dopri", st.t, st.u, tab.lin, theta, x0, S0, again, run.steps, retry, bool(sens),
                             *args)
                run.ok[retry] = again[retry]
        return run

    def kernel_for(self, method: str, sens: bool, any_linear: bool) -> str:
        """The name of the entry kernel for a segment: the scalar fast path when it applies."""
        if method == IMPLICIT:
            return "run_rodas"
        if self.fast_path and method == EXPLICIT and not sens and not any_linear and not self.spec.is_static:
            return "run_fast"
        return "run_dopri"

    def _invoke(self, name: str, *args) -> None:
        """Call an entry kernel.  Its first call in this process (which compiles it, or loads
        it from numba's cache) holds a lock file beside the module, so that processes starting
        the same model together compile it once."""
        kernel = getattr(self.module, name)
        warm = _WARM.setdefault(self.module.__name__, set())
        if name in warm:
            kernel(*args)
            return
        from graybox.simulate.cache import exclusive

        with exclusive(Path(self.module.__file__).with_suffix(f".{name}.lock")):
            kernel(*args)
        warm.add(name)


# ---------------------------------------------------------------------------------------------
# Entry points


def compiled_available(spec: ModelSpec) -> bool:
    """True when the compiled core can run ``spec`` (trees, not a Python right-hand side, and
    numba importable)."""
    if spec.python_rhs is not None:
        return False
    try:
        import numba  # noqa: F401
    except ImportError:
        return False
    return True


@lru_cache(maxsize=64)
def _module_for(digest: str, source: str) -> ModuleType:
    from graybox.simulate.cache import load_generated

    return load_generated(digest, source)


@lru_cache(maxsize=64)
def _compile_cached(spec: ModelSpec, fast_path: bool) -> CompiledModel:
    return CompiledModel(spec, _module_for(spec_digest(spec), module_source(spec)), fast_path)


def compile_model(spec: ModelSpec, *, fast_path: bool = True) -> CompiledModel:
    """The compiled simulator of ``spec`` (cached in-process per spec, on disk per model).

    ``fast_path=False`` sends explicit runs without sensitivities through the general kernel,
    whose arithmetic is in the reference's order of operations (bit-for-bit the same step
    decisions as a one-set reference run); the default scalar fast path differs from it by
    rounding only (a reciprocal instead of a division, reassociated stage sums)."""
    if not compiled_available(spec):
        raise ValueError(PYTHON_RHS_NOTE if spec.python_rhs is not None else "numba is not available")
    return _compile_cached(spec, bool(fast_path))


def simulate_auto(spec: ModelSpec, timeline: Timeline, theta, **kw) -> SimResult:
    """Simulate with the compiled core when available, else with the numpy reference (a
    Python right-hand side: with central-difference sensitivities, and a note in
    ``messages``).  Keywords: ``x0_est``, ``sens``, ``tol``."""
    if compiled_available(spec):
        return compile_model(spec).simulate(timeline, theta, **kw)
    from graybox.simulate import finite_difference_sensitivities
    from graybox.simulate.reference import simulate as simulate_reference

    funcs = generate(spec)
    tol = kw.get("tol", Tolerances())
    if kw.get("sens") and spec.python_rhs is not None:
        res = finite_difference_sensitivities(funcs, timeline, theta, kw.get("x0_est"), tol)
    else:
        res = simulate_reference(funcs, timeline, theta, **kw)
    res.messages.append(PYTHON_RHS_NOTE if spec.python_rhs is not None else "compiled core unavailable: reference path used")
    return res


__all__ = ["CompiledModel", "compile_model", "compiled_available", "simulate_auto", "module_source",
           "KernelEmitter", "timeline_tables"]
