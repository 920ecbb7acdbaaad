"""The window finder: three step tests planted in 60 days of steady data rank at the top.

The model is a first-order lag y' = (K u - y)/tau with K = 2, tau = 2 h, input held between
samples.  Its output sensitivities are derived by hand: over an interval of length h with
the input held at u and a = exp(-h/tau),

    y1     = K u + (y0 - K u) a
    s_K1   = u (1 - a) + s_K0 a                    (d y1 / d K)
    s_tau1 = s_tau0 a + (y0 - K u) a h / tau^2     (d y1 / d tau)

and checked against scipy's solve_ivp integrating the sensitivity equations
s_K' = (u - s_K)/tau, s_tau' = -(K u - y)/tau^2 - s_tau/tau (the reference).  The
sensitivities use the inputs and the guesses only, never the measured outputs.
"""

from datetime import timedelta

import numpy as np
import pandas as pd
import pytest
from scipy.integrate import solve_ivp

from graybox.data import (InputSeries, OutputSeries, Record, rank_windows, windows_to_frame, write_windows)
from graybox.data.windows import log_det_information

K, TAU = 2.0, 7200.0
DAY = 86400.0
STEPS = [12.3 * DAY, 31.6 * DAY, 47.1 * DAY]  # step tests: u 1.0 -> 1.5 for 8 h
T0 = pd.Timestamp("2026-05-01T00:00Z").to_pydatetime()


def first_order_sensitivities(record: Record, k: float = K, tau: float = TAU):
    """dy/dK and dy/dtau at every observation of y, from the held input alone (exact)."""
    u_series = record.inputs["u"]
    y_obs = record.outputs["y"]
    knots = np.unique(np.concatenate([u_series.t, y_obs.t]))
    u = u_series.at(knots)
    y, sk, st = k * u[0], u[0], 0.0  # steady start at the first input
    out = np.empty((knots.size, 2))
    out[0] = sk, st
    for i in range(1, knots.size):
        h, ui = knots[i] - knots[i - 1], u[i - 1]
        a = np.exp(-h / tau)
        sk, st, y = ui * (1 - a) + sk * a, st * a + (y - k * ui) * a * h / tau**2, k * ui + (y - k * ui) * a
        out[i] = sk, st
    return {"y": out[np.searchsorted(knots, y_obs.t)]}


def scenario(seed=3):
    rng = np.random.default_rng(seed)
    t = np.arange(0.0, 60 * DAY, 600.0)
    u = 1.0 + rng.normal(0, 0.002, t.size)
    for s in STEPS:
        u[(t >= s) & (t < s + 8 * 3600)] += 0.5
    rec = Record("plant", T0, {"u": InputSeries("u", t, u, units="kg/s")},
                 {"y": OutputSeries("y", t, np.zeros(t.size), units="K")})
    return rec


@pytest.mark.reference
def test_hand_sensitivities_match_scipy_sensitivity_equations():
    """Closed-form recursion vs solve_ivp of the augmented system over one step test."""
    t = np.arange(0.0, 12 * 3600.0, 600.0)
    u = np.where((t >= 3600) & (t < 5 * 3600), 1.5, 1.0)
    rec = Record("r", T0, {"u": InputSeries("u", t, u)}, {"y": OutputSeries("y", t, np.zeros(t.size))})
    got = first_order_sensitivities(rec)["y"]

    def rhs(tt, z):
        uu = 1.5 if 3600 <= tt < 5 * 3600 else 1.0
        y, sk, st = z
        return [(K * uu - y) / TAU, (uu - sk) / TAU, -(K * uu - y) / TAU**2 - st / TAU]

    ref = np.empty_like(got)
    z = np.array([K * 1.0, 1.0, 0.0])
    ref[0] = z[1:]
    for i in range(1, t.size):
        sol = solve_ivp(rhs, (t[i - 1], t[i]), z, rtol=1e-11, atol=1e-13, method="DOP853")
        z = sol.y[:, -1]
        ref[i] = z[1:]
    np.testing.assert_allclose(got, ref, rtol=1e-7, atol=1e-9)


def test_three_step_tests_rank_at_the_top(tmp_path):
    rec = scenario()
    scores = rank_windows(rec, first_order_sensitivities, window=DAY, step=DAY / 4, top=5)
    top3 = scores[:3]
    for w in top3:
        assert any(w.t_start <= s < w.t_end for s in STEPS), w.describe()
    assert {min(STEPS, key=lambda s: abs(s - w.t_start - DAY / 2)) for w in top3} == set(STEPS)
    # a steady window leaves tau all but undetermined: far below the step windows
    assert scores[3].log_det < top3[-1].log_det - 5
    # the input moves are named: the step up of u inside each window
    for w in top3:
        assert w.moves and w.moves[0].input == "u"
        assert abs(w.moves[0].after - w.moves[0].before) == pytest.approx(0.5, abs=0.02)
        step = next(s for s in STEPS if w.t_start <= s < w.t_end)
        assert abs((w.moves[0].at_utc - (T0 + timedelta(seconds=step))).total_seconds()) <= 8 * 3600 + 600
    assert not scores[3].moves or all(abs(m.after - m.before) < 0.1 for m in scores[3].moves)
    frame = windows_to_frame(scores)
    assert list(frame["rank"]) == [1, 2, 3, 4, 5] and frame["log_det"].is_monotonic_decreasing
    path = write_windows(scores, tmp_path / "run")
    assert pd.read_csv(path)["moves"].iloc[0].startswith("u ")


def test_score_is_the_log_det_of_the_scaled_information():
    """Independent check of one window's score: log det of S^T S / sigma^2 scaled by the whole
    record's information diagonal, plus the documented ridge (numpy.linalg as reference)."""
    rec = scenario()
    sens = first_order_sensitivities(rec)["y"]
    sigma = 0.1
    scores = rank_windows(rec, first_order_sensitivities, window=DAY, step=DAY, top=60, noise={"y": sigma})
    w = scores[0]
    t = rec.outputs["y"].t
    x = sens / sigma
    d = 1 / np.sqrt((x**2).sum(axis=0))
    inside = (t >= w.t_start) & (t < w.t_end)
    xs = x[inside] * d
    expected = np.log(np.linalg.det(xs.T @ xs + 1e-9 * np.eye(2)))
    assert w.log_det == pytest.approx(expected, rel=1e-9)
    assert log_det_information(x[inside], d) == pytest.approx(expected, rel=1e-9)
    assert w.n_obs == inside.sum()


def test_masked_observations_inform_nothing():
    rec = scenario()
    y = rec.outputs["y"]
    mask = np.ones(y.t.size, bool)
    mask[(y.t >= STEPS[0] - DAY) & (y.t < STEPS[0] + DAY)] = False
    rec2 = rec.with_outputs({"y": OutputSeries("y", y.t, y.values, mask)})
    scores = rank_windows(rec2, first_order_sensitivities, window=DAY, step=DAY / 4, top=3)
    assert not any(w.t_start <= STEPS[0] < w.t_end for w in scores[:2])


def test_bad_sensitivity_shape_is_reported():
    from graybox.errors import DataError

    rec = scenario()
    with pytest.raises(DataError, match="shape"):
        rank_windows(rec, lambda r: {"y": np.zeros((3, 2))}, window=DAY)
