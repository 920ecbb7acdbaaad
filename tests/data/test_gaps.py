"""Gap limits (issue 13, section 4): with the documented defaults a 2 h outage of an input
splits the record, and `check` and `fit` warn about every long gap.

The expected limits are the documented rule (graybox/data/gaps.py, graybox/data/config.py):
"auto" is the longer of 15 min and ten median intervals for a sampled tag, of 1 h and ten
median intervals for a tag logged by exception.  Every expected gap, segment and estimate
comes from the scenario's construction (messy_export.py and the small tables below).  The
old code applied no limit by default (one segment, the flow held for 2 h).
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from graybox.data import SymbolInfo
from graybox.data.config import AUTO_GAP_EXCEPTION_FLOOR_S, AUTO_GAP_FLOOR_S, AUTO_GAP_INTERVALS
from graybox.data.gaps import ACTION_NONE, ACTION_SPLIT
from graybox.errors import ConfigError

from . import messy_export as mx
from .util import load, write

SYMBOLS = {"F": SymbolInfo("F", "input", "m**3/s"), "L": SymbolInfo("L", "output", "m")}
T0 = pd.Timestamp("2026-03-02T00:00Z")

# 1 U.S. gallon = 3.785 411 784 E-03 m^3 and 1 in = 2.54 E-02 m (NIST SP 811, 2008, Appendix
# B.8: gallon [U.S.], inch; exact by definition, from memory of the printed table)
GAL_M3, IN_M = 3.785411784e-3, 0.0254
AREA_M2 = mx.AREA_GAL_PER_IN * GAL_M3 / IN_M  # 7.4516 m^2
K_M2_S = mx.OUT_GPM_PER_IN * GAL_M3 / 60.0 / IN_M  # 4.9677e-3 m^2/s


@pytest.fixture(scope="module")
def truth():
    return mx.scenario()


@pytest.fixture()
def export(tmp_path, truth):
    mx.write_export(tmp_path, truth)
    return tmp_path


def test_outage_of_an_exception_logged_input_splits_the_record(export):
    """The documented defaults catch the 2 h outage: two segments meeting the gap's edges,
    one warning naming the tag, its start and end, its duration and what was done."""
    rec, rep = load(export, mx.data_table(), symbols=SYMBOLS)
    last, first = mx.minute_ns(mx.OUTAGE.start - 1), mx.minute_ns(mx.OUTAGE.stop)
    t_last, t_first = (last - mx.minute_ns(0)) / 1e9, (first - mx.minute_ns(0)) / 1e9
    assert [(s.t_start, s.t_end) for s in rec.segments][0][1] == t_last
    assert rec.segments[1].t_start == t_first and len(rec.segments) == 2
    flow = rep.tag("F")
    assert flow.gap_limit_s == max(AUTO_GAP_EXCEPTION_FLOOR_S, AUTO_GAP_INTERVALS * 60.0) == 3600.0
    assert flow.gaps == 1 and flow.gap_list[0]["duration_s"] == 60.0 * (len(mx.OUTAGE) + 1)
    assert flow.gap_list[0]["action"] == ACTION_SPLIT
    assert pd.Timestamp(flow.gap_list[0]["start_utc"]).value == last
    warn = [w for w in rep.warnings if "FI_405" in w and "no usable sample" in w]
    assert len(warn) == 1
    w = warn[0]
    assert "2.02 h" in w and "2026-11-01T10:39:00Z .. 2026-11-01T12:40:00Z" in w and ACTION_SPLIT in w
    # the Bad stretch of the level is an output gap: warned, nothing split
    level = rep.tag("L")
    assert level.gaps == 1 and level.gap_list[0]["action"] == ACTION_NONE
    assert level.gap_list[0]["duration_s"] == 60.0 * (len(mx.BAD) + 1)


def test_off_bridges_the_outage_as_the_old_code_did(export):
    """max_gap = "off" on the flow: one segment, and the flow before the outage held across
    it (what the old default did silently; now the user asked for it)."""
    table = mx.data_table()
    table["tags"]["F"]["max_gap"] = "off"
    rec, rep = load(export, table, symbols=SYMBOLS)
    assert len(rec.segments) == 1 and rep.tag("F").gaps == 0 and rep.tag("F").gap_limit_s is None
    mid = (mx.minute_ns(760) - mx.minute_ns(0)) / 1e9
    before = rec.inputs["F"].at([(mx.minute_ns(mx.OUTAGE.start - 1) - mx.minute_ns(0)) / 1e9])[0]
    assert rec.inputs["F"].at([mid])[0] == before


def test_experiment_duration_applies_to_sampled_tags_only(tmp_path):
    """max_gap = "10 min" in [data]: a sampled tag's 20 min gap splits; the same silence of a
    tag logged by exception is under its own auto limit (1 h) and does not."""
    rows = []
    for i in range(24 * 60):
        if 600 <= i < 620:
            continue
        rows.append(f"{(T0 + pd.Timedelta(minutes=i)).isoformat()},{20 + i / 100},{1 + i // 240},{3600}")
    write(tmp_path, "w.csv", "time,TI_101,QI_7,FI_3\n" + "\n".join(rows) + "\n")
    base = {"files": ["w.csv"], "time_column": "time", "max_gap": "10 min",
            "tags": {"T": {"tag": "TI_101", "units": "K"}, "Q": {"tag": "QI_7", "units": "W"},
                     "F": {"tag": "FI_3", "units": "kg/h"}}}
    _, rep = load(tmp_path, base)
    assert rep.tag("Q").gaps == 1 and rep.tag("Q").gap_limit_s == 600.0 and len(rep.segments) == 2
    exc = json.loads(json.dumps(base))
    for s in ("Q", "F"):
        exc["tags"][s]["logging"] = "exception"
    _, rep = load(tmp_path, exc)
    assert rep.tag("Q").gap_limit_s == AUTO_GAP_EXCEPTION_FLOOR_S and rep.tag("Q").gaps == 0
    assert len(rep.segments) == 1
    # the output is sampled: its 21 min gap is over 10 min, warned, nothing split
    assert rep.tag("T").gaps == 1 and any("TI_101" in w and ACTION_NONE in w for w in rep.warnings)


@pytest.mark.parametrize("interval_min, gap_min, splits", [
    (1, 14, False), (1, 16, True),  # 10 x 1 min < 15 min: the floor
    (5, 45, False), (5, 55, True),  # 10 x 5 min = 50 min
])
def test_auto_limit_of_a_sampled_tag(tmp_path, interval_min, gap_min, splits):
    """The documented auto rule for a sampled input: the longer of 15 min and 10 median
    intervals; a gap of ``gap_min`` between samples every ``interval_min`` minutes."""
    t = list(np.arange(0, 600, interval_min))
    t = [m for m in t if m <= 300] + [m + gap_min - interval_min for m in t if m > 300]
    lines = [f"{(T0 + pd.Timedelta(minutes=float(m))).isoformat()},{20 + k / 50},5,1" for k, m in enumerate(t)]
    write(tmp_path, "a.csv", "time,TI_101,QI_7,FI_3\n" + "\n".join(lines) + "\n")
    rec, rep = load(tmp_path, {"files": ["a.csv"], "time_column": "time",
                               "tags": {"T": {"tag": "TI_101", "units": "K"}, "Q": "QI_7", "F": "FI_3"}})
    want = max(AUTO_GAP_FLOOR_S, AUTO_GAP_INTERVALS * 60.0 * interval_min)
    assert rep.tag("Q").gap_limit_s == want
    assert len(rec.segments) == (2 if splits else 1)
    assert rep.tag("Q").gaps == int(splits)


def test_a_repeat_after_an_outage_is_a_new_reading(tmp_path):
    """A tag logged by exception on a 1-min grid reads the same value before and after a
    2 h silence: the row after it is an observation (it starts the new segment), not a
    held repeat bridging the outage."""
    rows = []
    for i in range(600):
        if 200 <= i < 320:
            continue
        t = (T0 + pd.Timedelta(minutes=i)).isoformat()
        rows.append(f"{t},{50.0 if 150 <= i < 400 else 40 + (i % 7)},{2.0 if i < 250 or i >= 320 else 9.0},1")
    write(tmp_path, "g.csv", "time,TI_101,QI_7,FI_3\n" + "\n".join(rows) + "\n")
    rec, rep = load(tmp_path, {"files": ["g.csv"], "time_column": "time",
                               "tags": {"T": {"tag": "TI_101", "units": "K", "logging": "exception"},
                                        "Q": {"tag": "QI_7", "units": "W", "logging": "exception"},
                                        "F": "FI_3"}})
    after = (T0 + pd.Timedelta(minutes=320) - T0).total_seconds()
    assert after in rec.outputs["T"].t  # 50.0 again after the silence: kept
    assert len(rec.segments) == 2 and rec.segments[1].t_start == after
    assert rep.tag("Q").gaps == 1 and rep.tag("T").gaps == 1


def test_bad_gap_settings_are_located_errors(tmp_path):
    write(tmp_path, "w.csv", "time,TI_101,QI_7,FI_3\n2026-01-01T00:00:00Z,1,1,1\n")
    base = {"files": ["w.csv"], "time_column": "time", "tags": {"T": "TI_101", "Q": "QI_7", "F": "FI_3"}}
    for key, value, where in (("max_gap", "soon", "[data] key 'max_gap'"), ("max_gap", True, "key 'max_gap'"),
                              ("stuck_after", "soon", "key 'stuck_after'")):  # "auto" is a stuck rule now
        with pytest.raises(ConfigError) as exc:
            load(tmp_path, {**base, key: value})
        assert where in str(exc.value) and "off" in (exc.value.hint or "")
    with pytest.raises(ConfigError) as exc:
        load(tmp_path, {**base, "tags": {"T": "TI_101", "Q": {"tag": "QI_7", "max_gap": "-5 min"}, "F": "FI_3"}})
    assert "[data.tags.Q] key 'max_gap'" in str(exc.value)


# -- through `graybox check` and `graybox fit` ---------------------------------------------------
STUDY = """
[study]
name = "receiver"
seed = 11

[model]
name = "condensate_receiver"

[model.states.L]
units = "m"
rate = "(F - k*L)/A"
initial = "estimate"
initial_bounds = [0.0, 5.0]

[model.inputs]
F = "m**3/s"

[parameters.A]
guess = 5.0
bounds = [0.5, 50.0]
units = "m**2"

[parameters.k]
guess = 0.003
bounds = [1e-4, 0.1]
units = "m**2/s"

[data]
files = ["receiver_export.csv"]
layout = "long"
time_column = "Timestamp"
time_format = "local"
timezone = "America/Chicago"
tag_column = "TagName"
value_column = "Value"
quality_column = "Quality"
good_quality = ["Good"]

[data.tags.F]
tag = "FI_405"
units = "gpm"
logging = "exception"
deadband = 1.0

[data.tags.L]
tag = "LI_410"
units = "in"
logging = "exception"
deadband = 0.1
stuck_after = "30 min"

[noise.L]
sigma = "estimate"
"""


def _warnings(lines: list[str]) -> list[str]:
    return [ln.strip() for ln in "\n".join(lines).splitlines() if ln.strip().startswith("warning:")]


def test_check_and_fit_warn_alike_and_the_fit_recovers_the_truth(export):
    """Both commands print the same warnings (the clock change, the flow outage, the level's
    Bad stretch, the frozen level); results.json keeps them with the clock change.  Split at
    the outage, the fit recovers the receiver's area and outflow coefficient (the values the
    data were generated with, in SI through the NIST SP 811 gallon and inch): k to 1%, A to 3%."""
    from graybox.workflow import check_study, fit_study

    (export / "study.toml").write_text(STUDY)
    said_check: list[str] = []
    assert check_study(export / "study.toml", echo=said_check.append, sample=False) == 0
    said_fit: list[str] = []
    doc = fit_study(export / "study.toml", export / "run", echo=said_fit.append, sample=False)
    w_check, w_fit = _warnings(said_check), _warnings(said_fit)
    assert w_check == w_fit and len(w_check) == 4
    assert any("clock change" in w for w in w_check)
    assert any("FI_405" in w and ACTION_SPLIT in w for w in w_check)
    assert any("LI_410" in w and ACTION_NONE in w for w in w_check)
    assert any("LI_410" in w and "stuck sensor" in w for w in w_check)
    saved = json.loads((export / "run" / "results.json").read_text())["data"]["main"]
    assert [f"warning: {w}" for w in saved["warnings"]] == w_fit
    assert len(saved["segments"]) == 2 and saved["clock_changes"][0]["kind"] == "back"
    p = doc["parameters"]
    assert p["k"]["estimate"] == pytest.approx(K_M2_S, rel=0.01)
    assert p["A"]["estimate"] == pytest.approx(AREA_M2, rel=0.03)


def test_many_gaps_all_in_the_report_twenty_printed(tmp_path):
    """A 20 min outage every 2 h of a sampled 1-min input, 30 times (the last one ends the
    file): 29 gaps of 21 min between rows, all in gap_list, 30 segments; the first 20 warned
    one by one, the other 9 counted in one line (the scenario's counts)."""
    from graybox.data.assemble import MAX_WARNED

    rows = []
    for i in range(30 * 120):
        if i % 120 >= 100:  # 20 min without a row every 2 h
            continue
        rows.append(f"{(T0 + pd.Timedelta(minutes=i)).isoformat()},{20 + (i % 13) / 10},{1 + (i % 7)},1")
    write(tmp_path, "m.csv", "time,TI_101,QI_7,FI_3\n" + "\n".join(rows) + "\n")
    rec, rep = load(tmp_path, {"files": ["m.csv"], "time_column": "time",
                               "tags": {"T": {"tag": "TI_101", "units": "K"}, "Q": "QI_7", "F": "FI_3"}})
    q = rep.tag("Q")
    assert q.gaps == 29 and len(q.gap_list) == 29 and len(rec.segments) == 30  # the last outage ends the file
    assert all(g["duration_s"] == 21 * 60.0 for g in q.gap_list)
    mine = [w for w in rep.warnings if "QI_7" in w]
    assert MAX_WARNED == 20 and len(mine) == MAX_WARNED + 1
    assert "9 more gaps over 15 min" in mine[-1]
