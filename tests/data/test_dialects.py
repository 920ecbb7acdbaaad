"""One truth table written out in every dialect the readers accept; every dialect must
yield an identical record.

The truth table spans the fall-back change of Europe/Berlin on 2025-10-26 (03:00 CEST ->
02:00 CET, i.e. 01:00 UTC), so wall-clock dialects repeat the hour 02:00-02:59; the IANA tz
database through Python's zoneinfo is the reference for every offset written out.  The
reference record is built directly from the truth table's UTC instants (pandas
Timestamps) and hand conversions with exact factors (T/K = t/degC + 273.15; 1 kW = 1000 W;
1 kg/h = 1/3600 kg/s).
"""

from datetime import datetime, timedelta, timezone
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
import pytest

from .util import load, write

BERLIN = ZoneInfo("Europe/Berlin")
T0 = datetime(2025, 10, 25, 23, 0, tzinfo=timezone.utc)
N = 17  # every 15 min up to 2025-10-26T03:00Z
UTC = [T0 + timedelta(minutes=15 * i) for i in range(N)]
TEMP = [60 + 0.125 * i for i in range(N)]  # degC, TI_101
HEAT = [1.5 if i < 8 else 2.25 for i in range(N)]  # kW, QI_7
FLOW = {i: 720.0 + 36 * (i // 2) for i in range(0, N, 2)}  # kg/h, FI_3, every 30 min only

TAGS = {"T": {"tag": "TI_101", "units": "degC", "temperature": "reading"},
        "Q": {"tag": "QI_7", "units": "kW"},
        "F": {"tag": "FI_3", "units": "kg/h"}}
BASE = {"time_column": "time", "max_gap": "1 h", "tags": TAGS}


def wall(dt):
    return dt.astimezone(BERLIN).replace(tzinfo=None)


def stamps(kind):
    if kind == "utc":
        return [d.strftime("%Y-%m-%dT%H:%M:%SZ") for d in UTC]
    if kind == "offsets":
        return [d.astimezone(BERLIN).isoformat() for d in UTC]
    if kind == "local_ymd":
        return [wall(d).strftime("%Y-%m-%d %H:%M:%S") for d in UTC]
    if kind == "local_dmy_12h":
        return [wall(d).strftime("%d.%m.%Y %I:%M:%S %p") for d in UTC]
    if kind == "local_mdy":
        return [wall(d).strftime("%m/%d/%Y %H:%M") for d in UTC]
    if kind == "epoch":
        return [f"{int(d.timestamp())}" for d in UTC]
    raise KeyError(kind)


def serial(dt_naive, system):
    base = datetime(1899, 12, 30) if system == 1900 else datetime(1904, 1, 1)
    return (dt_naive - base) / timedelta(days=1)


def wide_rows(times, dec="."):
    rows = []
    for i, t in enumerate(times):
        f = f"{FLOW[i]:g}" if i in FLOW else ""
        rows.append([str(t), f"{TEMP[i]:g}".replace(".", dec), f"{HEAT[i]:g}".replace(".", dec), f.replace(".", dec)])
    return rows


def csv_text(header, rows, sep=","):
    return "\n".join(sep.join(r) for r in [header] + rows) + "\n"


def long_rows(times, interleave=True):
    out = []
    per_tag = {"TI_101": [(i, TEMP[i]) for i in range(N)], "QI_7": [(i, HEAT[i]) for i in range(N)],
               "FI_3": sorted(FLOW.items())}
    if interleave:
        for i in range(N):
            for tag, series in per_tag.items():
                for j, v in series:
                    if j == i:
                        out.append([str(times[i]), tag, f"{v:g}", "Good"])
    else:
        for tag, series in per_tag.items():
            out += [[str(times[j]), tag, f"{v:g}", "Good"] for j, v in series]
    return out


def reference_record():
    from graybox.data import InputSeries, OutputSeries, Record, Segment

    t = np.array([(d - T0).total_seconds() for d in UTC])
    fi = np.array(sorted(FLOW))
    rec = Record("main", T0,
                 {"Q": InputSeries("Q", t, np.array(HEAT) * 1000.0, units="W"),
                  "F": InputSeries("F", t[fi], np.array([FLOW[i] for i in fi]) / 3600.0, units="kg/s")},
                 {"T": OutputSeries("T", t, np.array(TEMP) + 273.15, units="K")},
                 (Segment(0.0, t[-1]),))
    return rec


def assert_same_record(a, b):
    assert a.start_utc == b.start_utc
    assert set(a.inputs) == set(b.inputs) and set(a.outputs) == set(b.outputs)
    for k in a.inputs:
        np.testing.assert_array_equal(a.inputs[k].t, b.inputs[k].t)
        np.testing.assert_allclose(a.inputs[k].values, b.inputs[k].values, rtol=1e-15, atol=0)
        assert a.inputs[k].hold == b.inputs[k].hold
    for k in a.outputs:
        np.testing.assert_array_equal(a.outputs[k].t, b.outputs[k].t)
        np.testing.assert_allclose(a.outputs[k].values, b.outputs[k].values, rtol=1e-15, atol=0)
        np.testing.assert_array_equal(a.outputs[k].mask, b.outputs[k].mask)
    assert a.segments == b.segments


# -- the dialects: each writes its files into a folder and returns its config table ----------
def d_wide_utc(p):
    write(p, "a.csv", csv_text(["time", "TI_101", "QI_7", "FI_3"], wide_rows(stamps("utc"))))
    return dict(BASE, files=["a.csv"])


def d_wide_mixed_offsets(p):
    write(p, "a.csv", csv_text(["time", "TI_101", "QI_7", "FI_3"], wide_rows(stamps("offsets"))))
    return dict(BASE, files=["a.csv"])


def d_wide_local_ymd(p):
    write(p, "a.csv", csv_text(["time", "TI_101", "QI_7", "FI_3"], wide_rows(stamps("local_ymd"))))
    return dict(BASE, files=["a.csv"], time_format="local", timezone="Europe/Berlin")


def d_wide_local_dmy_12h(p):
    write(p, "a.csv", csv_text(["time", "TI_101", "QI_7", "FI_3"], wide_rows(stamps("local_dmy_12h"))))
    return dict(BASE, files=["a.csv"], time_format="local", timezone="Europe/Berlin", date_order="dmy",
                clock="12h")


def d_semicolon_decimal_comma(p):
    pre = "Plant export;unit 4\r\nexported by: night shift\r\n"
    body = csv_text(["time", "TI_101", "QI_7", "FI_3"], wide_rows(stamps("local_mdy"), dec=","), sep=";")
    lines = body.splitlines()
    text = pre + lines[0] + "\r\n" + "s;°C;kW;kg/h\r\n" + "\r\n".join(lines[1:]) + "\r\n"
    write(p, "a.csv", text, encoding="cp1252")
    return dict(BASE, files=["a.csv"], delimiter=";", decimal=",", encoding="cp1252", header_row=3,
                skip_after_header=1, time_format="local", timezone="Europe/Berlin", date_order="mdy")


def d_long_sorted_by_tag(p):
    write(p, "l.csv", csv_text(["time", "tag", "value", "quality"], long_rows(stamps("utc"), interleave=False)))
    return dict(BASE, files=["l.csv"], layout="long", quality_column="quality")


def d_long_local_interleaved(p):
    write(p, "l.csv", csv_text(["time", "tag", "value", "quality"], long_rows(stamps("local_ymd"))))
    return dict(BASE, files=["l.csv"], layout="long", quality_column="quality", time_format="local",
                timezone="Europe/Berlin")


def d_one_file_per_tag(p):
    rows = wide_rows(stamps("offsets"))
    for k, tag in enumerate(["TI_101", "QI_7", "FI_3"]):
        body = [[r[0], r[k + 1]] for r in rows if r[k + 1] != ""]
        write(p, f"{tag}.csv", csv_text(["time", tag], body))
    return dict(BASE, files=["*.csv"])


def d_two_months(p):
    rows = wide_rows(stamps("utc"))
    write(p, "part1.csv", csv_text(["time", "TI_101", "QI_7", "FI_3"], rows[:9]))
    write(p, "part2.csv", csv_text(["time", "TI_101", "QI_7", "FI_3"], rows[9:]))
    return dict(BASE, files=["part2.csv", "part1.csv"])


def d_parquet_wide_aware(p):
    df = pd.DataFrame({"time": pd.DatetimeIndex(UTC).tz_convert("Europe/Berlin"), "TI_101": TEMP,
                       "QI_7": HEAT, "FI_3": [FLOW.get(i, np.nan) for i in range(N)]})
    df.to_parquet(p / "a.parquet")
    return dict(BASE, files=["a.parquet"])


def d_parquet_long_text(p):
    rows = long_rows(stamps("offsets"))
    df = pd.DataFrame(rows, columns=["time", "tag", "value", "quality"])
    df["value"] = df["value"].astype(float)
    df.to_parquet(p / "l.parquet")
    return dict(BASE, files=["l.parquet"], layout="long", quality_column="quality")


def d_xlsx_local_datetimes(p):
    import openpyxl

    wb = openpyxl.Workbook()
    ws = wb.active
    ws.title = "log"
    ws.append(["Boiler house export"])
    ws.append(["time", "TI_101", "QI_7", "FI_3"])
    for i, d in enumerate(UTC):
        ws.append([wall(d), TEMP[i], HEAT[i], FLOW.get(i)])
    wb.save(p / "a.xlsx")
    return dict(BASE, files=["a.xlsx"], sheet="log", header_row=2, time_format="local", timezone="Europe/Berlin")


def d_xlsx_serial_numbers(p):
    import openpyxl

    wb = openpyxl.Workbook()
    ws = wb.active
    ws.append(["time", "TI_101", "QI_7", "FI_3"])
    for i, d in enumerate(UTC):
        ws.append([serial(d.replace(tzinfo=None), 1900), TEMP[i], HEAT[i], FLOW.get(i)])
    wb.save(p / "a.xlsx")
    return dict(BASE, files=["a.xlsx"], time_format="serial_1900", timezone="UTC")


def d_epoch_seconds(p):
    write(p, "a.csv", csv_text(["time", "TI_101", "QI_7", "FI_3"], wide_rows(stamps("epoch"))))
    return dict(BASE, files=["a.csv"], time_format="epoch_s")


def d_serial_1900_utc(p):
    times = [repr(serial(d.replace(tzinfo=None), 1900)) for d in UTC]
    write(p, "a.csv", csv_text(["time", "TI_101", "QI_7", "FI_3"], wide_rows(times)))
    return dict(BASE, files=["a.csv"], time_format="serial_1900", timezone="UTC")


def d_serial_1904_local(p):
    times = [repr(serial(wall(d), 1904)) for d in UTC]
    write(p, "a.csv", csv_text(["time", "TI_101", "QI_7", "FI_3"], wide_rows(times)))
    return dict(BASE, files=["a.csv"], time_format="serial_1904", timezone="Europe/Berlin")


DIALECTS = [d_wide_utc, d_wide_mixed_offsets, d_wide_local_ymd, d_wide_local_dmy_12h, d_semicolon_decimal_comma,
            d_long_sorted_by_tag, d_long_local_interleaved, d_one_file_per_tag, d_two_months, d_parquet_wide_aware,
            d_parquet_long_text, d_xlsx_local_datetimes, d_xlsx_serial_numbers, d_epoch_seconds, d_serial_1900_utc,
            d_serial_1904_local]


def test_truth_table_has_the_repeated_hour():
    """zoneinfo (IANA tz) as the reference: the table's wall-clock stamps repeat 02:00-02:45."""
    walls = [wall(d) for d in UTC]
    assert len(set(walls)) < len(walls)
    repeated = [w for w in walls if walls.count(w) == 2]
    assert sorted(set(w.strftime("%H:%M") for w in repeated)) == ["02:00", "02:15", "02:30", "02:45"]
    offsets = {d.astimezone(BERLIN).utcoffset() for d in UTC}
    assert offsets == {timedelta(hours=2), timedelta(hours=1)}


@pytest.mark.reference
@pytest.mark.parametrize("dialect", DIALECTS, ids=lambda f: f.__name__[2:])
def test_every_dialect_yields_the_same_record(tmp_path, dialect):
    """Each dialect's record equals the reference built from the truth table (zoneinfo for
    the offsets written out, exact unit factors)."""
    table = dialect(tmp_path)
    rec, report = load(tmp_path, table)
    assert_same_record(rec, reference_record())
    assert report.ok
    assert all(not t.masked for t in report.tags)


def test_files_are_opened_read_only_and_never_changed(tmp_path):
    """Every input file keeps its bytes and modification time; read-only files load."""
    import hashlib
    import os
    import stat

    for dialect in (d_two_months, d_xlsx_local_datetimes, d_parquet_long_text, d_semicolon_decimal_comma):
        folder = tmp_path / dialect.__name__
        folder.mkdir()
        table = dialect(folder)
        before = {}
        for f in folder.iterdir():
            os.chmod(f, stat.S_IRUSR | stat.S_IRGRP)
            before[f] = (hashlib.sha256(f.read_bytes()).hexdigest(), f.stat().st_mtime_ns)
        rec, _ = load(folder, table)
        for f, (h, m) in before.items():
            assert hashlib.sha256(f.read_bytes()).hexdigest() == h and f.stat().st_mtime_ns == m
        assert {s["sha256"] for s in rec.sources} <= {h for h, _ in before.values()}
