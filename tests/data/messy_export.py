"""A messy historian export with known truth (a scenario of our own invention).

A condensate receiver: inflow FI_405 in U.S. gallons per minute, level LI_410 in inches,
both archived by exception (a new value only when it moved by more than its deadband) and
exported on a 1-minute grid in long format (each minute, the last stored value of each tag),
with naive local time stamps in America/Chicago across the 2026 fall-back change, and:

* a 2 h outage of the flow (no FI_405 rows; its setpoint moves during it);
* a 90 min Bad-quality stretch of the level, every row the transmitter's fail value 327.67;
* a 40 min frozen level (41 rows repeating one value) while the level is moving;
* cells of the flow that are not numbers ("NaN", "nan") or infinite ("inf", "-inf").

The level follows A dL/dt = F - c L (A = 50 gal/in, c = 2 gpm/in: a 25 min time constant),
integrated exactly minute by minute with the true flow held over each minute.  Every count a
test asserts comes from this construction: which rows are missing, bad, frozen, not numbers,
repeats (no new stored value), and where the clock went back.

The fall-back instant is not typed in: zoneinfo (IANA tz database) finds it, and every wall
stamp is zoneinfo's reading of the UTC grid instant.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np

ZONE = "America/Chicago"
START_UTC = datetime(2026, 10, 31, 23, 0, tzinfo=timezone.utc)  # 18:00 CDT
MINUTES = 1500  # 25 h of UTC minutes: 24 h of wall clock plus the repeated hour
AREA_GAL_PER_IN = 50.0
OUT_GPM_PER_IN = 2.0
FLOW_DEADBAND = 1.0  # gpm
LEVEL_DEADBAND = 0.1  # in
SETPOINTS = ((0, 120.0), (200, 150.0), (760, 100.0), (1010, 130.0), (1300, 120.0))  # (minute, gpm)
OUTAGE = range(700, 820)  # flow rows missing: 2 h
BAD = range(300, 390)  # level rows with quality Bad and value 327.67: 90 min
FROZEN = range(1000, 1041)  # level rows repeating one value: 40 min (41 rows)
FAIL_VALUE = 327.67
NAN_CELLS = {100: "NaN", 101: "NaN", 1200: "nan"}  # flow rows
INF_CELLS = {150: "inf", 1250: "-inf"}


def fall_back_minute() -> int:
    """The grid minute at which America/Chicago goes back in 2026, found from zoneinfo."""
    z = ZoneInfo(ZONE)
    prev = START_UTC.astimezone(z).utcoffset()
    for m in range(1, MINUTES):
        off = (START_UTC + timedelta(minutes=m)).astimezone(z).utcoffset()
        if off != prev:
            return m
    raise AssertionError("no clock change in the scenario's span")


@dataclass
class Truth:
    utc: list[datetime]
    walls: list[str]
    flow_true: np.ndarray
    level_true: np.ndarray  # inches
    flow_rows: list[tuple[int, str]] = field(default_factory=list)  # (minute, cell text)
    level_rows: list[tuple[int, str, str]] = field(default_factory=list)  # (minute, cell text, quality)
    flow_new: np.ndarray | None = None  # True where the historian stored a new flow value that minute
    level_new: np.ndarray | None = None


def _exception_archive(readings: np.ndarray, deadband: float, forced: set[int]) -> tuple[np.ndarray, np.ndarray]:
    """The stored value at each minute and whether it was newly stored: a reading is stored
    when it differs from the last stored by more than the deadband (or at ``forced``)."""
    stored = np.empty(readings.size)
    new = np.zeros(readings.size, bool)
    last = None
    for i, r in enumerate(readings):
        r = round(float(r), 2)
        if last is None or abs(r - last) > deadband or i in forced:
            if last is None or r != last:
                new[i] = True
            last = r
        stored[i] = last
    return stored, new


def scenario(seed: int = 2026_11_01) -> Truth:
    rng = np.random.default_rng(seed)
    z = ZoneInfo(ZONE)
    utc = [START_UTC + timedelta(minutes=m) for m in range(MINUTES)]
    walls = [u.astimezone(z).strftime("%Y-%m-%d %H:%M:%S") for u in utc]
    setpoint = np.zeros(MINUTES)
    for m0, sp in SETPOINTS:
        setpoint[m0:] = sp
    flow_true = setpoint + rng.normal(0.0, 0.4, MINUTES)
    # exact solution of A dL/dt = F - c L over each minute with F held
    tau = AREA_GAL_PER_IN / OUT_GPM_PER_IN  # min
    decay = np.exp(-1.0 / tau)
    level = np.empty(MINUTES)
    level[0] = flow_true[0] / OUT_GPM_PER_IN
    for m in range(1, MINUTES):
        steady = flow_true[m - 1] / OUT_GPM_PER_IN
        level[m] = steady + (level[m - 1] - steady) * decay
    flow_stored, flow_new = _exception_archive(flow_true, FLOW_DEADBAND, forced={OUTAGE.stop})
    level_read = level + rng.normal(0.0, 0.1, MINUTES)
    level_stored, level_new = _exception_archive(level_read, LEVEL_DEADBAND, forced={BAD.stop, FROZEN.stop})
    # the frozen transmitter repeats one value, which is none of the values next to it
    frozen = round(float(level_stored[FROZEN.start - 1]) + 0.37, 2)
    level_stored[FROZEN.start:FROZEN.stop] = frozen
    level_new[FROZEN.start] = True
    level_new[FROZEN.start + 1:FROZEN.stop] = False
    assert abs(level_stored[FROZEN.stop] - frozen) > LEVEL_DEADBAND
    truth = Truth(utc, walls, flow_true, level, flow_new=flow_new, level_new=level_new)
    for m in range(MINUTES):
        if m not in OUTAGE:
            cell = NAN_CELLS.get(m) or INF_CELLS.get(m) or f"{flow_stored[m]:.2f}"
            truth.flow_rows.append((m, cell))
        if m in BAD:
            truth.level_rows.append((m, f"{FAIL_VALUE:.2f}", "Bad"))
        else:
            truth.level_rows.append((m, f"{level_stored[m]:.2f}", "Good"))
    truth.level_stored = level_stored
    truth.flow_stored = flow_stored
    return truth


def write_export(folder: Path, truth: Truth, name: str = "receiver_export.csv") -> Path:
    """The long-format export in recorded (time) order: each minute the flow row, then the level row."""
    flow = dict(truth.flow_rows)
    level = {m: (c, q) for m, c, q in truth.level_rows}
    lines = ["Timestamp,TagName,Value,Quality"]
    for m in range(MINUTES):
        if m in flow:
            lines.append(f"{truth.walls[m]},FI_405,{flow[m]},Good")
        c, q = level[m]
        lines.append(f"{truth.walls[m]},LI_410,{c},{q}")
    path = folder / name
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def data_table(name: str = "receiver_export.csv", **extra) -> dict:
    """The [data] table of the scenario, with the documented defaults for everything not said."""
    table = {
        "files": [name], "layout": "long", "time_column": "Timestamp", "time_format": "local", "timezone": ZONE,
        "tag_column": "TagName", "value_column": "Value", "quality_column": "Quality", "good_quality": ["Good"],
        "tags": {
            "F": {"tag": "FI_405", "units": "gpm", "logging": "exception", "deadband": FLOW_DEADBAND},
            "L": {"tag": "LI_410", "units": "in", "logging": "exception", "deadband": LEVEL_DEADBAND,
                  "stuck_after": "30 min"},
        },
    }
    table.update(extra)
    return table


def minute_ns(m: int) -> int:
    return int((START_UTC + timedelta(minutes=m)).timestamp()) * 10**9
