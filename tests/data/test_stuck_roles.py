"""Stuck runs are judged on measured outputs by default (issue 13, section 4): an input held
at its setpoint by a controller is not a frozen sensor.

The scenario (of our own invention): a jacketed product tank heated by thermal oil whose
supply temperature a controller holds exactly at setpoints (a noise-free input, logged every
30 s for 3 days, the setpoint moved six times), and the product temperature, a measured
output with noise and one planted 3 h frozen stretch.  The old code flagged most of the oil
input as stuck; with stuck_action = "mask" that cut the input into pieces and the record
into many segments.  Expected counts: the planted rows, and the literal stuck rule of
test_quality.py where a tag asks for the judgement.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from graybox.data import SymbolInfo
from graybox.data.quality import REASON_STUCK

from .test_quality import _stuck_by_hand
from .util import load

N = 3 * 2880  # 3 days at 30 s
T0 = pd.Timestamp("2026-05-04T00:00Z")
MOVES = {0: 180.0, 1500: 185.0, 2600: 175.0, 4000: 182.0, 5200: 178.0, 6900: 180.0, 8000: 186.0}
FROZEN = range(3000, 3361)  # 3 h of the product temperature repeating one value
SYMBOLS = {"T": SymbolInfo("T", "output", "K"), "Toil": SymbolInfo("Toil", "input", "K")}


def _write(tmp_path):
    rng = np.random.default_rng(5)
    oil = np.zeros(N)
    for i0, sp in sorted(MOVES.items()):
        oil[i0:] = sp
    product = 60 + 0.1 * np.cumsum(rng.normal(0, 0.05, N)) + rng.normal(0, 0.05, N)
    product[list(FROZEN)] = round(product[FROZEN.start], 3)
    stamps = (T0 + pd.to_timedelta(np.arange(N) * 30, unit="s")).strftime("%Y-%m-%dT%H:%M:%SZ")
    pd.DataFrame({"time": stamps, "TI_510": np.round(product, 3), "TIC_501": oil}).to_csv(tmp_path / "oil.csv",
                                                                                          index=False)
    t_ns = pd.DatetimeIndex(pd.to_datetime(stamps)).as_unit("ns").asi8
    return t_ns, oil


def _table(stuck_action="flag", oil=None):
    oil_tag = {"tag": "TIC_501", "units": "degC", "temperature": "reading"}
    oil_tag.update(oil or {})
    return {"files": ["oil.csv"], "time_column": "time", "stuck_after": "2 h", "stuck_action": stuck_action,
            "tags": {"T": {"tag": "TI_510", "units": "degC", "temperature": "reading"}, "Toil": oil_tag}}


@pytest.mark.parametrize("action", ["flag", "mask"])
def test_a_setpoint_held_input_is_not_stuck(tmp_path, action):
    _write(tmp_path)
    rec, rep = load(tmp_path, _table(action), symbols=SYMBOLS)
    oil = rep.tag("Toil")
    assert oil.flagged == {} and oil.masked == {} and oil.stuck_after_s is None
    assert len(rec.segments) == 1 and rec.inputs["Toil"].t.size == N
    # the product temperature (an output) is judged: exactly its planted frozen rows
    t = rep.tag("T")
    got = t.masked if action == "mask" else t.flagged
    assert got == {REASON_STUCK: len(FROZEN)} and t.stuck_after_s == 7200.0


def test_an_input_is_judged_when_its_tag_asks(tmp_path):
    """stuck_after on the input's tag turns the judgement on (the literal rule as reference);
    "off" on an output turns it off."""
    t_ns, oil = _write(tmp_path)
    rec, rep = load(tmp_path, _table(oil={"stuck_after": "2 h"}), symbols=SYMBOLS)
    want = _stuck_by_hand(t_ns, oil, np.ones(N, bool), 0.0, 7200.0)
    assert want.sum() > N // 2  # held at setpoints most of the time
    assert rep.tag("Toil").flagged == {REASON_STUCK: int(want.sum())}
    assert len(rep.tag("Toil").stuck_runs) == sum(1 for a, b in zip(sorted(MOVES), sorted(MOVES)[1:] + [N])
                                                  if (b - 1 - a) * 30 >= 7200)
    table = _table()
    table["tags"]["T"]["stuck_after"] = "off"
    _, rep = load(tmp_path, table, symbols=SYMBOLS)
    assert rep.tag("T").flagged == {} and rep.tag("T").stuck_after_s is None


def test_experiment_stuck_after_off(tmp_path):
    _write(tmp_path)
    table = _table()
    table["stuck_after"] = "off"
    _, rep = load(tmp_path, table, symbols=SYMBOLS)
    assert rep.tag("T").flagged == {} and "stuck: not judged" in rep.summary()
