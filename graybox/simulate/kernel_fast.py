"""Generated code for the fast path: Dormand-Prince 5(4) for one parameter set with held
inputs and no sensitivities, every quantity a scalar local.

:func:`fast_explicit_source` writes ``explicit_set``: the rates written out once per stage,
sub-expressions free of states computed once per set (parameters only) or once per interval
(inputs), a division by a parameter-only quantity turned into a product with its reciprocal
(:func:`reciprocal_rewrite`), affine rates as ``c0 + C x`` with the coefficients hoisted
(:func:`affine_sum`).  Same method, controller and failure rules as the reference; the
results differ from it by rounding only.
"""

from __future__ import annotations

import math

from graybox.model.codegen import literal
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
from graybox.simulate.integrators import DP_A, DP_B, DP_E
from graybox.simulate.kernel_emit import (
    JIT_NO_ALLOC,
    KernelEmitter,
    accumulate_lines,
    indent,
    step_control_lines,
)


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
        hs = scaled(f"a{st}_", DP_A[st])
        yv = [f"y{st}_{i}" for i in range(nx)]
        body += [f"{yv[i]} = {combo(f'x_{i}', hs, i)}" for i in range(nx)]
        body += stage(str(st + 1), yv, f"k{st + 1}_")
    hb = scaled("b", DP_B)
    body += [f"xn_{i} = {combo(f'x_{i}', hb, i)}" for i in range(nx)]
    body += stage("7", [f"xn_{i}" for i in range(nx)], "k7_")
    he = scaled("e", DP_E)
    body += [f"err_{i} = {combo(None, he, i)}" for i in range(nx)]
    body.append("acc = 0.0")
    for i in range(nx):
        body.append(f"q = err_{i} / (atol + rtol * np.maximum(abs(x_{i}), abs(xn_{i})))")
        body.append("acc += q * q")
    body.append(f"en = np.sqrt(acc / {nx})")
    body.append("finite = np.isfinite(en)" + "".join(f" and np.isfinite(xn_{i})" for i in range(nx)))
    accept = [f"x_{i} = xn_{i}" for i in range(nx)] + [f"k1_{i} = k7_{i}" for i in range(nx)]
    body += step_control_lines(accept, "5.0")

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
        *indent("\n".join(pick).split("\n"), 1),
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
        *indent(accumulate_lines("res", "r", "t[k]"), 2),
    ]

    lines = [
        f"@njit({JIT_NO_ALLOC})",
        "def explicit_set(iset, t, u, p, x0, rtol, atol, knot_ptr, obs_r, obs_col, mode, out_y, y_obs, w,",
        "                 ar, phi, dt_ref, sse, ssa, prev_r, prev_t, has_prev):",
        '    """One parameter set, explicit method, held inputs, no sensitivities."""',
        *[f"    p_{k} = p[{k}]" for k in range(len(ps))],
        *indent(set_em.lines, 1),
        *indent(rcp_lines, 1),
        *[f"    x_{i} = x0[{i}]" for i in range(nx)],
        *[f"    k1_{i} = 0.0" for i in range(nx)],
        "    n_k = t.shape[0]",
        "    good = True",
        "    n_acc = 0",
        "    h = -1.0",
        "    k = 0",
        "    while True:",
        "        if knot_ptr[k + 1] > knot_ptr[k]:",
        *indent(observe, 3),
        "            if not good:",
        "                break",
        "        if k == n_k - 1:",
        "            break",
        "        span = t[k + 1] - t[k]",
        *[f"        u_{m} = u[k, {m}]" for m in range(len(us_))],
        *indent(int_em.lines, 2),
        "        h = span if h < 0.0 else min(h, span)",
        "        hmin = 1e-12 * max(span, 1.0)",
        "        s = 0.0",
        "        steps_here = 0",
        *indent(stage("1", x, "k1_"), 2),
        "        while s < span:",
        "            h = min(h, span - s)",
        *indent(coef_lines, 3),
        *indent(body, 3),
        "        if not good:",
        "            break",
        "        k += 1",
        "    return good, n_acc",
    ]
    return "\n".join(lines) + "\n"
