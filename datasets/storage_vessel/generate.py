"""Generate the bundled demo data: an electrically heated hot-water storage vessel.

Scenario (invented for graybox's demo): an 800 kg hot-water store in an unheated plant
room.  A 12 kW immersion heater is switched by a thermostat (on below 58 degC, off above
62 degC); hot water is drawn off in bursts and replaced by cold mains water.  The vessel
loses heat to the room through its insulation.  Unknown: the loss coefficient UA [W/K]
and the heater efficiency eta [-].

    M*cp*dT/dt = eta*Q + F*cp*(T_in - T) - UA*(T - T_room)

The historian export mimics a real one: a row about every 60 s with jitter, plus a row at
every heater switch and at every start and stop of a draw (those tags report by exception,
so their changes are stamped when they happen), ISO 8601 stamps with a UTC offset, room
temperature logged in degF, heater power in kW, draw-off flow in kg/h, two outages (empty
cells) and a few bad-quality readings (flagged in a quality column, values that must not
be used).

The truth is integrated exactly: with inputs held between the 10 s control ticks the
model is linear in T, so each tick has a closed-form exponential solution.

Run:  python datasets/storage_vessel/generate.py   (writes vessel_log.csv and truth.json)
"""

import json
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
SEED = 20261202
TRUTH = {"UA": 18.5, "eta": 0.93}
M, CP = 800.0, 4186.0  # kg, J/(kg K)
Q_RATED = 12_000.0  # W
TICK = 10.0  # s, the control and input tick
DAYS = 3
NOISE_T = 0.08  # K, vessel temperature sensor


def draw_profile(rng, n_ticks):
    """Hot-water draws: bursts of 3-20 min at 300-900 kg/h, more by day."""
    flow = np.zeros(n_ticks)
    t = np.arange(n_ticks) * TICK
    k = 0
    while k < n_ticks:
        hour = (t[k] / 3600.0) % 24
        rate = 1.6 if 6 <= hour <= 22 else 0.25  # draws per hour
        gap = rng.exponential(3600.0 / rate)
        k += int(gap / TICK)
        length = int(rng.uniform(180, 1200) / TICK)
        flow[k:k + length] = rng.uniform(300, 900) / 3600.0  # kg/s
        k += length
    return flow


def simulate(rng):
    n = int(DAYS * 86400 / TICK)
    t = np.arange(n) * TICK
    f = draw_profile(rng, n)
    t_in = 9.0 + 1.5 * np.sin(2 * np.pi * t / 86400 - 1.0)
    t_room = 11.0 + 4.0 * np.sin(2 * np.pi * t / 86400 - 2.0) + 0.3 * rng.standard_normal(n).cumsum() / np.sqrt(n)
    q = np.zeros(n)
    temp = np.zeros(n)
    temp_now, heating = 55.0, True
    ua, eta = TRUTH["UA"], TRUTH["eta"]
    for k in range(n):
        if temp_now < 58.0:
            heating = True
        elif temp_now > 62.0:
            heating = False
        q[k] = Q_RATED * (1.0 + 0.01 * np.sin(2 * np.pi * t[k] / 40000.0)) if heating else 0.0
        temp[k] = temp_now
        a = f[k] * CP + ua
        t_ss = (eta * q[k] + f[k] * CP * t_in[k] + ua * t_room[k]) / a
        temp_now = t_ss + (temp_now - t_ss) * np.exp(-a * TICK / (M * CP))
    return t, q, f, t_in, t_room, temp


def export(t, q, f, t_in, t_room, temp, rng):
    """Rows about every 60 s (jittered) and at every heater or draw change, each with the
    values held at that instant."""
    stamps = []
    s = 0.0
    while s < t[-1]:
        stamps.append(s)
        s += 60.0 + rng.uniform(-6, 6)
    changes = np.flatnonzero((np.diff(q > 0) != 0) | (np.diff(f) != 0)) + 1
    stamps = np.unique(np.concatenate([np.array(stamps), t[changes]]))
    idx = np.searchsorted(t, stamps, side="right") - 1
    # sample the vessel temperature exactly at the stamp (exact solution within the tick)
    frac = stamps - t[idx]
    a = f[idx] * CP + TRUTH["UA"]
    t_ss = (TRUTH["eta"] * q[idx] + f[idx] * CP * t_in[idx] + TRUTH["UA"] * t_room[idx]) / a
    t_true = t_ss + (temp[idx] - t_ss) * np.exp(-a * frac / (M * CP))
    t_meas = t_true + NOISE_T * rng.standard_normal(stamps.size)
    quality = np.array(["Good"] * stamps.size, dtype=object)
    bad = rng.choice(stamps.size, 6, replace=False)
    t_meas[bad] += rng.choice([-25.0, 30.0], bad.size)  # sensor glitches, flagged by the historian
    quality[bad] = "Bad"
    # the plant clock is on UTC+01:00; the export writes the offset on every row
    import datetime as dt

    start = dt.datetime(2026, 2, 9, 6, 0, 0, tzinfo=dt.timezone(dt.timedelta(hours=1)))
    rows = ["timestamp,TT301_vessel_temp,TT301_quality,JQ301_heater_kW,FT302_draw_kg_h,TT303_mains_temp,TT305_room_degF"]
    outage = ((stamps > 30 * 3600) & (stamps < 31.5 * 3600)) | ((stamps > 55 * 3600) & (stamps < 55.4 * 3600))
    for j, s in enumerate(stamps):
        stamp = (start + dt.timedelta(seconds=float(s))).isoformat(timespec="seconds")
        if outage[j]:
            rows.append(f"{stamp},,NoData,,,,")
            continue
        k = idx[j]
        room_f = t_room[k] * 9 / 5 + 32
        rows.append(f"{stamp},{t_meas[j]:.3f},{quality[j]},{q[k] / 1000:.3f},{f[k] * 3600:.1f},{t_in[k]:.2f},{room_f:.2f}")
    return "\n".join(rows) + "\n"


def main():
    rng = np.random.default_rng(SEED)
    t, q, f, t_in, t_room, temp = simulate(rng)
    text = export(t, q, f, t_in, t_room, temp, rng)
    (HERE / "vessel_log.csv").write_text(text, encoding="utf-8")
    truth = {
        "parameters": TRUTH,
        "units": {"UA": "W/K", "eta": ""},
        "notes": "invented scenario; inputs held over 10 s ticks, logged about every 60 s; "
                 f"vessel temperature noise sd {NOISE_T} K; seed {SEED}",
    }
    (HERE / "truth.json").write_text(json.dumps(truth, indent=2) + "\n", encoding="utf-8")
    print(f"wrote {HERE / 'vessel_log.csv'} ({text.count(chr(10)) - 1} rows) and truth.json")


if __name__ == "__main__":
    main()
