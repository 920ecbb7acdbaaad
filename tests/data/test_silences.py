"""Silences of an input logged by exception that are long against its rhythm but under its gap
limit are reported (held, not split), and following the report repairs the fit.

The scenario (of our own invention): a rinse-water hold tank on a bottling line.  The make-up
pump's flow FT-31 is logged by exception: the operator moves the pump speed every 30 to 120
min (uniform), and the historian stores a row at each move.  The level LT-32 is sampled every
60 s with 3 mm of noise.  The tank drains by gravity through a fixed orifice:
A dh/dt = q - c sqrt(h), A = 3 m^2, c = 0.003 m^2.5/s (integrated with scipy's solve_ivp at
tight tolerances, the reference).  The flow's link drops for 3 h (no FT-31 row, a pump move
inside it); the first row after it is the flow the pump then has.  The flow's auto gap limit
is ten median intervals (about 12 h), so the old code bridged the outage without a word: the
model ran 3 h on the flow before it.

Expected values come from the construction (the silence runs from the last move before the
outage to its end) and from numpy's percentiles of the intervals (the documented rule: the
longer of 1 h and the upper quartile plus 1.5 interquartile ranges, Tukey's outlier fence;
J. W. Tukey, Exploratory Data Analysis, 1977).  The rate of such reports on a tag whose
changes come at random (exponential intervals) is checked against its closed form.
"""

from __future__ import annotations

import json
import math
import re

import numpy as np
import pandas as pd
import pytest

import graybox.data.config as cfg
from graybox.data import SymbolInfo
from graybox.data.gaps import ACTION_HELD, ACTION_SPLIT

from . import messy_export as mx
from .util import drained_tank_study, load

T0 = pd.Timestamp("2026-04-13T00:00Z")
AREA_M2, C_TRUE = 3.0, 0.003
NOISE_M = 0.003
DAYS = 2.0
OUTAGE = (20 * 3600.0, 23 * 3600.0)  # no flow row from 20 h to 23 h
SYMBOLS = {"q": SymbolInfo("q", "input", "m**3/s"), "level": SymbolInfo("level", "output", "m")}


def _moves(rng) -> tuple[np.ndarray, np.ndarray]:
    """Pump move times (s, the first at 0) every 30-120 min, one of them inside the outage,
    and the flow after each (m^3/h, rounded as the historian stores it)."""
    t = np.concatenate([[0.0], np.cumsum(rng.uniform(1800.0, 7200.0, 60))])
    t = t[t < DAYS * 86400]
    inside = (t > OUTAGE[0]) & (t < OUTAGE[1])
    if not inside.any():  # the operator moves the pump while the link is down
        t = np.sort(np.append(t, 0.5 * (OUTAGE[0] + OUTAGE[1])))
    t = np.round(t)  # whole seconds
    return t, np.round(rng.uniform(6.0, 24.0, t.size), 2)


def write_tank(folder, seed: int = 31) -> dict:
    """Write rinse_tank.csv (wide, ISO stamps, blank cells where a tag has no row) and return
    the truth: move times and flows, the flow rows written, the planted silence (ns)."""
    from scipy.integrate import solve_ivp

    rng = np.random.default_rng(seed)
    moves, flows = _moves(rng)

    def q_at(t):  # m^3/s
        return flows[np.searchsorted(moves, t, side="right") - 1] / 3600.0

    grid = np.arange(0.0, DAYS * 86400, 60.0)
    h0 = (q_at(0.0) / C_TRUE) ** 2  # at rest at the first flow
    pieces, h = [], h0
    edges = np.append(moves, grid[-1] + 1.0)
    for a, b in zip(edges[:-1], edges[1:]):  # each constant-flow stretch on its own, to its end
        inside = grid[(grid >= a) & (grid < b)]
        sol = solve_ivp(lambda _t, y, q=q_at(a): [(q - C_TRUE * math.sqrt(max(y[0], 0.0))) / AREA_M2], (a, b), [h],
                        t_eval=np.append(inside, b), rtol=1e-10, atol=1e-12)
        pieces.append(sol.y[0][:-1])
        h = float(sol.y[0][-1])
    level = np.concatenate(pieces) + rng.normal(0.0, NOISE_M, grid.size)
    in_outage = (moves >= OUTAGE[0]) & (moves < OUTAGE[1])
    rows_t = list(moves[~in_outage]) + [OUTAGE[1]]  # the first row after the link is back
    rows_v = list(flows[~in_outage]) + [float(flows[np.searchsorted(moves, OUTAGE[1], side="right") - 1])]
    order = np.argsort(rows_t, kind="stable")
    rows_t, rows_v = np.asarray(rows_t)[order], np.asarray(rows_v)[order]
    table = pd.DataFrame({"t": np.concatenate([grid, rows_t])})
    table["LT-32"] = np.concatenate([np.round(level, 4), np.full(rows_t.size, np.nan)])
    table["FT-31"] = np.concatenate([np.full(grid.size, np.nan), rows_v])
    table = table.groupby("t", as_index=False).first().sort_values("t")  # a move on the grid: one row
    table.insert(0, "time", (T0 + pd.to_timedelta(table.pop("t"), unit="s")).dt.strftime("%Y-%m-%dT%H:%M:%SZ"))
    table.to_csv(folder / "rinse_tank.csv", index=False)
    last_before = rows_t[rows_t < OUTAGE[0]].max()
    ns = lambda s: T0.value + int(round(s * 1e9))  # noqa: E731
    return {"moves": moves, "flows": flows, "rows_t": rows_t, "silence": (ns(last_before), ns(OUTAGE[1]))}


def _table(**flow) -> dict:
    return {"files": ["rinse_tank.csv"], "time_column": "time",
            "tags": {"q": {"tag": "FT-31", "units": "m**3/h", "logging": "exception", **flow},
                     "level": {"tag": "LT-32", "units": "m"}}}


def _fence_by_numpy(rows_t: np.ndarray) -> float:
    """The documented silence rule from numpy.percentile (linear, numpy's default)."""
    q25, q75 = np.percentile(np.diff(rows_t), [25, 75])
    return max(3600.0, q75 + 1.5 * (q75 - q25))


def test_rule_text_matches_its_constants():
    """config.py's docstring names the constants' values (one source, like the gap rule)."""
    text = " ".join(cfg.__doc__.replace("#", " ").split())
    assert cfg.SILENCE_FLOOR_S == 3600.0 and cfg.SILENCE_FENCE_IQR == 1.5
    assert ("every silence longer than the longer of 1 h and the upper quartile of its intervals plus 1.5 "
            "interquartile ranges (Tukey's outlier fence), but under its auto gap limit, is warned about") in text


def test_an_outage_under_the_gap_limit_is_reported_not_split(tmp_path):
    """The documented defaults: one segment (the silence is under the gap limit), and exactly
    the planted silence reported, with its tag, start, end, duration, the gap limit it is
    under and what to set; no ordinary interval (30-120 min) is reported."""
    truth = write_tank(tmp_path)
    rec, rep = load(tmp_path, _table(), symbols=SYMBOLS)
    q = rep.tag("q")
    fence = _fence_by_numpy(truth["rows_t"])
    median = float(np.median(np.diff(truth["rows_t"])))
    assert q.silence_after_s == pytest.approx(fence, rel=1e-12) and q.gap_limit_s == pytest.approx(10 * median)
    assert 2 * 3600 < fence < 3 * 3600 < q.gap_limit_s  # the outage lies between the rule and the limit
    a, b = truth["silence"]
    assert [(pd.Timestamp(s["start_utc"]).value, pd.Timestamp(s["end_utc"]).value) for s in q.silences] == [(a, b)]
    assert q.silences[0]["duration_s"] == (b - a) / 1e9 and q.silences[0]["action"] == ACTION_HELD
    assert q.gaps == 0 and len(rec.segments) == 1  # held, as before: only now the reader is told
    said = [w for w in rep.warnings if "FT-31" in w]
    assert len(said) == 1
    w = said[0]
    start, end = (pd.Timestamp(x, tz="UTC").strftime("%Y-%m-%dT%H:%M:%SZ") for x in (a, b))
    assert f"{start} .. {end}" in w and "logged by exception" in w
    assert "not split: under its gap limit" in w and "set max_gap on this tag" in w
    assert "silence alone cannot tell a value that held from a data outage" in w
    assert "silence" in rep.summary() and "held, not split" in rep.summary()


def test_following_the_warning_splits_at_the_silence(tmp_path):
    """The max_gap the warning suggests (parsed from its text) splits the record exactly at
    the silence and nowhere else; the silence becomes a gap."""
    truth = write_tank(tmp_path)
    _, rep = load(tmp_path, _table(), symbols=SYMBOLS)
    suggested = re.search(r'max_gap = "([^"]+)"', next(w for w in rep.warnings if "FT-31" in w)).group(1)
    rec, rep = load(tmp_path, _table(max_gap=suggested), symbols=SYMBOLS)
    a, b = truth["silence"]
    q = rep.tag("q")
    assert q.gaps == 1 and q.silences == () and q.gap_list[0]["action"] == ACTION_SPLIT
    assert (pd.Timestamp(q.gap_list[0]["start_utc"]).value, pd.Timestamp(q.gap_list[0]["end_utc"]).value) == (a, b)
    assert len(rec.segments) == 2
    assert rec.segments[0].t_end == (a - T0.value) / 1e9 and rec.segments[1].t_start == (b - T0.value) / 1e9


@pytest.mark.parametrize("limit", ["12 h", "off"])
def test_a_max_gap_the_study_sets_is_the_users_judgement(tmp_path, limit):
    """A duration or "off" on the tag (or "off" for the experiment): the silence is held
    as the study says, and not reported; the report says why."""
    write_tank(tmp_path)
    for table in (_table(max_gap=limit), {**_table(), "max_gap": "off"}):
        rec, rep = load(tmp_path, table, symbols=SYMBOLS)
        q = rep.tag("q")
        assert q.silences == () and q.silence_after_s is None and "the study's own limit" in q.silence_rule
        assert len(rec.segments) == 1 and not any("long against its rhythm" in w for w in rep.warnings)
    _, rep = load(tmp_path, _table(max_gap="auto"), symbols=SYMBOLS)  # "auto" said out loud: the default
    assert len(rep.tag("q").silences) == 1


def test_outputs_sampled_tags_and_gridded_exports_get_no_silence_report(tmp_path):
    """An output's silence holds nothing into the model; a sampled input is judged by its gap
    limit alone; a gridded exception export (messy_export.py, a row every minute) is never
    silent: its outage is a gap, as before."""
    write_tank(tmp_path)
    table = _table()
    table["tags"]["level"]["logging"] = "exception"
    _, rep = load(tmp_path, table, symbols=SYMBOLS)
    assert rep.tag("level").silence_after_s is None and rep.tag("level").silences == ()
    sampled = _table()
    sampled["tags"]["q"]["logging"] = "sampled"
    _, rep = load(tmp_path, sampled, symbols=SYMBOLS)
    assert rep.tag("q").silence_after_s is None and rep.tag("q").silences == ()
    mx.write_export(tmp_path, mx.scenario())
    _, rep = load(tmp_path, mx.data_table(), symbols={"F": SymbolInfo("F", "input", "m**3/s"),
                                                      "L": SymbolInfo("L", "output", "m")})
    flow = rep.tag("F")
    assert flow.silences == () and flow.gaps == 1  # its 2 h outage is over its 1 h limit: a gap, as before
    assert not any("long against its rhythm" in w for w in rep.warnings)


def test_random_changes_reported_at_the_closed_form_rate(tmp_path):
    """A tag whose changes come at random (exponential intervals, mean 40 min): the fence is
    (ln 4 + 1.5 ln 3) / rate, and the share of intervals between it and the gap limit (ten
    median intervals, ln 2 * 10 / rate) is exp(-(ln 4 + 1.5 ln 3)) - 2**-10 = 4.71%.  4000
    intervals: the count within 5 binomial standard deviations (the fence itself is taken
    from the sample's quartiles).  At most 20 printed one by one, the rest in one line."""
    from graybox.data.assemble import MAX_WARNED

    rng = np.random.default_rng(2604)
    n = 4000
    t = np.cumsum(np.maximum(1.0, np.round(rng.exponential(2400.0, n))))
    t = np.concatenate([[0.0], t])
    stamps = (T0 + pd.to_timedelta(t, unit="s")).strftime("%Y-%m-%dT%H:%M:%SZ")
    level = np.linspace(1.0, 2.0, t.size) + rng.normal(0, 0.01, t.size)
    pd.DataFrame({"time": stamps, "FT-31": np.arange(t.size) % 97 + 1.0, "LT-32": np.round(level, 4)}).to_csv(
        tmp_path / "rinse_tank.csv", index=False)
    _, rep = load(tmp_path, _table(), symbols=SYMBOLS)
    q = rep.tag("q")
    p = math.exp(-(math.log(4) + 1.5 * math.log(3))) - 2.0 ** -10
    assert p == pytest.approx(0.0471, abs=5e-5)
    assert abs(len(q.silences) - n * p) < 5 * math.sqrt(n * p * (1 - p))
    steps = np.diff(t)
    assert len(q.silences) == int(np.sum((steps > _fence_by_numpy(t)) & (steps <= q.gap_limit_s)))
    mine = [w for w in rep.warnings if "FT-31" in w and ("long against its rhythm" in w or "more silences" in w)]
    assert len(mine) == MAX_WARNED + 1 and f"{len(q.silences) - MAX_WARNED} more silences" in mine[-1]


# -- through `graybox check` and `graybox fit` ---------------------------------------------------
def study(q_extra: str = "") -> str:
    """The rinse tank's study file; ``q_extra``: more keys of the inflow tag."""
    return drained_tank_study(name="rinse_tank", model="rinse_hold_tank", seed=3, area=3.0, csv="rinse_tank.csv",
                              q_tag="FT-31", level_tag="LT-32", q_extra='logging = "exception"\n' + q_extra)


def test_check_and_fit_report_the_silence_and_following_it_repairs_the_fit(tmp_path):
    """Both commands print the silence; results.json lists it.  Bridged (the default), the
    outflow coefficient is off and the residual spread is far over the 3 mm noise; with the
    max_gap the warning suggests, c is recovered to 0.3% and sigma to 10% of the truth (the
    values the data were generated with)."""
    from graybox.workflow import check_study, fit_study

    write_tank(tmp_path)
    (tmp_path / "study.toml").write_text(study())
    said_check: list[str] = []
    assert check_study(tmp_path / "study.toml", echo=said_check.append, sample=False) == 0
    said_fit: list[str] = []
    bridged = fit_study(tmp_path / "study.toml", tmp_path / "run0", echo=said_fit.append, sample=False)
    warned = [ln.strip() for ln in "\n".join(said_check).splitlines() if "long against its rhythm" in ln]
    assert len(warned) == 1 and warned == [ln.strip() for ln in "\n".join(said_fit).splitlines()
                                           if "long against its rhythm" in ln]
    saved = json.loads((tmp_path / "run0" / "results.json").read_text())["data"]["main"]
    assert len(saved["tags"][0]["silences"]) == 1 and any("long against its rhythm" in w for w in saved["warnings"])
    suggested = re.search(r'max_gap = "([^"]+)"', warned[0]).group(1)
    (tmp_path / "study.toml").write_text(study(f'max_gap = "{suggested}"'))
    split = fit_study(tmp_path / "study.toml", tmp_path / "run1", echo=lambda _: None, sample=False)
    c0, c1 = bridged["parameters"]["c"]["estimate"], split["parameters"]["c"]["estimate"]
    s0, s1 = (json.loads((tmp_path / r / "results.json").read_text()) for r in ("run0", "run1"))
    sig0, sig1 = (_sigma(s) for s in (s0, s1))
    assert abs(c1 / C_TRUE - 1) < 0.003 and abs(sig1 / NOISE_M - 1) < 0.10
    assert abs(c0 / C_TRUE - 1) > 0.01 and sig0 > 5 * NOISE_M  # the silent wrong answer of the old code


def _sigma(results: dict) -> float:
    """The estimated noise level of the level output in a results.json."""
    return float(results["noise"]["level"]["sigma"])
