"""check_experiment: the data part of `graybox check` (per-tag numbers, problems, windows).

The windows come from the same hand-derived first-order sensitivities as
test_informative.py (checked there against scipy's solve_ivp)."""

import json

import numpy as np
import pandas as pd

from graybox.data import SymbolInfo

from .test_informative import DAY, STEPS, first_order_sensitivities
from .util import check

SYMS = {"y": SymbolInfo("y", "output", "K"), "u": SymbolInfo("u", "input", "kg/s")}


def write_plant(tmp_path):
    rng = np.random.default_rng(11)
    t = np.arange(0.0, 60 * DAY, 600.0)
    u = 1.0 + rng.normal(0, 0.002, t.size)
    for s in STEPS:
        u[(t >= s) & (t < s + 8 * 3600)] += 0.5
    stamps = (pd.Timestamp("2026-05-01T00:00Z") + pd.to_timedelta(t, unit="s")).strftime("%Y-%m-%dT%H:%M:%SZ")
    pd.DataFrame({"time": stamps, "TI_9": 300 + rng.normal(0, 0.1, t.size), "FI_9": np.round(u, 5)}).to_csv(
        tmp_path / "plant.csv", index=False)
    return {"files": ["plant.csv"], "time_column": "time", "max_gap": "30 min",
            "informative": {"window": "1 day", "step": "6 h", "top": 3, "noise": {"y": 0.1}},
            "tags": {"y": "TI_9", "u": "FI_9"}}


def test_check_reports_and_ranks_windows(tmp_path):
    table = write_plant(tmp_path)
    rep = check(tmp_path, table, symbols=SYMS, sensitivity_fn=first_order_sensitivities)
    assert rep.ok and len(rep.windows) == 3
    for w in rep.windows:
        assert any(w.t_start <= s < w.t_end for s in STEPS)
    text = rep.summary()
    assert "informative windows" in text and "#1" in text and "FI_9" in text
    d = rep.to_dict()
    json.dumps(d)
    assert d["ok"] and len(d["windows"]) == 3 and d["tags"][0]["rows_read"] == 8640


def test_check_without_sensitivities_still_reports(tmp_path):
    table = write_plant(tmp_path)
    rep = check(tmp_path, table, symbols=SYMS)
    assert rep.ok and rep.windows == ()
    assert rep.tag("u").median_interval_s == 600.0 and rep.tag("u").coverage_pct == 100.0
