"""Clock changes met in local stamps are reported (issue 13, section 4: the fall-back hour
was resolved correctly but never mentioned).

The reference is the IANA tz database through Python's zoneinfo: transition instants are
found by scanning zoneinfo's offsets, never typed in, and each stamp's wall time is
zoneinfo's reading of a UTC instant.  The old code reported nothing.
"""

from __future__ import annotations

from datetime import datetime, timedelta, timezone
from zoneinfo import ZoneInfo

import pytest

from graybox.data import SymbolInfo

from . import messy_export as mx
from .test_timezones import transitions
from .util import load, write

SYMBOLS = {"F": SymbolInfo("F", "input", "m**3/s"), "L": SymbolInfo("L", "output", "m")}


def _offset(zone: str, utc: datetime) -> str:
    off = utc.astimezone(ZoneInfo(zone)).utcoffset()
    minutes = int(off.total_seconds()) // 60
    sign = "+" if minutes >= 0 else "-"
    return f"{sign}{abs(minutes) // 60:02d}:{abs(minutes) % 60:02d}"


def _wall_before(zone: str, at: datetime) -> str:
    """The wall clock at a change read on the old offset: a second before it, plus a second."""
    return ((at - timedelta(seconds=1)).astimezone(ZoneInfo(zone)).replace(tzinfo=None)
            + timedelta(seconds=1)).strftime("%Y-%m-%d %H:%M:%S")


def test_fall_back_in_the_messy_export(tmp_path):
    truth = mx.scenario()
    mx.write_export(tmp_path, truth)
    _, rep = load(tmp_path, mx.data_table(), symbols=SYMBOLS)
    assert len(rep.clock_changes) == 1
    c = rep.clock_changes[0]
    m = mx.fall_back_minute()
    at = mx.START_UTC + timedelta(minutes=m)
    z = ZoneInfo(mx.ZONE)
    assert c["utc"] == at.strftime("%Y-%m-%dT%H:%M:%SZ") and c["kind"] == "back"
    assert c["offset_before"] == _offset(mx.ZONE, at - timedelta(seconds=1)) == "-05:00"
    assert c["offset_after"] == _offset(mx.ZONE, at) == "-06:00"
    assert c["local_before"] == _wall_before(mx.ZONE, at) == "2026-11-01 02:00:00"
    assert c["local_after"] == at.astimezone(z).strftime("%Y-%m-%d %H:%M:%S")
    # stamps of the repeated hour: both tags, an hour of minutes on each pass (none missing there)
    flow_rows = {k for k, _ in truth.flow_rows}
    rows_at = {k: 1 + (k in flow_rows) for k in range(mx.MINUTES)}  # a level row every minute, flow where logged
    n_first = sum(rows_at[k] for k in range(m - 60, m))
    n_second = sum(rows_at[k] for k in range(m, m + 60))
    assert (c["rows"], c["first_pass"], c["second_pass"]) == (n_first + n_second, n_first, n_second)
    assert sorted(c["tags"]) == ["FI_405", "LI_410"]
    assert c["file"].endswith("receiver_export.csv")
    text = "\n".join(rep.warnings)
    assert "clocks went back" in text and "recorded order" in text and "America/Chicago" in text


def _wide_local(tmp_path, zone: str, utc: list[datetime], name="w.csv"):
    z = ZoneInfo(zone)
    lines = ["t,TI_101,QI_7,FI_3"] + [f"{u.astimezone(z):%Y-%m-%d %H:%M:%S},{k},1,1" for k, u in enumerate(utc)]
    write(tmp_path, name, "\n".join(lines) + "\n")
    return {"files": [name], "time_column": "t", "time_format": "local", "timezone": zone,
            "tags": {"T": {"tag": "TI_101", "units": "K"}, "Q": "QI_7", "F": "FI_3"}}


def test_spring_forward_skipped_hour_counted_and_masked(tmp_path):
    """Every 15 min of wall clock through the Berlin spring change: the stamps in the skipped
    hour do not exist (zoneinfo round trip) and are masked; the change names both offsets."""
    zone = "Europe/Berlin"
    z = ZoneInfo(zone)
    spring, _ = transitions(zone, 2026)
    start = (spring - timedelta(hours=2)).astimezone(z).replace(tzinfo=None)
    walls = [start + timedelta(minutes=15 * k) for k in range(20)]
    missing = [w for w in walls if w.replace(tzinfo=z).astimezone(timezone.utc).astimezone(z).replace(tzinfo=None) != w]
    lines = ["t,TI_101,QI_7,FI_3"] + [f"{w:%Y-%m-%d %H:%M:%S},{k},1,1" for k, w in enumerate(walls)]
    write(tmp_path, "s.csv", "\n".join(lines) + "\n")
    _, rep = load(tmp_path, {"files": ["s.csv"], "time_column": "t", "time_format": "local", "timezone": zone,
                             "tags": {"T": {"tag": "TI_101", "units": "K"}, "Q": "QI_7", "F": "FI_3"}})
    (c,) = rep.clock_changes
    assert c["kind"] == "forward" and c["utc"] == spring.strftime("%Y-%m-%dT%H:%M:%SZ")
    assert (c["offset_before"], c["offset_after"]) == (_offset(zone, spring - timedelta(seconds=1)),
                                                      _offset(zone, spring)) == ("+01:00", "+02:00")
    assert c["rows"] == len(missing) == 4 and c["tags"] == []
    assert "masked" in c["resolution"]


def test_a_change_crossed_between_stamps_and_a_year_of_changes(tmp_path):
    """Stamps every 3 h never fall in the repeated hour: the change is still reported (no
    stamp to resolve); a year of such stamps crosses both changes, in order."""
    zone = "America/Chicago"
    spring, fall = transitions(zone, 2026)
    utc = [datetime(2026, 1, 1, 6, tzinfo=timezone.utc) + timedelta(hours=3 * k) for k in range(8 * 365)]
    utc = [u for u in utc if u.year == 2026]
    _, rep = load(tmp_path, _wide_local(tmp_path, zone, utc))
    kinds = [(c["kind"], c["utc"]) for c in rep.clock_changes]
    assert kinds == [("forward", spring.strftime("%Y-%m-%dT%H:%M:%SZ")), ("back", fall.strftime("%Y-%m-%dT%H:%M:%SZ"))]
    # whether a 3-hourly stamp fell in a changed hour is zoneinfo's to say
    z = ZoneInfo(zone)
    in_back_hour = sum(1 for u in utc if (u.astimezone(z).replace(tzinfo=None).replace(tzinfo=z, fold=0).utcoffset()
                                          != u.astimezone(z).replace(tzinfo=None).replace(tzinfo=z, fold=1).utcoffset()))
    assert rep.clock_changes[1]["rows"] == in_back_hour


def test_one_pass_only_is_warned(tmp_path):
    """An export that kept one pass through the repeated hour (10-min stamps 00:50, 01:00 ..
    01:50, 02:00 local): every stamp of the hour is read as the first pass; the warning says
    so, since they would be an hour off if the export kept the second."""
    zone = "America/Chicago"
    _, fall = transitions(zone, 2026)
    first_pass = [fall - timedelta(minutes=70) + timedelta(minutes=10 * k) for k in range(7)]  # 00:50 .. 01:50 CDT
    after = [fall + timedelta(hours=1) + timedelta(minutes=10 * k) for k in range(3)]  # 02:00 CST ..
    _, rep = load(tmp_path, _wide_local(tmp_path, zone, first_pass + after))
    (c,) = rep.clock_changes
    assert (c["rows"], c["first_pass"], c["second_pass"]) == (6, 6, 0)
    assert "every one was read as the first pass" in c["resolution"]


def test_iso_stamps_carry_their_offsets_and_report_none(tmp_path):
    zone = "America/Chicago"
    _, fall = transitions(zone, 2026)
    z = ZoneInfo(zone)
    utc = [fall - timedelta(hours=2) + timedelta(minutes=20 * k) for k in range(12)]
    lines = ["t,TI_101,QI_7,FI_3"] + [f"{u.astimezone(z).isoformat()},{k},1,1" for k, u in enumerate(utc)]
    write(tmp_path, "i.csv", "\n".join(lines) + "\n")
    rec, rep = load(tmp_path, {"files": ["i.csv"], "time_column": "t",
                               "tags": {"T": {"tag": "TI_101", "units": "K"}, "Q": "QI_7", "F": "FI_3"}})
    assert rep.clock_changes == () and not any("clock change" in w for w in rep.warnings)
    assert rec.outputs["T"].t.tolist() == [1200.0 * k for k in range(12)]


@pytest.mark.parametrize("zone", ["Europe/Berlin", "Australia/Sydney", "America/Chicago"])
def test_offsets_and_instants_against_zoneinfo(tmp_path, zone):
    """Hourly stamps for a year in zones of both hemispheres: each change reported at
    zoneinfo's instant with zoneinfo's offsets (scanned hour by hour as in test_timezones)."""
    z = ZoneInfo(zone)
    t = datetime(2026, 1, 1, tzinfo=timezone.utc)
    found, prev = [], t.astimezone(z).utcoffset()
    utc = []
    while t.year == 2026:
        utc.append(t)
        t += timedelta(hours=1)
        off = t.astimezone(z).utcoffset()
        if off != prev and t.year == 2026:
            found.append((t, prev, off))
            prev = off
    _, rep = load(tmp_path, _wide_local(tmp_path, zone, utc))
    got = [(c["utc"], c["offset_before"], c["offset_after"]) for c in rep.clock_changes]
    want = [(u.strftime("%Y-%m-%dT%H:%M:%SZ"), _offset(zone, u - timedelta(seconds=1)), _offset(zone, u))
            for u, _a, _b in found]
    assert got == want and len(want) == 2
    for c, (u, _a, _b) in zip(rep.clock_changes, found):
        assert c["local_before"] == _wall_before(zone, u)
        assert c["local_after"] == u.astimezone(z).strftime("%Y-%m-%d %H:%M:%S")
    back = next(c for c in rep.clock_changes if c["kind"] == "back")
    assert (back["first_pass"], back["second_pass"]) == (1, 1)  # one hourly stamp on each pass
