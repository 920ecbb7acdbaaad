"""One rule for the informative-window settings, used by `graybox check` and `graybox fit`
alike (they disagreed for records shorter than two days: check ranked one-day windows, fit
windows of half the record).

Reference: the defaults documented in graybox/data/config.py's key listing
(``[data.informative]`` window = "1 day", step = "6 h", top = 5); windows of half a record
shorter than two default windows, so that it still has windows to compare, is common
practice, no source."""

from __future__ import annotations

from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pytest

import graybox
from graybox.data import InputSeries, OutputSeries, Record
from graybox.data.spec import SearchSpec
from graybox.data.windows import window_plan

ROOT = Path(__file__).resolve().parents[2]
CFG = ROOT / "configs" / "storage_vessel.toml"
HOUR = 3600.0


def record(hours: float) -> Record:
    t = np.arange(0.0, hours * HOUR + 1.0, 60.0)
    return Record("r", datetime(2026, 3, 1, tzinfo=timezone.utc), {"u": InputSeries("u", t, np.ones(t.size))},
                  {"y": OutputSeries("y", t, np.zeros(t.size))})


def test_the_rule():
    long, short = window_plan(None, record(72.0)), window_plan(None, record(30.0))
    assert (long.window, long.step, long.top) == (24 * HOUR, 6 * HOUR, 5)
    assert (short.window, short.step, short.top) == (15 * HOUR, 15 * HOUR / 4, 5)
    given = window_plan(SearchSpec(2 * HOUR, HOUR, 3, {"y": 0.1}), record(30.0))
    assert (given.window, given.step, given.top, dict(given.noise)) == (2 * HOUR, HOUR, 3, {"y": 0.1})


def test_check_and_fit_rank_the_same_windows_of_a_short_record():
    study = graybox.load_study(CFG, overrides={"data": {"select": [["2026-02-09T05:00Z", "2026-02-10T11:00Z"]]}},
                               sample=False)
    checked = graybox.check(study)
    fitted = graybox.fit(study)
    assert checked.ok and fitted.windows
    assert [w.to_dict() for w in checked.reports["main"].windows] == [w.to_dict() for w in fitted.windows]
    lo, hi = fitted.prepared.problem.experiments[0].record.time_span()
    assert 29 * HOUR < hi - lo < 2 * 24 * HOUR  # a record shorter than two days: windows of half of it
    assert all(w.t_end - w.t_start == pytest.approx((hi - lo) / 2, rel=1e-12) for w in fitted.windows)
