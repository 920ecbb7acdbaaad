"""Both engines against closed-form solutions, at the production tolerance (rtol 1e-8).

Sources (analytic solutions of linear and separable ODEs, standard calculus):
* first-order lag dy/dt = (K u - y)/tau under a held input: on each interval
  y(t) = K u + (y0 - K u) exp(-(t - t0)/tau); its derivatives with respect to K, tau and y0
  are differentiated by hand;
* first-order decay dy/dt = -y/tau: y = y0 exp(-t/tau);
* Torricelli's law for a tank drained through an orifice, dh/dt = -c sqrt(h):
  sqrt(h) = sqrt(h0) - c t / 2, so h(t) = (sqrt(h0) - c t/2)^2 until the tank is empty at
  t = 2 sqrt(h0)/c.
The check is |graybox - exact| <= 1e-6 * max|y| at every compared observation.
"""

from __future__ import annotations

import numpy as np
import pytest

from graybox.data.record import record_from_arrays
from graybox.simulate import Tolerances, generate, plan, simulate_reference
from graybox.simulate.compiled import compile_model

from . import conftest as M

ACCURACY = 1e-6


def runs(spec, tl, theta, x0_est=None, sens=False):
    yield "compiled", compile_model(spec).simulate(tl, theta, x0_est=x0_est, sens=sens)
    yield "compiled general path", compile_model(spec, fast_path=False).simulate(tl, theta, x0_est=x0_est, sens=sens)
    yield "reference", simulate_reference(generate(spec), tl, theta, x0_est=x0_est, sens=sens)


def assert_close(label, got, exact):
    scale = np.max(np.abs(exact))
    err = np.max(np.abs(got - exact))
    assert err <= ACCURACY * scale, f"{label}: error {err:.3g} > {ACCURACY} * {scale:.3g}"


@pytest.mark.parametrize("tau", [5.0, 0.5])
def test_lag_step_response(tau):
    """Unit step at t = 0 from rest: y = K (1 - exp(-t/tau)), dy/dK = 1 - exp(-t/tau),
    dy/dtau = -K t exp(-t/tau) / tau^2, dy/dy0 = exp(-t/tau); 1 s samples, tau = 5 s and
    tau = half the sample period."""
    t = np.arange(0.0, 40.0, 1.0)
    K = 2.0
    rec = record_from_arrays("step", t, {"u": np.ones_like(t)}, {"y": np.zeros_like(t)})
    spec = M.lag_spec("estimate")
    tl = plan(spec, rec)
    e = np.exp(-t / tau)
    exact = K * (1.0 - e)
    d_exact = np.column_stack([1.0 - e, -K * t * e / tau ** 2, e])
    for label, res in runs(spec, tl, np.array([[K, tau]]), np.array([[0.0]]), sens=True):
        assert_close(label, res.outputs["y"][0], exact)
        for j in range(3):
            assert_close(f"{label} sensitivity {j}", res.sens["y"][0, :, j], d_exact[:, j])
    for label, res in runs(spec, tl, np.array([[K, tau]]), np.array([[0.0]])):
        assert_close(label, res.outputs["y"][0], exact)


def test_lag_held_steps():
    """Piecewise-constant input: the interval-by-interval closed form."""
    rec = M.lag_record(n=201)
    spec = M.lag_spec("0.0")
    tl = plan(spec, rec)
    K, tau = 1.7, 3.0
    u, t = rec.inputs["u"].values, rec.inputs["u"].t
    exact = np.zeros(t.size)
    for k in range(1, t.size):
        exact[k] = K * u[k - 1] + (exact[k - 1] - K * u[k - 1]) * np.exp(-(t[k] - t[k - 1]) / tau)
    for label, res in runs(spec, tl, np.array([[K, tau]])):
        assert_close(label, res.outputs["y"][0], exact)


def test_first_order_decay():
    """dy/dt = -y/tau from y0 = 3 with no input: y = 3 exp(-t/tau), down to 1e-7 of y0."""
    t = np.arange(0.0, 81.0, 0.5)
    tau = 5.0
    rec = record_from_arrays("decay", t, {"u": np.zeros_like(t)}, {"y": np.zeros_like(t)})
    spec = M.lag_spec("3.0")
    tl = plan(spec, rec)
    for label, res in runs(spec, tl, np.array([[1.0, tau]])):
        assert_close(label, res.outputs["y"][0], 3.0 * np.exp(-t / tau))


def test_torricelli_tank_drains_to_near_empty():
    """h(t) = (sqrt(h0) - c t/2)^2 from h0 = 1 with c = 0.05 1/s (empty at 40 s), sampled
    every 0.5 s up to 39.5 s, where h is 1.6e-4 of h0."""
    c, h0 = 0.05, 1.0
    t = np.arange(0.0, 40.0, 0.5)
    rec = record_from_arrays("drain", t, {"q_in": np.zeros_like(t)}, {"h": np.zeros_like(t)})
    spec = M.tank_spec()
    tl = plan(spec, rec)
    exact = (np.sqrt(h0) - c * t / 2.0) ** 2
    assert exact[-1] < 2e-4 * h0
    for label, res in runs(spec, tl, np.array([[c]]), np.array([[h0]])):
        assert res.methods == ["explicit"]
        assert_close(label, res.outputs["h"][0], exact)
