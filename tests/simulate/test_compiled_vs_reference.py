"""The compiled core against the numpy reference simulator.

The two are independent implementations of one algorithm (graybox.simulate.integrators:
Dormand & Prince 1980; Rodas4 of Hairer & Wanner 1996): the same coefficients, error norm,
controller and restarts, so a one-set run takes the same steps in both and the results agree
to rounding.  The contract checked here is agreement to 1e-9 relative, outputs and
sensitivities, for every test model, both methods, with and without sensitivities, on the
fast scalar path and on the general path.  (The external references, analytic solutions and
scipy's solve_ivp, are in test_compiled_analytic.py and test_against_solve_ivp.py.)
"""

from __future__ import annotations

import numpy as np
import pytest

from graybox.data.record import Record, Segment
from graybox.simulate import Tolerances, generate, plan, simulate_reference
from graybox.simulate.compiled import compile_model, compiled_available
from graybox.simulate.engine import simulate_auto

from . import conftest as M

RTOL = 1e-9


def _lag_est():
    return M.lag_spec("estimate"), M.lag_record(), np.array([[2.0, 5.0], [1.2, 0.7]]), np.array([[0.7], [-0.4]])


def _lag_linear():
    return M.lag_spec("0.0"), M.lag_record(hold="linear"), np.array([[2.0, 0.5], [1.0, 3.0]]), None


def _lag_measured():
    return M.lag_spec("measured"), M.lag_record(seed=4), np.array([[2.0, 5.0], [0.5, 0.5]]), None


def _tank():
    # (levels stay above zero: at an empty tank the Jacobian of sqrt is infinite, see
    # test_implicit_method_stops_at_an_empty_tank)
    return M.tank_spec(), M.tank_record(), np.array([[0.05], [0.04]]), np.array([[1.0], [0.6]])


def _reactor():
    return (M.reactor_spec(), M.reactor_record(),
            np.array([[1.6e8, 5000.0, 20.0, 10.0, 5.0], [1.0e8, 5000.0, 25.0, 8.0, 6.0]]), None)


def _static():
    return M.static_spec(), M.static_record(), np.array([[1.5, -0.3], [0.2, 0.1]]), None


def _constructs():
    return M.constructs_spec(), M.constructs_record(), np.array([[0.1, 1.0, 0.5], [0.3, 3.0, -0.2]]), \
        np.array([[0.2], [-0.3]])


def _wall():
    return M.wall_spec(), M.wall_record(), np.array([[900.0, 40.0, 2.0e5], [300.0, 80.0, 5.0e4]]), \
        np.array([[330.0], [345.0]])


CASES = {"wall_affine": _wall, "lag_estimated": _lag_est, "lag_linear_hold": _lag_linear, "lag_measured": _lag_measured,
         "tank": _tank, "reactor_steady": _reactor, "static": _static, "constructs": _constructs}


def _one_set(theta, x0, i):
    return theta[i:i + 1], None if x0 is None else x0[i:i + 1]


def _check_against_reference(spec, record, theta, x0, *, sens, method, fast_path):
    tl = plan(spec, record)
    tol = Tolerances(method=method)
    cm = compile_model(spec, fast_path=fast_path)
    for i in range(theta.shape[0]):
        th, xe = _one_set(theta, x0, i)
        got = cm.simulate(tl, th, x0_est=xe, sens=sens, tol=tol)
        ref = simulate_reference(generate(spec), tl, th, x0_est=xe, sens=sens, tol=tol)
        assert got.methods == ref.methods
        assert got.ok.tolist() == ref.ok.tolist() == [True]
        assert got.n_steps == ref.n_steps
        for o in spec.output_names:
            M.assert_agree(got.outputs[o], ref.outputs[o], RTOL, f"output {o}, set {i}")
            if sens:
                M.assert_agree(got.sens[o], ref.sens[o], RTOL, f"sensitivity of {o}, set {i}")
    return cm, tl


@pytest.mark.parametrize("case", sorted(CASES))
@pytest.mark.parametrize("sens", [False, True])
def test_agrees_with_reference(case, sens):
    """Compiled (each set on its own) vs reference, one set at a time, with the method the
    rule picks: 1e-9 relative, outputs and sensitivities."""
    spec, record, theta, x0 = CASES[case]()
    _check_against_reference(spec, record, theta, x0, sens=sens, method="auto", fast_path=True)


# Both methods forced on the non-stiff models.  (Explicit steps forced on the stiff reactor sit
# at the stability limit, where rounding is not damped and the step-size controller is
# chaotic: numpy's vectorised exp differs from the C library's in the last bit for a few
# percent of arguments, and such differences grow there to the size of the tolerance.  That
# case is checked for accuracy against solve_ivp, not for last-digit agreement.)
@pytest.mark.parametrize("case", ["wall_affine", "lag_estimated", "lag_linear_hold", "tank", "constructs"])
@pytest.mark.parametrize("method", ["explicit", "implicit"])
@pytest.mark.parametrize("sens", [False, True])
def test_agrees_with_reference_either_method(case, method, sens):
    """Compiled vs reference with the method forced: 1e-9 relative."""
    spec, record, theta, x0 = CASES[case]()
    _check_against_reference(spec, record, theta, x0, sens=sens, method=method, fast_path=True)


@pytest.mark.parametrize("case", ["wall_affine", "lag_estimated", "tank", "constructs"])
def test_general_path_equals_reference_steps(case):
    """The general explicit kernel (fast path off) also agrees with the reference."""
    spec, record, theta, x0 = CASES[case]()
    _check_against_reference(spec, record, theta, x0, sens=False, method="explicit", fast_path=False)


@pytest.mark.parametrize("case", sorted(CASES))
def test_batch_rows_are_independent(case):
    """Each set has its own step: a batch row equals that set simulated alone, bit for bit."""
    spec, record, theta, x0 = CASES[case]()
    tl = plan(spec, record)
    cm = compile_model(spec)
    for sens in (False, True):
        batch = cm.simulate(tl, theta, x0_est=x0, sens=sens)
        for i in range(theta.shape[0]):
            th, xe = _one_set(theta, x0, i)
            alone = cm.simulate(tl, th, x0_est=xe, sens=sens)
            for o in spec.output_names:
                assert np.array_equal(batch.outputs[o][i], alone.outputs[o][0], equal_nan=True)
                if sens:
                    assert np.array_equal(batch.sens[o][i], alone.sens[o][0], equal_nan=True)


def test_shapes_and_uncompared_observations():
    """Same shapes as the reference; NaN exactly at the observations not compared."""
    spec, record, theta, _ = _lag_measured()
    tl = plan(spec, record)
    got = compile_model(spec).simulate(tl, theta, sens=True)
    n_obs = record.outputs["y"].t.size
    assert got.outputs["y"].shape == (2, n_obs)
    assert got.sens["y"].shape == (2, n_obs, 2)
    assert got.ok.shape == (2,) and got.ok.dtype == bool
    assert np.array_equal(np.isnan(got.outputs["y"][0]), ~tl.used["y"])


def test_failed_set_is_flagged_and_others_unaffected():
    """A set whose rate is not finite (a zero time constant) is flagged and NaN; the reference
    flags the same set, and the other sets are as if simulated alone."""
    spec, record = M.lag_spec("0.0"), M.lag_record()
    tl = plan(spec, record)
    theta = np.array([[2.0, 5.0], [2.0, 0.0], [1.0, 2.0]])
    cm = compile_model(spec)
    for sens in (False, True):
        got = cm.simulate(tl, theta, sens=sens)
        ref = simulate_reference(generate(spec), tl, theta, sens=sens)
        assert got.ok.tolist() == ref.ok.tolist() == [True, False, True]
        assert np.all(np.isnan(got.outputs["y"][1]))
        # the method is chosen for the batch (the bad set makes it stiff): compare like with like
        same = Tolerances(method=got.methods[0])
        for i in (0, 2):
            alone = cm.simulate(tl, theta[i:i + 1], sens=sens, tol=same)
            assert np.array_equal(got.outputs["y"][i], alone.outputs["y"][0], equal_nan=True)
    sse, _, ok = cm.sse(tl, theta)
    assert ok.tolist() == [True, False, True] and np.isnan(sse[1]).all() and np.isfinite(sse[[0, 2]]).all()


def test_two_segments_with_estimated_initial_states():
    """Two segments, each with its own estimated initial state: sensitivity columns are the
    parameters then one per segment; compiled and reference agree."""
    base = M.lag_record()
    rec = Record(base.name, base.start_utc, base.inputs, base.outputs, (Segment(0.0, 45.0), Segment(55.0, 100.0)))
    spec = M.lag_spec("estimate")
    tl = plan(spec, rec)
    theta, x0 = np.array([[2.0, 5.0]]), np.array([[0.5, 1.5]])
    got = compile_model(spec).simulate(tl, theta, x0_est=x0, sens=True)
    ref = simulate_reference(generate(spec), tl, theta, x0_est=x0, sens=True)
    assert got.sens["y"].shape[2] == 4
    M.assert_agree(got.outputs["y"], ref.outputs["y"], RTOL, "outputs")
    M.assert_agree(got.sens["y"], ref.sens["y"], RTOL, "sensitivities")
    # the second segment's initial state moves only the second segment
    seg2 = record_times_in(rec, 55.0, 100.0)
    assert np.all(got.sens["y"][0, ~seg2 & tl.used["y"], 3] == 0.0)
    assert np.all(got.sens["y"][0, seg2 & tl.used["y"], 2] == 0.0)


def record_times_in(rec, lo, hi):
    t = rec.outputs["y"].t
    return (t >= lo) & (t <= hi)


@pytest.mark.parametrize("case", ["lag_measured", "tank", "reactor_steady", "static", "constructs"])
def test_sse_matches_residuals_of_simulate(case):
    """sse(): the weighted sum of squared residuals at the compared observations, as computed
    in numpy from the simulated outputs; n_used is the number of compared observations."""
    spec, record, theta, x0 = CASES[case]()
    tl = plan(spec, record)
    cm = compile_model(spec)
    weights = {o: 1.0 + r for r, o in enumerate(spec.output_names)}
    sse, n_used, ok = cm.sse(tl, theta, weights, x0_est=x0)
    sim = cm.simulate(tl, theta, x0_est=x0)
    ref = simulate_reference(generate(spec), tl, theta, x0_est=x0)
    assert ok.tolist() == sim.ok.tolist()
    for r, o in enumerate(spec.output_names):
        used = tl.used[o]
        assert n_used[r] == used.sum()
        obs = record.outputs[o].values[used]
        expect = weights[o] * np.sum((obs - sim.outputs[o][:, used]) ** 2, axis=1)
        expect_ref = weights[o] * np.sum((obs - ref.outputs[o][:, used]) ** 2, axis=1)
        np.testing.assert_allclose(sse[:, r], expect, rtol=1e-12)
        np.testing.assert_allclose(sse[:, r], expect_ref, rtol=1e-8)


def test_innovation_sse_matches_numpy():
    """AR(1) innovations of the residuals, r_j - phi**(dt/dt_ref) r_{j-1} over consecutive
    compared observations of a segment, summed in numpy from the simulated outputs."""
    base = M.lag_record(n=121)
    keep = np.ones(121, bool)
    keep[[5, 6, 40, 41, 42]] = False  # irregular gaps
    from graybox.data.record import OutputSeries

    y = base.outputs["y"]
    rec = base.with_outputs({"y": OutputSeries("y", y.t, y.values, keep)})
    rec = Record(rec.name, rec.start_utc, rec.inputs, rec.outputs, (Segment(0.0, 60.0), Segment(70.0, 120.0)))
    spec = M.lag_spec("estimate")
    tl = plan(spec, rec)
    theta, x0 = np.array([[2.0, 5.0], [1.0, 1.0]]), np.array([[0.3, 1.0], [0.0, 0.0]])
    cm = compile_model(spec)
    phi = 0.6
    sse, ssa, n_pairs, ok = cm.innovation_sse(tl, theta, {"y": phi}, x0_est=x0, dt_ref=1.0)
    sim = cm.simulate(tl, theta, x0_est=x0)
    assert ok.all()
    expect, pairs = np.zeros(2), 0
    for lo, hi in ((0.0, 60.0), (70.0, 120.0)):
        sel = tl.used["y"] & (y.t >= lo) & (y.t <= hi)
        r = y.values[sel] - sim.outputs["y"][:, sel]
        dt = np.diff(y.t[sel])
        expect += np.sum((r[:, 1:] - phi ** dt * r[:, :-1]) ** 2, axis=1)
        pairs += sel.sum() - 1
    np.testing.assert_allclose(ssa[:, 0], expect, rtol=1e-12)
    assert n_pairs.tolist() == [pairs]
    np.testing.assert_allclose(sse, cm.sse(tl, theta, x0_est=x0)[0], rtol=0, atol=0)


def test_python_rhs_runs_on_reference_path():
    """A right-hand side given as a Python function is not compiled: simulate_auto uses the
    reference and says so."""
    from graybox.model.api import model_from_function

    spec = model_from_function("pyrhs", states={"y": ""}, inputs={"u": ""},
                               parameters={"K": {"guess": 2.0}, "tau": {"guess": 5.0, "units": "s"}},
                               rhs=lambda x, u, p: {"y": (p["K"] * u["u"] - x["y"]) / p["tau"]},
                               initial={"y": 0.0})
    assert not compiled_available(spec)
    assert compiled_available(M.lag_spec("0.0"))
    tl = plan(spec, M.lag_record())
    res = simulate_auto(spec, tl, np.array([[2.0, 5.0]]))
    assert any("Python function" in m for m in res.messages)
    ref = simulate_auto(M.lag_spec("0.0"), plan(M.lag_spec("0.0"), M.lag_record()), np.array([[2.0, 5.0]]))
    M.assert_agree(res.outputs["y"], ref.outputs["y"], 1e-9, "python rhs vs compiled")


def test_implicit_method_stops_at_an_empty_tank():
    """A Torricelli tank drained to empty: d(sqrt h)/dh is infinite at h = 0, so the exact
    Jacobian Rodas4 needs is not finite and both engines flag the set (the explicit method,
    which needs no Jacobian, passes through)."""
    spec, record = M.tank_spec(), M.tank_record()
    tl = plan(spec, record)
    theta, x0 = np.array([[0.08]]), np.array([[0.3]])
    implicit = Tolerances(method="implicit")
    got = compile_model(spec).simulate(tl, theta, x0_est=x0, tol=implicit)
    ref = simulate_reference(generate(spec), tl, theta, x0_est=x0, tol=implicit)
    assert got.ok.tolist() == ref.ok.tolist() == [False]
    explicit = compile_model(spec).simulate(tl, theta, x0_est=x0)
    assert explicit.methods == ["explicit"] and explicit.ok.all()


def test_non_finite_output_flags_the_set():
    """An output that is not finite at a compared observation fails its set, in both engines,
    and only that set."""
    spec, record = M.static_spec(), M.static_record()
    tl = plan(spec, record)
    theta = np.array([[1.5, -0.3], [np.inf, 0.0], [0.2, 0.1]])
    for sens in (False, True):
        got = compile_model(spec).simulate(tl, theta, sens=sens)
        ref = simulate_reference(generate(spec), tl, theta, sens=sens)
        assert got.ok.tolist() == ref.ok.tolist() == [True, False, True]
        M.assert_agree(got.outputs["yv"], ref.outputs["yv"], RTOL, "outputs")
