"""The time axis is declared, never guessed: a time column for a model with states, the
experiment's start (declared, or the first time stamp of the data), elapsed-time columns in
declared units, and rows out of order or stamped twice counted and reported."""

from __future__ import annotations

from datetime import datetime, timezone

import numpy as np
import pandas as pd
import pytest

from graybox.data.time_axis import START_DATA, START_DECLARED, START_SELECT
from graybox.errors import ConfigError, DataError
from graybox.workflow import check_study, fit_study

from .util import VESSEL, check, load, write

VESSEL_ROWS = ("2026-01-01T00:00:00Z,,,\n"  # the run starts here; nothing logged yet
               "2026-01-01T00:10:00Z,20,1000,0.5\n2026-01-01T00:20:00Z,21,1000,0.5\n"
               "2026-01-01T00:30:00Z,22,1000,0.5\n")
TAGS = {"T": "TI_101", "Q": "QI_7", "F": "FI_3"}


def _vessel(tmp_path, extra: dict | None = None, rows: str = VESSEL_ROWS, name: str = "v.csv") -> dict:
    write(tmp_path, name, "time,TI_101,QI_7,FI_3\n" + rows)
    return {"files": [name], "time_column": "time", "tags": TAGS, **(extra or {})}


# -- a time column for a model with states ----------------------------------------------------
def test_model_with_states_needs_a_time_column(tmp_path):
    """A model with states simulated on row numbers as seconds is a guess: it is refused, at
    the data table's time_column, with a hint (rule of the project: never guessed)."""
    write(tmp_path, "s.csv", "TI_101,QI_7,FI_3\n20,1,1\n21,1,1\n")
    table = {"files": ["s.csv"], "tags": TAGS}
    for run in (lambda: load_dyn(tmp_path, table), lambda: check(tmp_path, table, dynamic=True)):
        with pytest.raises(DataError) as err:
            run()
        assert "[data]" in err.value.where and "time_column" in err.value.where
        assert "time_column" in err.value.hint


def load_dyn(tmp_path, table):
    from graybox.data import load_experiment

    return load_experiment(table, "main", symbols=VESSEL, base_dir=tmp_path, where=f"{tmp_path / 'cfg.toml'} [data]",
                           dynamic=True)


def test_static_model_keeps_row_order(tmp_path):
    """A static model may take the rows in order: row i at i seconds (as before)."""
    write(tmp_path, "s.csv", "TI_101,QI_7,FI_3\n20,1,1\n21,1,1\n22,1,1\n")
    rec, _ = load(tmp_path, {"files": ["s.csv"], "tags": TAGS})
    np.testing.assert_array_equal(rec.outputs["T"].t, [0.0, 1.0, 2.0])


# -- the start -------------------------------------------------------------------------------------
def test_start_is_the_first_time_stamp_even_without_values(tmp_path):
    """A row with a time stamp and no value says when the run started: t = 0 is there, the
    first segment begins there, and the first observation lies 10 min (600 s) later."""
    rec, rep = load(tmp_path, _vessel(tmp_path))
    assert rec.start_utc == datetime(2026, 1, 1, tzinfo=timezone.utc)
    assert rec.segments[0].t_start == 0.0
    np.testing.assert_array_equal(rec.outputs["T"].t, [600.0, 1200.0, 1800.0])
    assert rep.start_from == START_DATA and rep.start_utc.startswith("2026-01-01T00:00:00")
    assert rep.tag("T").first_valid_utc.startswith("2026-01-01T00:10:00")
    text = rep.summary()
    assert "start: 2026-01-01T00:00:00Z" in text
    assert "first observation: T 2026-01-01T00:10:00Z (start + 10 min)" in text


def test_declared_start_before_and_after_the_data(tmp_path):
    """A declared start (ISO with offset, or local in the time zone) is t = 0; samples before
    a later start are dropped and counted (zoneinfo: Europe/Berlin is UTC+1 in January)."""
    rec, rep = load(tmp_path, _vessel(tmp_path, {"start": "2025-12-31T23:50:00Z"}))
    assert rep.start_from == START_DECLARED
    np.testing.assert_array_equal(rec.outputs["T"].t, [1200.0, 1800.0, 2400.0])
    rec, rep = load(tmp_path, _vessel(tmp_path, {"start": "2026-01-01T01:15:00", "timezone": "Europe/Berlin"}))
    assert rec.start_utc == datetime(2026, 1, 1, 0, 15, tzinfo=timezone.utc)
    np.testing.assert_array_equal(rec.outputs["T"].t, [300.0, 900.0])
    assert rep.tag("T").before_start == 1 and rep.tag("Q").before_start == 1
    assert "1 samples before the start dropped" in rep.summary()


def test_select_window_opening_later_moves_the_start(tmp_path):
    """A selected window that opens after the first stamp starts the experiment at its opening;
    one that opens before leaves the start at the first stamp."""
    rec, rep = load(tmp_path, _vessel(tmp_path, {"select": [["2026-01-01T00:05:00Z", "2026-01-02T00:00Z"]]}))
    assert rep.start_from == START_SELECT
    assert rec.start_utc == datetime(2026, 1, 1, 0, 5, tzinfo=timezone.utc)
    np.testing.assert_array_equal(rec.outputs["T"].t, [300.0, 900.0, 1500.0])
    rec, rep = load(tmp_path, _vessel(tmp_path, {"select": [["2025-12-31T00:00Z", "2026-01-02T00:00Z"]]}))
    assert rep.start_from == START_DATA and rec.outputs["T"].t[0] == 600.0


def test_start_needs_a_time_column_and_the_right_kind_of_value(tmp_path):
    """Bad starts are located errors: without a time column; a number on a calendar time
    axis; text on an elapsed one."""
    write(tmp_path, "s.csv", "TI_101,QI_7,FI_3\n20,1,1\n")
    with pytest.raises(ConfigError, match="time column") as err:
        load(tmp_path, {"files": ["s.csv"], "tags": TAGS, "start": 0})
    assert "start" in err.value.where
    with pytest.raises(ConfigError) as err:
        load(tmp_path, _vessel(tmp_path, {"start": 0}))
    assert "start" in err.value.where
    with pytest.raises(ConfigError, match="elapsed") as err:
        load(tmp_path, _elapsed(tmp_path, "min", {"start": "2026-01-01T00:00Z"}))
    assert "start" in err.value.where


# -- elapsed time in declared units -------------------------------------------------------------
def _elapsed(tmp_path, units, extra=None, rows="0,,,\n20,20,1,1\n40,21,1,1\n90.5,22,1,1\n"):
    write(tmp_path, "e.csv", "t,TI_101,QI_7,FI_3\n" + rows)
    return {"files": ["e.csv"], "time_column": "t", "time_format": "elapsed", "time_units": units, "tags": TAGS,
            **(extra or {})}


@pytest.mark.parametrize("units, seconds", [("s", 1.0), ("min", 60.0), ("h", 3600.0), ("hour", 3600.0),
                                            ("day", 86400.0)])
def test_elapsed_time_units_convert_by_their_si_factors(tmp_path, units, seconds):
    """Elapsed time in the declared units: NIST SP 811 (2008), Table 6: 1 min = 60 s,
    1 h = 3600 s, 1 d = 86 400 s (from memory; pint's definitions agree)."""
    rec, rep = load(tmp_path, _elapsed(tmp_path, units))
    np.testing.assert_allclose(rec.outputs["T"].t, np.array([20.0, 40.0, 90.5]) * seconds, rtol=0, atol=1e-9)
    assert rec.segments[0].t_start == 0.0
    assert f"start: 0 {units} (the first time stamp of the data)" in rep.summary()
    assert f"first observation: T 20 {units} (start + 20 {units})" in rep.summary()


def test_elapsed_start_and_windows_are_numbers_in_the_time_units(tmp_path):
    """On elapsed time the start and the windows are numbers in time_units (h here:
    1 h = 3600 s, NIST SP 811)."""
    rec, rep = load(tmp_path, _elapsed(tmp_path, "h", {"start": -1, "exclude": [[30, 50]]}))
    # the windows are on the table's own elapsed time: the sample at 40 h is excluded
    np.testing.assert_allclose(rec.outputs["T"].t, np.array([21.0, 91.5]) * 3600.0)
    assert rep.tag("T").outside_windows == 1
    assert len(rec.segments) == 2 and rec.segments[1].t_start == pytest.approx(51 * 3600.0)
    with pytest.raises(ConfigError, match="fraction") as err:
        load(tmp_path, _elapsed(tmp_path, "h", {"holdout": "2026-01-01T00:00Z"}))
    assert "holdout" in err.value.where


@pytest.mark.parametrize("units, words", [("minn", "is not a unit"), ("m", "not a unit of time"),
                                          ("kg/h", "not a unit of time"), ("", "time unit as text")])
def test_bad_time_units_are_located_errors(tmp_path, units, words):
    """A time unit pint does not know, or a unit of another dimension, is refused at the key."""
    with pytest.raises(ConfigError, match=words) as err:
        load(tmp_path, _elapsed(tmp_path, units))
    assert "time_units" in err.value.where


def test_elapsed_needs_units_and_units_need_elapsed(tmp_path):
    """time_units is declared with elapsed time, and only there (ISO stamps carry their own)."""
    table = _elapsed(tmp_path, "min")
    del table["time_units"]
    with pytest.raises(ConfigError, match="units declared") as err:
        load(tmp_path, table)
    assert "time_format" in err.value.where
    with pytest.raises(ConfigError, match="their own units") as err:
        load(tmp_path, _vessel(tmp_path, {"time_units": "min"}))
    assert "time_units" in err.value.where


# -- rows out of order, rows stamped twice ------------------------------------------------------
def test_rows_out_of_order_are_sorted_and_counted(tmp_path):
    """Rows stamped before the row above them are sorted into time order (pandas' stable
    sort is the reference) and counted (a literal row-by-row count is the reference); the
    first such row is named with its line."""
    stamps = [0, 1, 2, 5, 3, 4, 6, 9, 7, 8, 10]
    rows = "".join(f"2026-01-01T00:{m:02d}:00Z,{20 + m},1,1\n" for m in stamps)
    rec, rep = load(tmp_path, _vessel(tmp_path, rows=rows))
    frame = pd.DataFrame({"m": stamps, "v": [20.0 + m for m in stamps]}).sort_values("m", kind="stable")
    np.testing.assert_array_equal(rec.outputs["T"].t, frame["m"].to_numpy() * 60.0)
    np.testing.assert_array_equal(rec.outputs["T"].values, frame["v"].to_numpy())  # K, as logged
    literal = sum(1 for a, b in zip(stamps, stamps[1:]) if b < a)
    t = rep.tag("T")
    assert t.out_of_order == literal == 2
    assert "line 6" in t.out_of_order_example and "after" in t.out_of_order_example and "line 5" in t.out_of_order_example
    assert "2 rows stamped before the row above them, sorted into time order" in rep.summary()


def test_files_in_any_order_are_not_rows_out_of_order(tmp_path):
    """Files listed late-first are sorted as wholes: no row of a file is out of order."""
    write(tmp_path, "b.csv", "time,TI_101,QI_7,FI_3\n2026-01-02T00:00:00Z,30,1,1\n2026-01-02T00:01:00Z,31,1,1\n")
    write(tmp_path, "a.csv", "time,TI_101,QI_7,FI_3\n2026-01-01T00:00:00Z,20,1,1\n2026-01-01T00:01:00Z,21,1,1\n")
    rec, rep = load(tmp_path, {"files": ["b.csv", "a.csv"], "time_column": "time", "tags": TAGS, "max_gap": "2 day"})
    assert rep.tag("T").out_of_order == 0
    np.testing.assert_array_equal(rec.outputs["T"].values, [20, 21, 30, 31])


def test_duplicates_and_backward_rows_are_reported_by_reason(tmp_path):
    """Same tag, same instant: identical rows dropped and counted, conflicting ones counted
    with the first recorded kept (pandas' drop_duplicates(keep="first") after a stable sort
    is the reference); backward rows counted apart."""
    rows = ("2026-01-01T00:00:00Z,10,1,1\n2026-01-01T00:02:00Z,12,1,1\n2026-01-01T00:01:00Z,11,1,1\n"
            "2026-01-01T00:01:00Z,11,1,1\n2026-01-01T00:02:00Z,12.5,1,1\n")
    rec, rep = load(tmp_path, _vessel(tmp_path, rows=rows))
    frame = pd.DataFrame({"m": [0, 2, 1, 1, 2], "v": [10, 12, 11, 11, 12.5]})
    ref = frame.sort_values("m", kind="stable").drop_duplicates("m", keep="first")
    np.testing.assert_allclose(rec.outputs["T"].values, ref["v"].to_numpy())
    t = rep.tag("T")
    assert (t.exact_duplicates, t.conflicting_duplicates, t.out_of_order) == (1, 1, 1)
    text = rep.summary()
    assert "1 exact duplicate rows dropped" in text and "1 conflicting duplicates (first kept" in text
    assert "1 rows stamped before the row above them" in text


# -- through a fit: the initial state applies at the start --------------------------------------
K_TRUE = 0.0125  # 1/min
X0 = 2.0  # mol/m**3, known at t = 0

DECAY_STUDY = """
[study]
name = "decay"
seed = 7

[model]
name = "first_order_decay"

[model.states.x]
units = "mol/m**3"
rate = "-k*x"
initial = 2.0

[parameters.k]
guess = 5e-4
bounds = [1e-6, 1e-1]
units = "1/s"

[data]
files = ["batch.csv"]
time_column = "t_min"
time_format = "elapsed"
time_units = "min"

[data.tags]
x = "C_A"
"""


def _decay_study(tmp_path) -> str:
    minutes = np.arange(20.0, 201.0, 20.0)
    lines = ["t_min,C_A", "0,"] + [f"{m:g},{float(X0 * np.exp(-K_TRUE * m))!r}" for m in minutes]
    (tmp_path / "batch.csv").write_text("\n".join(lines) + "\n")
    path = tmp_path / "decay.toml"
    path.write_text(DECAY_STUDY)
    return str(path)


def test_known_initial_state_applies_at_the_start_analytic_decay(tmp_path):
    """dx/dt = -k x, x(0) = x0 known, first sample at 20 min: the analytic solution
    x0 exp(-k t) sampled without noise is fitted back to k = 0.0125/min (= 2.0833e-4 /s)
    only if the initial state applies at t = 0 (applied at the first sample it would not)."""
    doc = fit_study(_decay_study(tmp_path), tmp_path / "run", echo=lambda _m: None, sample=False)
    assert doc["parameters"]["k"]["estimate"] == pytest.approx(K_TRUE / 60.0, rel=1e-5)
    assert doc["data"]["main"]["start_from"] == START_DATA


def test_check_prints_the_start_and_the_first_observation(tmp_path):
    """`graybox check` shows where the initial state applies and when each output is first
    observed (20 min after the start)."""
    out: list[str] = []
    assert check_study(_decay_study(tmp_path), echo=out.append) == 0
    text = "\n".join(out)
    assert "start: 0 min (the first time stamp of the data); the initial state applies here" in text
    assert "first observation: x 20 min (start + 20 min)" in text


def test_given_and_measured_initial_states_cannot_start_apart(tmp_path):
    """A state given at the start and one started from its first measurement 20 min later
    cannot both start at one instant: an error, with a hint (never a silent shift)."""
    study = DECAY_STUDY.replace('[parameters.k]', '[model.states.y]\nunits = "mol/m**3"\nrate = "k*x"\n'
                                                  'initial = "measured"\n\n[parameters.k]')
    study = study.replace('x = "C_A"', 'x = "C_A"\ny = "C_B"')
    minutes = np.arange(20.0, 201.0, 20.0)
    lines = ["t_min,C_A,C_B", "0,,"] + [f"{m:g},{float(X0 * np.exp(-K_TRUE * m))!r},{float(X0 * (1 - np.exp(-K_TRUE * m)))!r}"
                                         for m in minutes]
    (tmp_path / "batch.csv").write_text("\n".join(lines) + "\n")
    (tmp_path / "two.toml").write_text(study)
    with pytest.raises(DataError, match="cannot start at one instant") as err:
        fit_study(tmp_path / "two.toml", tmp_path / "run", echo=lambda _m: None, sample=False)
    assert "'y'" in err.value.hint
