"""Time-zone transitions against the IANA tz database through Python's zoneinfo.

The transition instants are not typed in: they are found by scanning zoneinfo's offsets
hour by hour, and every expected UTC instant is computed by zoneinfo from (wall time, fold).
The repeated hour of a fall-back change is resolved by recorded order; a wall time skipped
by a spring-forward change is masked with that reason.
"""

from datetime import datetime, timedelta, timezone
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
import pytest

from graybox.data.spec import TimeSpec
from graybox.data.quality import REASON_NONEXISTENT
from graybox.data.timestamps import NAT, Place, localize, parse_stamps

from .util import load, write

ZONE = "America/Chicago"


def transitions(zone: str, year: int):
    """(spring-forward, fall-back) UTC instants of ``year`` found from zoneinfo by scanning."""
    z = ZoneInfo(zone)
    t = datetime(year, 1, 1, tzinfo=timezone.utc)
    prev = t.astimezone(z).utcoffset()
    found = []
    while t.year == year:
        t += timedelta(hours=1)
        off = t.astimezone(z).utcoffset()
        if off != prev:
            found.append((t, off - prev))
            prev = off
    spring = next(t for t, d in found if d > timedelta(0))
    fall = next(t for t, d in found if d < timedelta(0))
    return spring, fall


def ns(dt: datetime) -> int:
    return int(pd.Timestamp(dt).value)


@pytest.mark.reference
def test_fall_back_repeated_hour_resolved_by_recorded_order():
    """Every 10 minutes through the fall-back change: the wall clock repeats an hour; in
    recorded order the first pass is daylight time (fold=0), the second standard (fold=1)."""
    z = ZoneInfo(ZONE)
    _, fall = transitions(ZONE, 2026)
    utc = [fall - timedelta(hours=2) + timedelta(minutes=10 * k) for k in range(25)]
    walls = [u.astimezone(z).replace(tzinfo=None) for u in utc]
    assert len(set(walls)) == len(walls) - 6  # one hour of 10-minute stamps repeats
    wall_ns = np.array([ns(w) for w in walls], np.int64)
    got = localize(wall_ns, ZONE)
    assert not got.nonexistent.any()
    np.testing.assert_array_equal(got.utc_ns, [ns(u) for u in utc])
    # and zoneinfo agrees on the folds: the second pass is fold=1
    folds = [w.replace(tzinfo=z, fold=1).astimezone(timezone.utc) == u.replace(tzinfo=timezone.utc)
             and w.replace(tzinfo=z, fold=0).utcoffset() != w.replace(tzinfo=z, fold=1).utcoffset()
             for w, u in zip(walls, utc)]
    assert sum(folds) == 6


@pytest.mark.reference
def test_hourly_log_repeating_the_same_stamp_twice():
    """Hourly logging across fall-back records the same wall stamp twice in a row: the second
    is the standard-time hour (zoneinfo fold=1), not a duplicate."""
    z = ZoneInfo(ZONE)
    _, fall = transitions(ZONE, 2026)
    utc = [fall - timedelta(hours=2) + timedelta(hours=k) for k in range(5)]
    walls = [u.astimezone(z).replace(tzinfo=None) for u in utc]
    got = localize(np.array([ns(w) for w in walls], np.int64), ZONE)
    np.testing.assert_array_equal(got.utc_ns, [ns(u) for u in utc])


@pytest.mark.reference
def test_spring_forward_gap_is_nonexistent():
    """Wall times inside the skipped hour do not exist in the zone (zoneinfo round trip
    changes them); they are reported, the others are converted as zoneinfo converts them."""
    z = ZoneInfo(ZONE)
    spring, _ = transitions(ZONE, 2026)
    start = (spring - timedelta(hours=2)).astimezone(z).replace(tzinfo=None)
    walls = [start + timedelta(minutes=15 * k) for k in range(17)]
    exists = [w.replace(tzinfo=z).astimezone(timezone.utc).astimezone(z).replace(tzinfo=None) == w for w in walls]
    got = localize(np.array([ns(w) for w in walls], np.int64), ZONE)
    np.testing.assert_array_equal(~got.nonexistent, exists)
    assert sum(not e for e in exists) == 4
    for w, e, u in zip(walls, exists, got.utc_ns):
        if e:
            assert u == ns(w.replace(tzinfo=z).astimezone(timezone.utc))
        else:
            assert u == NAT


def test_long_table_resolves_each_tag_in_its_own_order(tmp_path):
    """Two tags interleaved in a long table at 30 and 20 minute cadences through fall-back
    (zoneinfo gives the truth); each tag's repeated hour is told apart in its own order."""
    z = ZoneInfo(ZONE)
    _, fall = transitions(ZONE, 2026)
    rows = []
    base = fall - timedelta(hours=2)
    for k in range(10):
        rows.append((base + timedelta(minutes=30 * k), "TI_101", 50 + k))
    for k in range(15):
        rows.append((base + timedelta(minutes=20 * k), "QI_7", 1 + k))
    rows.append((base, "FI_3", 1.0))
    rows.sort(key=lambda r: (r[0], r[1]))
    text = "when;tag;value\n" + "".join(
        f"{u.astimezone(z).strftime('%m/%d/%Y %I:%M %p')};{tag};{v}\n" for u, tag, v in rows)
    write(tmp_path, "l.csv", text)
    rec, _ = load(tmp_path, {"files": ["l.csv"], "layout": "long", "delimiter": ";", "time_column": "when",
                             "time_format": "local", "timezone": ZONE, "date_order": "mdy", "clock": "12h",
                             "tags": {"T": "TI_101", "Q": "QI_7", "F": "FI_3"}})
    assert rec.start_utc == base
    np.testing.assert_array_equal(rec.outputs["T"].t, [1800.0 * k for k in range(10)])
    np.testing.assert_array_equal(rec.inputs["Q"].t, [1200.0 * k for k in range(15)])


def test_nonexistent_rows_are_masked_with_that_reason(tmp_path):
    z = ZoneInfo(ZONE)
    spring, _ = transitions(ZONE, 2026)
    start = (spring - timedelta(hours=1)).astimezone(z).replace(tzinfo=None)
    walls = [start + timedelta(minutes=30 * k) for k in range(6)]  # two fall into the gap
    text = "t,TI_101,QI_7,FI_3\n" + "".join(f"{w:%Y-%m-%d %H:%M:%S},{k},1,1\n" for k, w in enumerate(walls))
    write(tmp_path, "a.csv", text)
    rec, rep = load(tmp_path, {"files": ["a.csv"], "time_column": "t", "time_format": "local", "timezone": ZONE,
                               "tags": {"T": "TI_101", "Q": "QI_7", "F": "FI_3"}})
    assert rep.tag("T").masked == {REASON_NONEXISTENT: 2}
    np.testing.assert_array_equal(rec.outputs["T"].values, [0, 1, 4, 5])


def test_iso_offsets_may_differ_between_rows():
    """ISO stamps with offsets of both sides of a change (pandas as the reference)."""
    raw = pd.Series(["2026-11-01T01:30:00-05:00", "2026-11-01T01:30:00-06:00", "2026-11-01T07:45:00Z"], dtype="str")
    got = parse_stamps(raw, TimeSpec("t", "iso", None, None, "24h"), Place("f.csv", "line", np.arange(2, 5), "t"))
    np.testing.assert_array_equal(got.utc_ns, [pd.Timestamp(s).value for s in raw])
