"""Batched one-step integrators with error control (the readable numpy reference).

Two methods, both with an embedded error estimate and the usual step-size controller:

* ``explicit``: Dormand and Prince's 5(4) Runge-Kutta pair (Dormand & Prince 1980, the
  coefficients also used by scipy's RK45);
* ``implicit``: Rodas4, an L-stable, stiffly accurate Rosenbrock method of order 4 with an
  embedded order-3 solution (Hairer & Wanner, *Solving Ordinary Differential Equations II*,
  2nd ed., 1996, Sect. IV.7; coefficients as published with their RODAS code).  It needs the
  exact Jacobian, which the model's symbolic derivatives provide.

The state of a batch is ``x`` with shape ``(n_x, n_sets)``; with forward sensitivities also
``S`` with shape ``(n_x, n_c, n_sets)`` (columns: parameters, then estimated initial states),
integrated together with ``x`` (dS/dt = f_x S + f_p).  For the implicit method the
sensitivity block of the augmented Jacobian is block lower triangular, so one factorisation
of ``I/(h*gamma) - f_x`` per step serves the states and every sensitivity column.

One step size is shared by the whole batch (the largest error decides), which keeps every
array operation vectorised over parameter sets.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

# Dormand-Prince 5(4)
DP_C = np.array([0.0, 1 / 5, 3 / 10, 4 / 5, 8 / 9, 1.0])
DP_A = [
    [],
    [1 / 5],
    [3 / 40, 9 / 40],
    [44 / 45, -56 / 15, 32 / 9],
    [19372 / 6561, -25360 / 2187, 64448 / 6561, -212 / 729],
    [9017 / 3168, -355 / 33, 46732 / 5247, 49 / 176, -5103 / 18656],
]
DP_B = np.array([35 / 384, 0.0, 500 / 1113, 125 / 192, -2187 / 6784, 11 / 84])
# error = difference of the 5th and 4th order solutions; the 7th stage (FSAL) enters with -1/40
DP_E = np.array([71 / 57600, 0.0, -71 / 16695, 71 / 1920, -17253 / 339200, 22 / 525, -1 / 40])

# Rodas4 (Hairer & Wanner)
R4_GAMMA = 0.25
R4_A = [
    [],
    [1.544000000000000],
    [0.9466785280815826, 0.2557011698983284],
    [3.314825187068521, 2.896124015972201, 0.9986419139977817],
    [1.221224509226641, 6.019134481288629, 12.53708332932087, -0.6878860361058950],
]
R4_C = [
    [],
    [-5.668800000000000],
    [-2.430093356833875, -0.2063599157091915],
    [-0.1073529058151375, -9.594562251023355, -20.47028614809616],
    [7.496443313967647, -10.24680431464352, -33.99990352819905, 11.70890893206160],
    [8.083246795921522, -7.981132988064893, -31.52159432874371, 16.31930543123136, -6.058818238834054],
]
R4_CT = [0.0, 0.386, 0.21, 0.63, 1.0, 1.0]
R4_D = [0.25, -0.1043, 0.1035, -0.0362, 0.0, 0.0]

EXPLICIT = "explicit"
IMPLICIT = "implicit"
AUTO = "auto"
METHODS = (AUTO, EXPLICIT, IMPLICIT)

# Rules both engines apply (the compiled core's generated kernels take these same values).
#: Stability boundary of the explicit pair on the negative real axis is about 3.3; beyond
#: this many fastest-time-constants per interval the implicit method is chosen.
STIFF_RATIO = 3.0
#: Attempted steps allowed in one knot interval before the parameter set is failed.
MAX_STEPS_PER_INTERVAL = 100_000


@dataclass
class Interval:
    """Inputs on one interval: ``u(t0 + s) = u0 + slope * s``."""

    u0: np.ndarray
    slope: np.ndarray
    linear: bool

    def at(self, s: float) -> np.ndarray:
        """The inputs ``s`` seconds into the interval (``u0`` for held inputs), shape (n_u,)."""
        return self.u0 + self.slope * s if self.linear else self.u0


class Batch:
    """Evaluates the generated functions on a batch of parameter sets, allocating a zeroed
    ``out`` per call (trailing axis: the set).  ``funcs`` is a
    :class:`graybox.simulate.generate.ModelFunctions`, ``p`` the parameters (n_p, n_sets) in
    the spec's order, ``n_c`` the number of sensitivity columns."""

    def __init__(self, funcs, p: np.ndarray, n_c: int):
        self.F = funcs
        self.p = p  # (n_p, n_sets)
        self.n_sets = p.shape[1]
        self.n_c = n_c
        self.n_x, self.n_p, self.n_u = funcs.n_x, funcs.n_p, funcs.n_u

    def _call(self, name, x, u, shape):
        out = np.zeros((*shape, self.n_sets))
        self.F.fns[name](x, u, self.p, out)
        return out

    def f(self, x, u):
        """State rates f(x, u, p) per second, shape (n_x, n_sets), for states ``x`` (n_x, n_sets)
        and inputs ``u`` (n_u,)."""
        return self._call("f", x, u, (self.n_x,))

    def fx(self, x, u):
        """Jacobian d f_i / d x_j, shape (n_x, n_x, n_sets) (exact for trees; central differences
        for a Python right-hand side)."""
        return self._call("fx", x, u, (self.n_x, self.n_x))

    def sens_rhs(self, x, S, u, fx=None):
        """dS/dt = f_x S + [f_p, 0]."""
        fx = self.fx(x, u) if fx is None else fx
        out = np.einsum("ijs,jcs->ics", fx, S)
        if self.n_p:
            out[:, : self.n_p] += self._call("fp", x, u, (self.n_x, self.n_p))
        return out

    def sens_jac_x(self, x, S, u):
        """B[i, c, l] = d(f_x S + f_p)[i, c] / d x_l."""
        fxx = self._call("fxx", x, u, (self.n_x, self.n_x, self.n_x))
        B = np.einsum("ijls,jcs->icls", fxx, S)
        if self.n_p:
            B[:, : self.n_p] += self._call("fpx", x, u, (self.n_x, self.n_p, self.n_x))
        return B

    def time_derivs(self, x, S, u, slope):
        """df/dt and dS'/dt through linearly interpolated inputs."""
        fu = self._call("fu", x, u, (self.n_x, self.n_u))
        ft = np.einsum("ims,m->is", fu, slope)
        if S is None:
            return ft, None
        fxu = self._call("fxu", x, u, (self.n_x, self.n_x, self.n_u))
        st = np.einsum("ijms,m,jcs->ics", fxu, slope, S)
        if self.n_p:
            fpu = self._call("fpu", x, u, (self.n_x, self.n_p, self.n_u))
            st[:, : self.n_p] += np.einsum("ikms,m->iks", fpu, slope)
        return ft, st


def error_norm(err: np.ndarray, x_old: np.ndarray, x_new: np.ndarray, rtol: float, atol: float) -> np.ndarray:
    """RMS of the scaled error per parameter set (shape (n_sets,))."""
    scale = atol + rtol * np.maximum(np.abs(x_old), np.abs(x_new))
    return np.sqrt(np.mean((err / scale) ** 2, axis=0))


def dopri_step(b: Batch, x, S, iv: Interval, h: float):
    """One Dormand-Prince step; returns x_new, S_new, error estimate of x."""
    ks, kS = [], []
    for i in range(6):
        xi = x + h * sum(a * k for a, k in zip(DP_A[i], ks)) if i else x
        ui = iv.at(DP_C[i] * h)
        ks.append(b.f(xi, ui))
        if S is not None:
            Si = S + h * sum(a * k for a, k in zip(DP_A[i], kS)) if i else S
            kS.append(b.sens_rhs(xi, Si, ui))
    x_new = x + h * sum(w * k for w, k in zip(DP_B, ks))
    S_new = None if S is None else S + h * sum(w * k for w, k in zip(DP_B, kS))
    k7 = b.f(x_new, iv.at(h))
    err = h * (sum(e * k for e, k in zip(DP_E[:6], ks)) + DP_E[6] * k7)
    return x_new, S_new, err


def _inverse(E: np.ndarray) -> np.ndarray:
    """Batched inverse of (n, n, n_sets) matrices, returned as (n, n, n_sets)."""
    if E.shape[0] == 1:
        return 1.0 / E
    return np.moveaxis(np.linalg.inv(np.moveaxis(E, -1, 0)), 0, -1)


def rodas_step(b: Batch, x, S, iv: Interval, h: float):
    """One Rodas4 step; returns x_new, S_new, error estimate of x."""
    n_x = b.n_x
    u0 = iv.at(0.0)
    J = b.fx(x, u0)
    E = -J
    idx = np.arange(n_x)
    E[idx, idx] += 1.0 / (h * R4_GAMMA)
    Einv = _inverse(E)
    B = b.sens_jac_x(x, S, u0) if S is not None else None
    ft = St = None
    if iv.linear:
        ft, St = b.time_derivs(x, S, u0, iv.slope)
    ks, kS = [], []
    xi, Si = x, S
    for i in range(6):
        if i == 0:
            xi, Si = x, S
        elif i < 5:
            xi = x + sum(a * k for a, k in zip(R4_A[i], ks))
            if S is not None:
                Si = S + sum(a * k for a, k in zip(R4_A[i], kS))
        else:  # stage 6 starts from the stage-5 solution plus k5 (stiffly accurate)
            xi = xi + ks[4]
            if S is not None:
                Si = Si + kS[4]
        ui = iv.at(R4_CT[i] * h)
        r = b.f(xi, ui)
        if i:
            r = r + sum(c * k for c, k in zip(R4_C[i], ks)) / h
        if ft is not None and R4_D[i]:
            r = r + (h * R4_D[i]) * ft
        k = np.einsum("ijs,js->is", Einv, r)
        ks.append(k)
        if S is not None:
            rS = b.sens_rhs(xi, Si, ui)
            if i:
                rS = rS + sum(c * kk for c, kk in zip(R4_C[i], kS)) / h
            if St is not None and R4_D[i]:
                rS = rS + (h * R4_D[i]) * St
            rS = rS + np.einsum("icls,ls->ics", B, k)
            kS.append(np.einsum("ijs,jcs->ics", Einv, rS))
    x_new = xi + ks[5]
    S_new = None if S is None else Si + kS[5]
    return x_new, S_new, ks[5]


STEPPERS = {EXPLICIT: (dopri_step, 5.0), IMPLICIT: (rodas_step, 4.0)}


def spectral_radius(b: Batch, x: np.ndarray, u: np.ndarray) -> float:
    """Largest |eigenvalue| of f_x over the batch (1/s): the fastest time scale."""
    J = b.fx(x, u)
    if not np.all(np.isfinite(J)):
        return np.inf
    eig = np.linalg.eigvals(np.moveaxis(J, -1, 0))
    return float(np.max(np.abs(eig))) if eig.size else 0.0
