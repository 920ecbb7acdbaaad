"""stuck_after = "auto" (the default): a sampled output that repeats one noisy reading for 20
of its intervals (10 min at least, 2 h at most) is a stuck sensor, unless the tag repeats
itself often anyway (coarse steps against its noise, or a deadband it seldom leaves).

The scenario (of our own invention): a glycol expansion vessel.  Its level LT-7 is sampled
every 30 s with 3 mm of noise and stored in metres to 0.1 mm; the make-up flow FT-6, also
sampled, steps between setpoints.  The vessel drains through a fixed restriction:
A dh/dt = q - c sqrt(h) (A = 2 m^2, c = 0.002 m^2.5/s, integrated with scipy's solve_ivp at
tight tolerances).  The transmitter freezes for 50 min (100 readings of one value) while
the level rises after a step.  The old default (2 h) let the freeze through without a word.

Expected counts are the construction (the frozen rows) and the literal stuck rule of
test_quality.py at the documented duration; the probabilities that justify the rule are
computed exactly from the normal distribution (scipy.stats.norm).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

import graybox.data.config as cfg
import graybox.data.quality as quality
from graybox.data import SymbolInfo
from graybox.data.quality import REASON_STUCK

from .test_quality import _stuck_by_hand
from .util import drained_tank_study, load

T0 = pd.Timestamp("2026-06-01T00:00Z")
AREA_M2, C_TRUE, NOISE_M = 2.0, 0.002, 0.003
N = 2 * 2880  # 2 days at 30 s
FLOWS = ((0, 8.0), (700, 14.0), (1900, 5.0), (3100, 11.0), (4300, 16.0), (5000, 9.0))  # (reading, m^3/h)
FROZEN = range(3150, 3250)  # 100 readings, 50 min, while the level rises after the step at 3100
SYMBOLS = {"q": SymbolInfo("q", "input", "m**3/s"), "level": SymbolInfo("level", "output", "m")}


def _flow() -> np.ndarray:
    q = np.zeros(N)
    for i0, v in FLOWS:
        q[i0:] = v
    return q


def write_vessel(folder, seed: int = 7) -> np.ndarray:
    """Write vessel.csv (wide, ISO stamps, every 30 s) and return the level as written."""
    from scipy.integrate import solve_ivp

    rng = np.random.default_rng(seed)
    t = np.arange(N) * 30.0
    q = _flow() / 3600.0
    h = np.empty(N)
    h[0] = (q[0] / C_TRUE) ** 2
    for i in range(1, N):  # the flow holds over each interval (a sampled input, held)
        sol = solve_ivp(lambda _t, y, qi=q[i - 1]: [(qi - C_TRUE * math.sqrt(max(y[0], 0.0))) / AREA_M2],
                        (t[i - 1], t[i]), [h[i - 1]], rtol=1e-10, atol=1e-12)
        h[i] = sol.y[0][-1]
    level = np.round(h + rng.normal(0.0, NOISE_M, N), 4)
    level[FROZEN.start:FROZEN.stop] = level[FROZEN.start]
    assert np.all(np.abs(h[FROZEN.stop - 1] - h[FROZEN.start]) > 10 * NOISE_M)  # the level moved meanwhile
    stamps = (T0 + pd.to_timedelta(t, unit="s")).strftime("%Y-%m-%dT%H:%M:%SZ")
    pd.DataFrame({"time": stamps, "LT-7": level, "FT-6": _flow()}).to_csv(folder / "vessel.csv", index=False)
    return level


def _table(**extra) -> dict:
    table = {"files": ["vessel.csv"], "time_column": "time",
             "tags": {"q": {"tag": "FT-6", "units": "m**3/h"}, "level": {"tag": "LT-7", "units": "m"}}}
    table.update(extra)
    return table


def _ns(i: int, step_s: float = 30.0) -> int:
    return T0.value + int(i * step_s * 1e9)


def test_rule_text_matches_its_constants():
    """config.py's docstring names the constants' values, and DATA_DEFAULTS says "auto"."""
    text = " ".join(cfg.__doc__.replace("#", " ").split())
    assert cfg.DATA_DEFAULTS["stuck_after"] == "auto"
    assert (cfg.AUTO_STUCK_CAP_S, cfg.AUTO_STUCK_FLOOR_S, cfg.AUTO_STUCK_INTERVALS,
            cfg.AUTO_STUCK_REPEAT_SHARE) == (7200.0, 600.0, 20.0, 0.25)
    assert ('stuck_after = "auto" measured outputs: a run of samples flat to within half the deadband this long is '
            'a stuck sensor; "auto": for a sampled tag the shorter of 2 h and the longer of 10 min and 20 of its '
            'median intervals, unless over 1 in 4 of its successive readings repeat (within half the deadband: '
            'coarse steps against its noise), then 2 h; 2 h for a tag logged by exception') in text


def test_a_frozen_sampled_level_is_flagged_by_default(tmp_path):
    """The documented defaults: the 100 frozen readings are one stuck run (flagged, not
    masked), found by a 10 min rule (20 x 30 s); stuck_action = "mask" masks exactly them."""
    write_vessel(tmp_path)
    rec, rep = load(tmp_path, _table(), symbols=SYMBOLS)
    lv = rep.tag("level")
    assert lv.stuck_after_s == max(600.0, 20 * 30.0) == 600.0 and lv.stuck_rule.startswith("auto")
    assert lv.flagged == {REASON_STUCK: len(FROZEN)} and lv.masked == {}
    assert [(pd.Timestamp(r["start_utc"]).value, pd.Timestamp(r["end_utc"]).value, r["rows"]) for r in lv.stuck_runs] \
        == [(_ns(FROZEN.start), _ns(FROZEN.stop - 1), len(FROZEN))]
    said = [w for w in rep.warnings if "LT-7" in w]
    assert len(said) == 1 and "one value repeated exactly for 49.5 min" in said[0] and "(auto)" in said[0]
    assert rec.outputs["level"].mask.all()  # flagged only
    rec, rep = load(tmp_path, _table(stuck_action="mask"), symbols=SYMBOLS)
    assert rep.tag("level").masked == {REASON_STUCK: len(FROZEN)}
    assert np.flatnonzero(~rec.outputs["level"].mask).tolist() == list(FROZEN)
    assert rep.tag("q").stuck_after_s is None and rep.tag("q").flagged == {}  # inputs: not judged


def test_durations_off_and_per_tag_settings_still_work(tmp_path):
    write_vessel(tmp_path)
    _, rep = load(tmp_path, _table(stuck_after="2 h"), symbols=SYMBOLS)
    assert rep.tag("level").stuck_after_s == 7200.0 and rep.tag("level").flagged == {}  # the old default
    table = _table()
    table["tags"]["level"]["stuck_after"] = "off"
    _, rep = load(tmp_path, table, symbols=SYMBOLS)
    assert rep.tag("level").stuck_after_s is None and rep.tag("level").flagged == {}
    table = _table(stuck_after="off")
    table["tags"]["level"]["stuck_after"] = "auto"  # the tag's own "auto" under an experiment's "off"
    table["tags"]["q"]["stuck_after"] = "auto"  # an input that asks: its setpoint holds are long, exact repeats
    _, rep = load(tmp_path, table, symbols=SYMBOLS)
    assert rep.tag("level").flagged == {REASON_STUCK: len(FROZEN)}
    t_ns = _ns(0) + np.arange(N, dtype=np.int64) * 30 * 10**9
    share = np.mean(np.diff(_flow()) == 0)  # the flow repeats itself nearly always: coarse steps, 2 h
    assert share > 0.25 and rep.tag("q").stuck_after_s == 7200.0
    want = _stuck_by_hand(t_ns, _flow(), np.ones(N, bool), 0.0, 7200.0)
    assert rep.tag("q").flagged == {REASON_STUCK: int(want.sum())}


def _noise_export(folder, step_s: float, n: int, frozen: dict[int, int], q_over_sigma: float = 0.03,
                  seed: int = 1, deadband: float | None = None, logging: str = "sampled", ramp: float = 5.0
                  ) -> tuple[dict, np.ndarray]:
    """A level of white noise (sd 1) about a ramp of ``ramp`` over the record (0: a steady
    value, at the centre of a storage step), stored in steps of ``q_over_sigma``, every
    ``step_s``; ``frozen``: {first reading: readings} repeating the first; and its table."""
    rng = np.random.default_rng(seed)
    v = np.linspace(0.0, ramp, n) + rng.normal(0.0, 1.0, n)
    v = np.round(v / q_over_sigma) * q_over_sigma
    for a, k in frozen.items():
        v[a:a + k] = v[a]
    t = np.arange(n) * step_s
    stamps = (T0 + pd.to_timedelta(t, unit="s")).strftime("%Y-%m-%dT%H:%M:%SZ")
    pd.DataFrame({"time": stamps, "LT-7": v, "FT-6": 10.0}).to_csv(folder / "vessel.csv", index=False)
    level = {"tag": "LT-7", "units": "m", "logging": logging}
    if deadband is not None:
        level["deadband"] = deadband
    return {"files": ["vessel.csv"], "time_column": "time",
            "tags": {"q": {"tag": "FT-6", "units": "m**3/h"}, "level": level}}, v


@pytest.mark.parametrize("step_s, limit_s", [(5.0, 600.0), (30.0, 600.0), (60.0, 1200.0), (300.0, 6000.0),
                                             (600.0, 7200.0)])
def test_the_auto_duration_follows_the_median_interval(tmp_path, step_s, limit_s):
    """The shorter of 2 h and the longer of 10 min and 20 intervals: a freeze one interval
    longer than it is flagged, one an interval shorter is not (the literal rule agrees)."""
    k_over = int(round(limit_s / step_s)) + 2  # readings spanning limit + 1 interval
    k_under = k_over - 2
    n = 20 * k_over + 200  # the two freezes: under 1 in 10 of the readings
    table, v = _noise_export(tmp_path, step_s, n, {50: k_under, 100 + k_under: k_over})
    _, rep = load(tmp_path, table, symbols=SYMBOLS)
    lv = rep.tag("level")
    assert lv.stuck_after_s == min(7200.0, max(600.0, 20 * step_s)) == limit_s
    assert lv.flagged == {REASON_STUCK: k_over}
    t_ns = _ns(0) + (np.arange(n) * step_s * 1e9).astype(np.int64)
    assert _stuck_by_hand(t_ns, v, np.ones(n, bool), 0.0, limit_s).sum() == k_over


def _step_probabilities(q: float, centre: float = 0.0) -> np.ndarray:
    """P(reading in each storage step) for unit normal noise about ``centre`` (in steps of ``q``)."""
    from scipy.stats import norm

    k = np.arange(-400, 401)
    return norm.cdf((k + 0.5) * q - centre) - norm.cdf((k - 0.5) * q - centre)


def test_the_repeat_share_bound_and_its_chance_runs():
    """The numbers the rule rests on (quality.py's docstring), exactly from the normal
    distribution: the storage step that repeats 1 in 4 of white-noise readings is 0.917
    standard deviations, and 21 readings in one step then have a probability of 3.3e-10
    (a steady value at the centre of a step, the worst case); a step of 2 standard
    deviations repeats 1 in 2, and 21 readings in one step have 3.3e-4."""
    from scipy.optimize import brentq

    q = brentq(lambda s: float(np.sum(_step_probabilities(s) ** 2)) - 0.25, 0.1, 5.0)
    p = _step_probabilities(q)
    assert round(q, 3) == 0.917 and np.sum(p ** 21) == pytest.approx(3.3e-10, rel=0.015)
    assert float(np.sum(_step_probabilities(q, 0.5 * q) ** 21)) < np.sum(p ** 21)  # off centre: fewer
    coarse = _step_probabilities(2.0)
    assert 0.5 < np.sum(coarse ** 2) < 0.52 and np.sum(coarse ** 21) == pytest.approx(3.3e-4, rel=0.015)
    doc = " ".join(quality.__doc__.split())
    assert "(0.917 standard deviations), 21 readings in one step have a probability of 3.3e-10" in doc
    assert "a step of 2 standard deviations repeats 1 in 2, and 21 readings in one step come at 3.3e-4" in doc


def test_coarse_steps_keep_two_hours(tmp_path):
    """White noise stored in steps of 2 standard deviations about a steady value, every 30 s
    for 7 days: half its readings repeat, so 10 min of repeats is common (the literal 10 min
    rule finds chance runs) and the auto rule keeps 2 h, under which none is found."""
    n = 7 * 2880
    table, v = _noise_export(tmp_path, 30.0, n, {}, q_over_sigma=2.0, seed=5, ramp=0.0)
    t_ns = _ns(0) + np.arange(n, dtype=np.int64) * 30 * 10**9
    share = float(np.mean(np.diff(v) == 0))
    assert share > 0.25
    assert _stuck_by_hand(t_ns, v, np.ones(n, bool), 0.0, 600.0).sum() > 0  # why the guard is needed
    _, rep = load(tmp_path, table, symbols=SYMBOLS)
    lv = rep.tag("level")
    assert lv.stuck_after_s == 7200.0 and "coarse steps" in lv.stuck_rule and f"{100 * share:.3g}%" in lv.stuck_rule
    assert _stuck_by_hand(t_ns, v, np.ones(n, bool), 0.0, 7200.0).sum() == 0 and lv.flagged == {}


def test_fine_steps_near_the_bound_flag_nothing(tmp_path):
    """Steps of 0.85 standard deviations (just under 1 in 4 repeating) about a steady value,
    every 30 s for 7 days: the 10 min rule applies and flags no reading (chance runs have a
    probability of the order of 1e-10 per reading)."""
    n = 7 * 2880
    table, v = _noise_export(tmp_path, 30.0, n, {}, q_over_sigma=0.85, seed=9, ramp=0.0)
    _, rep = load(tmp_path, table, symbols=SYMBOLS)
    lv = rep.tag("level")
    assert float(np.mean(np.diff(v) == 0)) <= 0.25 and lv.stuck_after_s == 600.0 and lv.flagged == {}


def test_a_deadband_its_readings_seldom_leave_keeps_two_hours(tmp_path):
    """Fine storage steps but a declared deadband of 4 standard deviations: most successive
    readings lie within half of it, so they count as repeats and the tag keeps 2 h."""
    table, _ = _noise_export(tmp_path, 30.0, 2880, {}, deadband=4.0)
    _, rep = load(tmp_path, table, symbols=SYMBOLS)
    assert rep.tag("level").stuck_after_s == 7200.0 and "coarse steps" in rep.tag("level").stuck_rule


def test_a_tag_logged_by_exception_keeps_two_hours(tmp_path):
    """The existing rule for exception-logged tags: a value that holds is no news there."""
    table, _ = _noise_export(tmp_path, 30.0, 2880, {1000: 100}, logging="exception")
    _, rep = load(tmp_path, table, symbols=SYMBOLS)
    lv = rep.tag("level")
    assert lv.stuck_after_s == 7200.0 and "exception" in lv.stuck_rule and lv.flagged == {}


# -- the fit ---------------------------------------------------------------------------------------
def study(data_extra: str = "") -> str:
    """The glycol vessel's study file; ``data_extra``: more keys of its [data] table."""
    return drained_tank_study(name="glycol_vessel", model="expansion_vessel", seed=5, area=2.0, csv="vessel.csv",
                              q_tag="FT-6", level_tag="LT-7", data_extra=data_extra)


def test_masking_the_flagged_freeze_repairs_the_fit(tmp_path):
    """With the default rule, the freeze is flagged and stuck_action = "mask" (what the
    warning says) leaves it out: the noise level is then the 3 mm the data were made with
    (to 5%) and c is recovered to 0.1%; with the frozen rows compared, sigma is inflated
    over fivefold."""
    from graybox.workflow import fit_study

    write_vessel(tmp_path)
    out = {}
    for name, extra in (("kept", ""), ("masked", 'stuck_action = "mask"')):
        (tmp_path / "study.toml").write_text(study(extra))
        doc = fit_study(tmp_path / "study.toml", tmp_path / name, echo=lambda _: None, sample=False)
        out[name] = doc["parameters"]["c"]["estimate"], doc["noise"]["level"]["sigma"]
    (c0, s0), (c1, s1) = out["kept"], out["masked"]
    assert abs(c1 / C_TRUE - 1) < 1e-3 and abs(s1 / NOISE_M - 1) < 0.05
    assert s0 > 5 * NOISE_M  # 100 frozen readings of 5,760 compared: the residual spread is over 5 times the noise
