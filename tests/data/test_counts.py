"""The data layer counts what it sees (issue 13, section 4, and the NaN/inf item of section 7).

The messy export of ``messy_export.py`` (our own invented scenario, known truth): every
count below is the scenario's construction (rows it left out, made bad, froze, wrote as
"nan" or "inf", and minutes in which the historian stored no new value), never graybox's
own output.  The old code thinned held repeats before judging quality and stuck runs, so it
reported the 90 Bad rows as 1 masked and the frozen level not at all.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest

from graybox.data import SymbolInfo
from graybox.data.quality import REASON_INF, REASON_NAN, REASON_QUALITY, REASON_STUCK, held_repeats

from . import messy_export as mx
from .util import check, load, write

SYMBOLS = {"F": SymbolInfo("F", "input", "m**3/s"), "L": SymbolInfo("L", "output", "m")}


@pytest.fixture(scope="module")
def truth():
    return mx.scenario()


@pytest.fixture()
def export(tmp_path, truth):
    mx.write_export(tmp_path, truth)
    return tmp_path


def _level_repeats(truth) -> tuple[int, int]:
    """Level rows that repeat the row before, neither Bad (the scenario's stored values), and
    how many of them lie in the frozen stretch."""
    n = inside = 0
    for m in range(1, mx.MINUTES):
        if m in mx.BAD or (m - 1) in mx.BAD:
            continue
        if truth.level_stored[m] == truth.level_stored[m - 1]:
            n += 1
            inside += m in mx.FROZEN
    return n, inside


def _flow_repeats(truth) -> int:
    """Flow rows that repeat the row before (both numbers, no outage between them)."""
    rows = dict(truth.flow_rows)
    n = 0
    for m in range(1, mx.MINUTES):
        if m in rows and (m - 1) in rows:
            a, b = rows[m - 1], rows[m]
            if a not in ("NaN", "nan", "inf", "-inf") and a == b:
                n += 1
    return n


def test_each_reason_counted_on_the_messy_export(export, truth):
    rec, rep = load(export, mx.data_table(), symbols=SYMBOLS)
    level, flow = rep.tag("L"), rep.tag("F")
    # the level: 90 Bad rows are 90 bad rows (all one garbage value, so the old code thinned
    # 89 of them as repeats first); the 41 frozen rows are a stuck run; repeats come last
    assert level.rows_read == mx.MINUTES
    assert level.masked == {REASON_QUALITY: len(mx.BAD)}
    assert level.flagged == {REASON_STUCK: len(mx.FROZEN)}
    n_rep, n_rep_frozen = _level_repeats(truth)
    assert n_rep_frozen == len(mx.FROZEN) - 1
    assert level.held_repeats_dropped == n_rep and level.held_repeats_in_stuck == n_rep_frozen
    assert len(level.stuck_runs) == 1
    run = level.stuck_runs[0]
    assert pd.Timestamp(run["start_utc"]).value == mx.minute_ns(mx.FROZEN.start)
    assert pd.Timestamp(run["end_utc"]).value == mx.minute_ns(mx.FROZEN.stop - 1)
    assert run["rows"] == len(mx.FROZEN) and run["duration_s"] == 60.0 * (len(mx.FROZEN) - 1)
    # the level's observations: every row that is neither a repeat nor Bad is one
    obs = rec.outputs["L"]
    assert obs.t.size == mx.MINUTES - n_rep
    assert obs.n_valid == mx.MINUTES - n_rep - len(mx.BAD)
    # the flow: its cells that are not numbers or infinite counted, each its own reason
    assert flow.rows_read == mx.MINUTES - len(mx.OUTAGE)
    assert flow.masked == {REASON_NAN: len(mx.NAN_CELLS), REASON_INF: len(mx.INF_CELLS)}
    assert flow.flagged == {}  # an input is not judged stuck by default
    assert flow.held_repeats_dropped == _flow_repeats(truth)
    # every row is accounted for exactly once: used, masked, or a held repeat
    assert rec.inputs["F"].t.size == flow.valid
    assert flow.valid + flow.masked_total + flow.held_repeats_dropped == flow.rows_read
    assert level.valid + level.masked_total + level.held_repeats_dropped == level.rows_read


def test_counts_reach_the_summary_and_the_report_dict(export):
    _, rep = load(export, mx.data_table(), symbols=SYMBOLS)
    text = rep.summary()
    assert f"masked {len(mx.BAD)} (bad quality flag)" in text
    assert f"flagged {len(mx.FROZEN)} (stuck sensor, not masked)" in text
    assert f"masked {len(mx.NAN_CELLS)} (not a number" in text and f"masked {len(mx.INF_CELLS)} (infinite)" in text
    d = json.loads(json.dumps(rep.to_dict()))  # results.json holds it as JSON
    tags = {t["symbol"]: t for t in d["tags"]}
    assert tags["L"]["masked"] == {REASON_QUALITY: len(mx.BAD)}
    assert tags["F"]["masked"] == {REASON_NAN: len(mx.NAN_CELLS), REASON_INF: len(mx.INF_CELLS)}
    assert tags["L"]["stuck_runs"][0]["rows"] == len(mx.FROZEN)
    assert any("stuck sensor" in w and "LI_410" in w and "40 min" in w for w in d["warnings"])


def test_stuck_masked_when_asked_thins_no_frozen_row(export, truth):
    """stuck_action = "mask": the frozen rows are masked as stuck and kept as masked rows (a
    masked row is never a held repeat), so the repeats are the others only."""
    rec, rep = load(export, mx.data_table(stuck_action="mask"), symbols=SYMBOLS)
    level = rep.tag("L")
    n_rep, n_rep_frozen = _level_repeats(truth)
    assert level.masked == {REASON_QUALITY: len(mx.BAD), REASON_STUCK: len(mx.FROZEN)}
    assert level.flagged == {} and level.held_repeats_in_stuck == 0
    # the first row after the frozen stretch is new by construction; inside it nothing is a repeat
    assert level.held_repeats_dropped == n_rep - n_rep_frozen
    assert rec.outputs["L"].n_valid == mx.MINUTES - (n_rep - n_rep_frozen) - len(mx.BAD) - len(mx.FROZEN)


def test_held_repeats_never_cross_a_masked_row():
    """The rule read literally: a repeat is an unmasked row equal to the unmasked row right
    before it (reference: a plain loop over the rows)."""
    rng = np.random.default_rng(3)
    v = rng.integers(0, 3, 2000).astype(float)
    masked = rng.random(2000) < 0.2
    want = [i > 0 and not masked[i] and not masked[i - 1] and v[i] == v[i - 1] for i in range(v.size)]
    np.testing.assert_array_equal(held_repeats(v, masked), want)
    np.testing.assert_array_equal(held_repeats(v), [i > 0 and v[i] == v[i - 1] for i in range(v.size)])


# -- values that are not numbers, or infinite ------------------------------------------------
def _wide(tmp_path, cells: list[str], no_value=None):
    lines = ["time,TI_101,QI_7,FI_3"] + [f"2026-01-01T00:{i:02d}:00Z,{c},1,1" for i, c in enumerate(cells)]
    write(tmp_path, "w.csv", "\n".join(lines) + "\n")
    table = {"files": ["w.csv"], "time_column": "time", "tags": {"T": {"tag": "TI_101", "units": "K"}, "Q": "QI_7",
                                                                 "F": "FI_3"}}
    if no_value is not None:
        table["no_value"] = no_value
    return table


@pytest.mark.parametrize("cells, n_nan, n_inf, n_blank", [
    (["1", "nan", "2", "inf", "3", "-inf", "", "4"], 1, 2, 1),  # text column (pandas keeps "nan" text)
    (["1", "2", "inf", "3", "Infinity", "-inf", "", "4"], 0, 3, 1),  # numeric column (pandas parses inf)
    (["1", "NaN", "NAN", "+nan", "5", "1e400", "6", "7"], 3, 1, 0),  # any case; 1e400 overflows to inf
])
def test_nan_and_inf_cells_are_counted_as_their_own_reasons(tmp_path, cells, n_nan, n_inf, n_blank):
    """Counts are the cells written (Python's float() as the reference for what is infinite:
    float('1e400') == inf)."""
    assert sum(1 for c in cells if c.strip() and math.isinf(float(c))) == n_inf
    rec, rep = load(tmp_path, _wide(tmp_path, cells))
    t = rep.tag("T")
    want = {k: v for k, v in ((REASON_NAN, n_nan), (REASON_INF, n_inf)) if v}
    assert t.masked == want and t.blank_cells == n_blank
    assert t.rows_read == len(cells) - n_blank
    assert rec.outputs["T"].n_valid == len(cells) - n_blank - n_nan - n_inf


def test_nan_listed_in_no_value_is_a_blank(tmp_path):
    """The user says what a text means: listed in no_value, "nan" is a cell without a value."""
    _, rep = load(tmp_path, _wide(tmp_path, ["1", "nan", "2", "NaN"], no_value=["", "nan", "NaN"]))
    assert rep.tag("T").masked == {} and rep.tag("T").blank_cells == 2


def test_other_text_is_still_a_located_error(tmp_path):
    from graybox.errors import DataError

    with pytest.raises(DataError) as exc:
        load(tmp_path, _wide(tmp_path, ["1", "nan(ind)", "2"]))
    assert "'nan(ind)' is not a number" in str(exc.value) and "w.csv line 3" in str(exc.value)


def test_parquet_stored_nan_is_not_a_null(tmp_path):
    """A Parquet float column holds nulls (no value) and NaNs (a value that is not a
    number) apart; pyarrow writes both as asked (reference: pyarrow's own null count)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    values = pa.array([1.0, None, float("nan"), 2.0, float("inf"), None, float("nan"), 3.0],
                      type=pa.float64(), from_pandas=False)
    assert values.null_count == 2
    stamps = [f"2026-01-01T00:{i:02d}:00Z" for i in range(len(values))]
    table = pa.table({"time": stamps, "TI_101": values, "QI_7": [1.0] * len(values), "FI_3": [1.0] * len(values)})
    pq.write_table(table, tmp_path / "w.parquet")
    _, rep = load(tmp_path, {"files": ["w.parquet"], "time_column": "time",
                             "tags": {"T": {"tag": "TI_101", "units": "K"}, "Q": "QI_7", "F": "FI_3"}})
    t = rep.tag("T")
    assert t.blank_cells == 2 and t.masked == {REASON_NAN: 2, REASON_INF: 1} and t.rows_read == 6


def test_long_table_nan_per_tag(tmp_path):
    """In a long table each tag's cells are counted for that tag only."""
    write(tmp_path, "l.csv", "time,tag,value\n"
          "2026-01-01T00:00:00Z,TI_101,10\n2026-01-01T00:00:00Z,QI_7,nan\n2026-01-01T00:00:00Z,FI_3,1\n"
          "2026-01-01T00:01:00Z,TI_101,inf\n2026-01-01T00:01:00Z,QI_7,2\n2026-01-01T00:01:00Z,FI_3,1\n"
          "2026-01-01T00:02:00Z,TI_101,11\n2026-01-01T00:02:00Z,QI_7,3\n2026-01-01T00:02:00Z,FI_3,NaN\n")
    _, rep = load(tmp_path, {"files": ["l.csv"], "layout": "long", "time_column": "time",
                             "tags": {"T": {"tag": "TI_101", "units": "K"}, "Q": "QI_7", "F": "FI_3"}})
    assert rep.tag("T").masked == {REASON_INF: 1}
    assert rep.tag("Q").masked == {REASON_NAN: 1}
    assert rep.tag("F").masked == {REASON_NAN: 1}


def test_check_reports_the_counts_too(export):
    rep = check(export, mx.data_table(), symbols=SYMBOLS)
    assert rep.ok
    assert rep.tag("L").masked == {REASON_QUALITY: len(mx.BAD)}
    assert rep.tag("L").flagged == {REASON_STUCK: len(mx.FROZEN)}
