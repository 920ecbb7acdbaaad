"""Generated code for the general paths and the entry kernels: arrays over states and
sensitivity columns, held or linear inputs, Dormand-Prince 5(4) and Rodas4.

:func:`generic_source` writes ``dopri_set`` or ``rodas_set`` (one parameter set; the step
body inline, so no call with array arguments per step): the reference's arithmetic in the
reference's order of operations, forward sensitivities through the block-triangular
augmented system, and for Rodas4 the exact Jacobian with a small dense LU with partial
pivoting.  :data:`HELPERS_SOURCE` holds the small jitted helpers they call and
:func:`run_source` the three entry kernels (``run_fast``, ``run_dopri``, ``run_rodas``) that
loop over the parameter sets of a batch.
"""

from __future__ import annotations

from graybox.simulate.integrators import EXPLICIT
from graybox.simulate.kernel_emit import JIT_NO_ALLOC, accumulate_lines, indent, step_control_lines


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
        *indent(_sens_rhs_lines("x", "S", "ui", "KS[0, {i}, {c}]"), 3),
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
        *indent(_sens_rhs_lines("xi", "Si", "ui", "KS[st, {i}, {c}]"), 2),
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
        *indent(_lu_solve_lines("K[st, {i}]"), 1),
        "    if sens:",
        *indent(_sens_rhs_lines("xi", "Si", "ui", "KS[st, {i}, {c}]"), 2),
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
        *indent(_lu_solve_lines("KS[st, {i}, cc]"), 3),
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
        *indent(accumulate_lines("res", "r", "t[k]"), 2),
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
        *step_control_lines(accept, "5.0" if explicit else "4.0"),
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
        *indent(_generic_observe_lines(), 3),
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
        *indent(step, 3),
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
