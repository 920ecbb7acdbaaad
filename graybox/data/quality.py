"""Quality judgements on one tag's samples (sorted by time): each function returns a boolean
array, True where the sample is judged (bad, out of range, a spike, stuck, a held repeat).

Reasons are counted once per sample, in this order: a time that does not exist, a bad
quality flag, out of the valid range, a spike, stuck.  Spike and stuck judgements only see
samples that passed the earlier ones.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

REASON_NONEXISTENT = "nonexistent time (clocks went forward)"
REASON_QUALITY = "bad quality flag"
REASON_RANGE = "outside valid range"
REASON_SPIKE = "spike"
REASON_STUCK = "stuck sensor"
REASON_ORDER = (REASON_NONEXISTENT, REASON_QUALITY, REASON_RANGE, REASON_SPIKE, REASON_STUCK)

# 1.4826 = 1/Phi^-1(3/4): the MAD of a normal distribution times it is its standard deviation
# (common practice in robust statistics).
MAD_TO_SIGMA = 1.482602218505602


def bad_quality(quality: np.ndarray | None, good: frozenset[str]) -> np.ndarray | None:
    """True where a quality flag is present and not one of the good ones (a blank flag is bad)."""
    if quality is None:
        return None
    codes, uniq = pd.factorize(quality, sort=False)
    is_good = np.array([u in good for u in uniq] + [False], bool)
    return ~is_good[codes]


def out_of_range(values: np.ndarray, valid: tuple[float, float] | None) -> np.ndarray:
    """True where a value lies outside ``[low, high]`` (inclusive bounds are valid)."""
    if valid is None:
        return np.zeros(values.size, bool)
    lo, hi = valid
    return (values < lo) | (values > hi)


def held_repeats(values: np.ndarray) -> np.ndarray:
    """True for a sample equal to the one before it: in a report-by-exception export written
    out on a grid, these are the historian's held value, not new observations."""
    out = np.zeros(values.size, bool)
    out[1:] = values[1:] == values[:-1]
    return out


def spikes(t_ns: np.ndarray, values: np.ndarray, usable: np.ndarray, window_s: float, threshold: float,
           floor: float = 0.0) -> np.ndarray:
    """Samples further than ``threshold`` robust standard deviations from the running median
    of a centred time window; the robust deviation is 1.4826 times the running median of
    absolute deviations from the running median (never below ``floor``).  Where that
    deviation is zero (a flat signal) nothing is judged."""
    out = np.zeros(values.size, bool)
    idx = np.flatnonzero(usable)
    if idx.size < 3:
        return out
    s = pd.Series(values[idx], index=pd.DatetimeIndex(t_ns[idx].view("M8[ns]")))
    win = pd.Timedelta(seconds=window_s)
    med = s.rolling(win, center=True, min_periods=1).median()
    dev = (s - med).abs()
    mad = dev.rolling(win, center=True, min_periods=1).median()
    scale = np.maximum(MAD_TO_SIGMA * mad.to_numpy(), floor)
    d = dev.to_numpy()
    hit = (scale > 0) & (d > threshold * scale)
    out[idx[hit]] = True
    return out


def stuck(t_ns: np.ndarray, values: np.ndarray, usable: np.ndarray, deadband: float, min_duration_s: float,
          min_samples: int = 3) -> np.ndarray:
    """Runs of consecutive usable samples that all lie within ``deadband`` of the run's first
    sample (exactly equal for a zero deadband), at least ``min_samples`` long and lasting at
    least ``min_duration_s``.

    A live sensor logged periodically moves by more than its deadband from sample to sample
    (noise); a frozen one repeats itself.  A report-by-exception export stores a sample only
    when the value moved by more than the deadband, so it never forms such a run, however
    long the plant sat steady."""
    out = np.zeros(values.size, bool)
    idx = np.flatnonzero(usable)
    if idx.size < min_samples:
        return out
    v, t = values[idx], t_ns[idx]
    # candidate stretches: every step within 2*deadband (necessary for a run)
    close = np.abs(np.diff(v)) <= 2.0 * deadband
    starts = np.flatnonzero(np.diff(np.concatenate([[0], close.astype(np.int8), [0]])) == 1)
    ends = np.flatnonzero(np.diff(np.concatenate([[0], close.astype(np.int8), [0]])) == -1)  # exclusive, in steps
    min_ns = min_duration_s * 1e9
    for a, b in zip(starts, ends):  # samples a .. b (inclusive)
        if b - a + 1 < min_samples or (t[b] - t[a]) < min_ns:
            continue
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
        out[idx[a:b + 1]] = True


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
