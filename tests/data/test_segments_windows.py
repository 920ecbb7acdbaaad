"""Rates, holds, segments, selected and excluded windows, the fit/validation split.

Expected values come from the scenario's own construction (times and values written out
by the test); pandas Timestamps are the reference for instants.
"""

from datetime import timedelta

import numpy as np
import pandas as pd
import pytest

from graybox.data import SymbolInfo, split_record
from graybox.errors import DataError

from .util import load

T0 = pd.Timestamp("2026-03-02T00:00Z")


def two_rate_file(tmp_path, hours=24, gap=None):
    """Inputs every minute, the output every 5 minutes at odd offsets (t = 2 min + 5 k)."""
    n = hours * 60
    rows = []
    for i in range(n):
        if gap and gap[0] <= i < gap[1]:
            continue
        rows.append((T0 + pd.Timedelta(minutes=i), "QI_7", 1.0 + (i // 120)))
        rows.append((T0 + pd.Timedelta(minutes=i), "FI_3", 3600.0))
        if i % 5 == 2:
            rows.append((T0 + pd.Timedelta(minutes=i), "TI_101", 20.0 + i / 100))
    df = pd.DataFrame(rows, columns=["time", "tag", "value"])
    df["time"] = df["time"].map(lambda x: x.isoformat())
    df.to_csv(tmp_path / "l.csv", index=False)
    return {"files": ["l.csv"], "layout": "long", "time_column": "time", "max_gap": "10 min",
            "tags": {"T": {"tag": "TI_101", "units": "degC", "temperature": "reading"},
                     "Q": {"tag": "QI_7", "units": "kW"}, "F": {"tag": "FI_3", "units": "kg/h"}}}


def test_outputs_only_where_measured_and_holds_as_declared(tmp_path):
    table = two_rate_file(tmp_path)
    syms = {"T": SymbolInfo("T", "output", "degC"), "Q": SymbolInfo("Q", "input", "W", "linear"),
            "F": SymbolInfo("F", "input", "kg/s")}
    rec, rep = load(tmp_path, table, symbols=syms)
    assert rec.start_utc == T0.to_pydatetime()
    np.testing.assert_array_equal(rec.outputs["T"].t, 60.0 * np.arange(2, 24 * 60, 5))
    assert rec.inputs["Q"].t.size == 24 * 60 and rec.inputs["Q"].hold == "linear"
    assert rec.inputs["F"].hold == "previous"
    assert rep.tag("T").median_interval_s == 300.0 and rep.tag("Q").median_interval_s == 60.0


def test_input_gap_splits_segments_and_outputs_inside_are_outside(tmp_path):
    table = two_rate_file(tmp_path, gap=(600, 660))
    rec, rep = load(tmp_path, table)
    assert [(s.t_start, s.t_end) for s in rec.segments] == [(0.0, 599 * 60.0), (660 * 60.0, (24 * 60 - 1) * 60.0)]
    assert len(rep.segments) == 2 and rep.tag("Q").gaps == 1


def test_select_and_exclude_windows(tmp_path):
    table = two_rate_file(tmp_path)
    table["select"] = [["2026-03-02T02:00Z", "2026-03-02T08:00Z"], ["2026-03-02T12:00Z", "2026-03-02T18:00Z"]]
    table["exclude"] = [["2026-03-02T04:00Z", "2026-03-02T05:00Z"]]
    rec, rep = load(tmp_path, table)
    t = rec.outputs["T"].t + (rec.start_utc - T0.to_pydatetime()).total_seconds()
    hours = t / 3600
    assert ((hours >= 2) & (hours < 8) | (hours >= 12) & (hours < 18)).all()
    assert not ((hours >= 4) & (hours < 5)).any()
    assert len(rec.segments) == 3  # 02-04, 05-08, 12-18
    assert rep.tag("T").outside_windows == 288 - rec.outputs["T"].t.size
    assert rec.start_utc == (T0 + pd.Timedelta(hours=2)).to_pydatetime()


def test_window_that_selects_nothing_is_an_error(tmp_path):
    table = two_rate_file(tmp_path)
    table["select"] = [["2026-04-01T00:00Z", "2026-04-02T00:00Z"]]
    with pytest.raises(DataError) as exc:
        load(tmp_path, table)
    text = str(exc.value)
    assert "selects nothing" in text and "key 'select'" in text and "2026-03-02T00:00:00+00:00" in text


def test_local_window_bounds_resolve_in_the_declared_zone(tmp_path):
    table = two_rate_file(tmp_path)
    table.update(timezone="Europe/Berlin", select=[["2026-03-02 03:00", "2026-03-02 09:00"]])  # CET = UTC+1
    rec, _ = load(tmp_path, table)
    assert rec.start_utc == (T0 + pd.Timedelta(hours=2)).to_pydatetime()


def test_split_by_fraction_and_instant(tmp_path):
    table = two_rate_file(tmp_path)
    table["holdout"] = 0.25
    rec, rep = load(tmp_path, table)
    assert rep.holdout == 0.25
    fit, val = split_record(rec, 0.25)
    lo, hi = rec.time_span()
    cut = hi - 0.25 * (hi - lo)
    assert (fit.outputs["T"].t < cut).all() and (val.outputs["T"].t >= cut).all()
    assert fit.outputs["T"].t.size + val.outputs["T"].t.size == rec.outputs["T"].t.size
    # the validation inputs start with the value holding at the split
    assert val.inputs["Q"].t[0] < cut <= val.inputs["Q"].t[1]
    assert val.inputs["Q"].at([cut])[0] == rec.inputs["Q"].at([cut])[0]
    assert val.start_utc == rec.start_utc
    fit2, val2 = split_record(rec, (T0 + pd.Timedelta(hours=18)).to_pydatetime())
    assert fit2.outputs["T"].t.max() < 18 * 3600 <= val2.outputs["T"].t.min()
    with pytest.raises(DataError, match="outside the record"):
        split_record(rec, (T0 + pd.Timedelta(days=3)).to_pydatetime())


def test_every_output_row_masked_is_an_error(tmp_path):
    table = two_rate_file(tmp_path)
    table["tags"]["T"]["valid"] = [100, 200]
    with pytest.raises(DataError) as exc:
        load(tmp_path, table)
    text = str(exc.value)
    assert "every sample of output 'T' (tag 'TI_101') is masked" in text and "outside valid range" in text
    assert "[data.tags.T] key 'tag'" in text
