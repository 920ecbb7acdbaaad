"""Quality judgements on one tag's samples (sorted by time): each function returns a boolean
array, True where the sample is judged (bad, out of range, a spike, stuck, a held repeat).

Reasons are counted once per sample, in this order: a time that does not exist, a value that
is not a number, an infinite value, a bad quality flag, out of the valid range, stuck, a
spike.  The stuck judgement sees only samples that passed flag and range; the spike
judgement sees only those that are not stuck either (a frozen stretch would make the robust
spread look zero next to it).

Every judgement is made on the rows as logged.  Only then are the held repeats of a tag
logged by exception thinned (a repeat is a hold, not an observation): a stretch of bad
rows repeating one garbage value is counted as bad rows, and a frozen sensor repeating
itself is judged stuck, before any repeat is dropped.  The spike filter runs on the
thinned samples (a held spike would otherwise look like a plateau).

Stuck runs are judged on measured outputs by default: an input held at a setpoint by a
controller is not a frozen sensor.  A tag's own ``stuck_after`` (a duration, "auto" or
"off") overrides the default, for an input too (:func:`stuck_rule`).

``stuck_after = "auto"`` (the default) rests on one observation: a live sensor sampled
periodically moves from sample to sample (noise), so an exact repeat of a noisy reading is
rare, and twenty in a row are next to impossible.  For a sampled tag it is the shorter of
2 h and the longer of 10 min and 20 of its median intervals (30 s sampling: 10 min, 20
readings).  That premise is checked on the tag itself: its repeat share, the share of its
successive usable readings within half its deadband of the one before (equal, for a zero
deadband).  With at most 1 in 4 repeating, a run of 20 repeats starts by chance at a given
reading with a probability of the order of (1/4)**20 = 9e-13 if repeats were independent;
for white noise about a steady value, quantised at the step that repeats 1 in 4 (0.917
standard deviations), 21 readings in one step have a probability of 3.3e-10 (exact with
scipy, tests/data/test_stuck_auto.py): below 1e-3 false runs in a year of 30 s readings.
A tag quantised coarsely against its noise (a step of 2 standard deviations repeats 1 in 2,
and 21 readings in one step come at 3.3e-4 per reading), or declared with a deadband its
readings seldom leave, repeats legitimately: it keeps the fixed 2 h.  So does a tag logged by exception (a value
that holds is no news there), and a tag with fewer than two rows.  The constants are
``AUTO_STUCK_*`` in :mod:`graybox.data.config`.  The share counts every usable reading, a
frozen stretch included: a freeze covering over a quarter of a tag's readings falls back to
2 h too.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from graybox.data.config import (AUTO_STUCK_CAP_S, AUTO_STUCK_FLOOR_S, AUTO_STUCK_INTERVALS, AUTO_STUCK_REPEAT_SHARE,
                                 STUCK_AUTO)
from graybox.data.spec import ROLE_OUTPUT
from graybox.data.report import duration_text as _dur

REASON_NONEXISTENT = "nonexistent time (clocks went forward)"
REASON_NAN = "not a number"
REASON_INF = "infinite"
REASON_QUALITY = "bad quality flag"
REASON_RANGE = "outside valid range"
REASON_SPIKE = "spike"
REASON_STUCK = "stuck sensor"
REASON_ORDER = (REASON_NONEXISTENT, REASON_NAN, REASON_INF, REASON_QUALITY, REASON_RANGE, REASON_STUCK, REASON_SPIKE)

# 1.4826 = 1/Phi^-1(3/4): the MAD of a normal distribution times it is its standard deviation
# (common practice in robust statistics).
MAD_TO_SIGMA = 1.482602218505602


def bad_quality(codes: np.ndarray | None, texts: list[str], good: frozenset[str]) -> np.ndarray | None:
    """True where a quality flag is present and not one of the good ones (a blank flag is
    bad); ``codes`` index the normalized flag ``texts``."""
    if codes is None:
        return None
    good_codes = [k for k, t in enumerate(texts) if t in good]
    if len(good_codes) == 1:  # the usual case: one flag text means good
        return codes != good_codes[0]
    is_bad = np.array([t not in good for t in texts] + [True], bool)
    return is_bad[codes]


def out_of_range(values: np.ndarray, valid: tuple[float, float] | None) -> np.ndarray:
    """True where a value lies outside ``[low, high]`` (inclusive bounds are valid)."""
    if valid is None:
        return np.zeros(values.size, bool)
    lo, hi = valid
    return (values < lo) | (values > hi)


def held_repeats(values: np.ndarray, masked: np.ndarray | None = None) -> np.ndarray:
    """True for a sample equal to the one right before it, neither of them ``masked``: in a
    report-by-exception export written out on a grid (or with a heartbeat), these are the
    historian's held value, not new observations.  A masked sample is never a repeat (it is
    counted under its own reason), and the first good sample after masked ones is new."""
    out = np.zeros(values.size, bool)
    out[1:] = values[1:] == values[:-1]
    if masked is not None and masked.any():
        out[1:] &= ~masked[1:] & ~masked[:-1]
    return out


@dataclass(frozen=True)
class StuckRule:
    """The stuck duration of one tag: ``limit_s`` (inf: not judged) and how it was set."""

    limit_s: float
    how: str

    @property
    def active(self) -> bool:
        """Whether the rule can flag stuck runs (a finite limit; ``inf`` means off)."""
        return math.isfinite(self.limit_s)


def repeat_share(values: np.ndarray, usable: np.ndarray, deadband: float) -> float | None:
    """The share of successive usable readings that lie within half the ``deadband`` of the
    usable reading before them (are equal to it, for a zero deadband); None below two."""
    v = values if bool(usable.all()) else values[usable]
    if v.size < 2:
        return None
    return float(np.count_nonzero(np.abs(np.diff(v)) <= 0.5 * deadband)) / (v.size - 1)


def auto_stuck(logging: str, median_s: float | None, share: float | None) -> StuckRule:
    """``stuck_after = "auto"`` for a tag logged as ``logging`` with median interval
    ``median_s`` (as logged) and :func:`repeat_share` ``share`` (see the module docstring)."""
    cap = f"auto, {_dur(AUTO_STUCK_CAP_S)}"
    if logging == "exception":
        return StuckRule(AUTO_STUCK_CAP_S, f"{cap} for a tag logged by exception")
    if not median_s or share is None:
        return StuckRule(AUTO_STUCK_CAP_S, f"{cap} (no interval: a single row)")
    if share > AUTO_STUCK_REPEAT_SHARE:
        return StuckRule(AUTO_STUCK_CAP_S, f"{cap}: {100 * share:.3g}% of its successive readings repeat (over "
                                           f"{100 * AUTO_STUCK_REPEAT_SHARE:g}%: coarse steps against its noise)")
    limit = min(AUTO_STUCK_CAP_S, max(AUTO_STUCK_FLOOR_S, AUTO_STUCK_INTERVALS * median_s))
    return StuckRule(limit, f"auto, the shorter of {_dur(AUTO_STUCK_CAP_S)} and the longer of "
                            f"{_dur(AUTO_STUCK_FLOOR_S)} and {AUTO_STUCK_INTERVALS:g} x the median interval "
                            f"({_dur(median_s)}); {100 * share:.2g}% of its successive readings repeat")


def stuck_rule(role: str, logging: str, own: float | str | None, experiment: float | str,
               median_s: float | None = None, share: float | None = None) -> StuckRule:
    """The stuck rule of a tag: its own ``stuck_after`` when given, else the experiment's for
    a measured output and none for an input; "auto" resolved by :func:`auto_stuck`."""
    if own is not None:
        setting, origin = own, "the tag's stuck_after"
    elif role == ROLE_OUTPUT:
        setting, origin = experiment, "the experiment's stuck_after"
    else:
        return StuckRule(math.inf, "an input, not judged unless its tag sets stuck_after")
    if setting == STUCK_AUTO:
        return auto_stuck(logging, median_s, share)
    if math.isinf(float(setting)):
        return StuckRule(math.inf, f"{origin} = \"off\"")
    return StuckRule(float(setting), origin)


def _half_medians(t_ns: np.ndarray, v: np.ndarray, half_s: float) -> tuple[np.ndarray, np.ndarray]:
    """Median of the samples in ``[t - half, t)`` and in ``(t, t + half]`` of each sample
    (NaN where that side holds none)."""
    win = pd.Timedelta(seconds=half_s)
    left = pd.Series(v, index=pd.DatetimeIndex(t_ns.view("M8[ns]"))).rolling(win, closed="left").median()
    rt = (-t_ns[::-1]).view("M8[ns]")
    right = pd.Series(v[::-1], index=pd.DatetimeIndex(rt)).rolling(win, closed="left").median()
    return left.to_numpy(), right.to_numpy()[::-1]


def _window_medians(t_ns: np.ndarray, v: np.ndarray, dev: np.ndarray, at: np.ndarray, window_s: float
                    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """At the samples ``at`` only: the median of ``dev`` over the centred window
    ``[t - w/2, t + w/2]``, and the medians of ``v`` over ``[t - w/2, t)`` and
    ``(t, t + w/2]`` (NaN where a side holds none), as the running medians give them."""
    half = pd.Timedelta(seconds=window_s).value // 2
    side = pd.Timedelta(seconds=window_s / 2.0).value
    ta = t_ns[at]
    lo, hi = np.searchsorted(t_ns, ta - half, "left"), np.searchsorted(t_ns, ta + half, "right")
    lo_left, hi_right = np.searchsorted(t_ns, ta - side, "left"), np.searchsorted(t_ns, ta + side, "right")
    mad = np.array([np.median(dev[a:b]) for a, b in zip(lo, hi)])
    left = np.array([np.median(v[a:i]) if i > a else np.nan for a, i in zip(lo_left, at)])
    right = np.array([np.median(v[i + 1:b]) if b > i + 1 else np.nan for i, b in zip(at, hi_right)])
    return mad, left, right


def spikes(t_ns: np.ndarray, values: np.ndarray, usable: np.ndarray, window_s: float, threshold: float,
           floor: float = 0.0) -> np.ndarray:
    """Samples further than ``threshold`` robust standard deviations from the running median
    of a centred time window that also stand apart from *both* halves of it: from the median
    of the half window before them and from that of the half window after them (one side
    only at the ends of the series or of an outage).  A sample next to a step change agrees
    with one side and is never judged (the centred median there may sit mid-step).

    The robust deviation is 1.4826 times the median absolute deviation from the running
    (centred) median, taken in the same window but never below the whole series' value (a
    window of a few dozen samples often underestimates it, which would judge plain noise)
    nor below ``floor``.  Where it is zero (a flat signal) nothing is judged.

    The running median is taken at every sample; the window's deviation and the half
    windows' medians only where a sample is far enough from it to be judged at all (the
    robust deviation is never below the whole series' value or ``floor``), unless those are
    many."""
    out = np.zeros(values.size, bool)
    idx = np.flatnonzero(usable)
    if idx.size < 3:
        return out
    t, v = t_ns[idx], values[idx]
    s = pd.Series(v, index=pd.DatetimeIndex(t.view("M8[ns]")))
    win = pd.Timedelta(seconds=window_s)
    med = s.rolling(win, center=True, min_periods=1, closed="both").median().to_numpy()
    dev = np.abs(v - med)
    overall = MAD_TO_SIGMA * float(np.median(dev))
    at = np.flatnonzero(dev > threshold * max(overall, floor))  # no other sample can be judged
    if at.size == 0:
        return out
    if at.size > max(64, idx.size // 50):  # many: the running medians are cheaper than windows one by one
        mad = pd.Series(dev, index=s.index).rolling(win, center=True, min_periods=1, closed="both").median()
        left, right = _half_medians(t, v, window_s / 2.0)
        at, mad, left, right = np.arange(idx.size), mad.to_numpy(), left, right
    else:
        mad, left, right = _window_medians(t, v, dev, at, window_s)
    scale = np.maximum(np.maximum(MAD_TO_SIGMA * mad, overall), floor)
    limit = threshold * scale
    va = v[at]
    far_left = np.where(np.isnan(left), True, np.abs(va - left) > limit)
    far_right = np.where(np.isnan(right), True, np.abs(va - right) > limit)
    hit = (scale > 0) & (dev[at] > limit) & far_left & far_right
    out[idx[at[hit]]] = True
    return out


def stuck(t_ns: np.ndarray, values: np.ndarray, usable: np.ndarray, deadband: float, min_duration_s: float,
          min_samples: int = 3) -> np.ndarray:
    """True for the samples of :func:`stuck_runs`."""
    out = np.zeros(values.size, bool)
    for a, b in stuck_runs(t_ns, values, usable, deadband, min_duration_s, min_samples):
        out[a:b + 1] |= usable[a:b + 1]
    return out


def stuck_runs(t_ns: np.ndarray, values: np.ndarray, usable: np.ndarray, deadband: float, min_duration_s: float,
               min_samples: int = 3) -> list[tuple[int, int]]:
    """(first, last) positions of each run of consecutive usable samples that all lie within
    half the ``deadband`` of the run's first sample (exactly equal for a zero deadband), at
    least ``min_samples`` long and lasting at least ``min_duration_s`` (none when it is inf).

    A live sensor logged periodically moves from sample to sample (noise); a frozen one
    repeats itself.  A raw report-by-exception export stores a sample only when the value
    moved by the deadband, so consecutive samples differ by about the deadband and never form
    such a run, however long the plant sat steady (half the deadband leaves room for stored
    values rounded at the deadband's edge).  An exception export written out on a grid or
    with a heartbeat repeats the held value: there a frozen sensor and a value that held
    within the deadband look alike, and a run this long is reported either way (flagged,
    not masked, unless stuck_action = "mask")."""
    out: list[tuple[int, int]] = []
    if not np.isfinite(min_duration_s):
        return out
    every = bool(usable.all())
    v = values if every else values[usable]
    if v.size < min_samples:
        return out
    deadband = 0.5 * deadband
    # candidate stretches: every step within 2*deadband (necessary for a run)
    step = np.diff(v)
    close = np.abs(step, out=step) <= 2.0 * deadband
    edges = np.diff(close, prepend=False, append=False).nonzero()[0]  # run starts and (exclusive) ends, alternating
    starts, ends = edges[::2], edges[1::2]  # in steps: a run of steps a .. b-1 joins samples a .. b
    few = ends - starts + 1 >= min_samples
    if not few.any():
        return out
    idx = np.arange(values.size) if every else np.flatnonzero(usable)
    t = t_ns if every else t_ns[idx]
    min_ns = min_duration_s * 1e9
    starts, ends = starts[few], ends[few]
    long_enough = t[ends] - t[starts] >= min_ns
    for a, b in zip(starts[long_enough], ends[long_enough]):  # samples a .. b (inclusive)
        if deadband == 0.0:
            _mark(out, idx, t, a, b, min_samples, min_ns)
            continue
        i = a
        while i <= b:
            j = i
            while j + 1 <= b and abs(v[j + 1] - v[i]) <= deadband:
                j += 1
            _mark(out, idx, t, i, j, min_samples, min_ns)
            i = j + 1
    return out


def _mark(out, idx, t, a, b, min_samples, min_ns) -> None:
    if b - a + 1 >= min_samples and (t[b] - t[a]) >= min_ns:
        out.append((int(idx[a]), int(idx[b])))


def count_first_reasons(judged: dict[str, np.ndarray]) -> tuple[np.ndarray, dict[str, int]]:
    """Combine judgements given in REASON_ORDER: each sample is counted under the first
    reason that judged it.  Returns the combined mask (True = judged) and counts."""
    n = next(iter(judged.values())).size if judged else 0
    taken = np.zeros(n, bool)
    counts: dict[str, int] = {}
    for reason in REASON_ORDER:
        m = judged.get(reason)
        if m is None:
            continue
        new = m & ~taken
        if new.any():
            counts[reason] = int(new.sum())
        taken |= m
    return taken, counts
