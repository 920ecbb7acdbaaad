"""One tag's samples, from its rows in every file to judged samples in model units.

Order of work per tag (each step a small function below; the files are read and stamped
in assemble.py, which then builds the experiment from every tag's :class:`TagData`):

1. every file's rows of the tag (:class:`Chunk`, one per file) end to end, in recorded order;
2. rows whose wall time does not exist are masked with that reason; selected windows kept,
   excluded windows dropped, samples before the experiment's start dropped (counted);
3. sorted by time (stably; rows stamped earlier than the row before them in their file are
   counted and the first named); exact duplicates (same time, value and flag) dropped; of
   conflicting duplicates (same time, another value) the first recorded is kept, the others
   are counted and one example is named;
4. on the rows as logged: values that are not numbers (NaN) or infinite, quality flag, valid
   range (in the tag's own units), the tag's usual interval, stuck runs (quality.py), the
   gap rule (gaps.py);
5. report-by-exception tags: held repeats (unmasked rows equal to the row before) dropped;
6. units into the model's, spikes; gaps over the limit and silences under it found.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timezone

import numpy as np

from graybox.data.config import STUCK_AUTO
from graybox.data.gaps import (NO_SILENCE_RULE, Gap, GapRule, SilenceRule, gap_rule, gaps_over, silence_rule,
                               silences_within)
from graybox.data.quality import (REASON_INF, REASON_NAN, REASON_NONEXISTENT, REASON_QUALITY, REASON_RANGE,
                                  REASON_SPIKE, REASON_STUCK, StuckRule, bad_quality, count_first_reasons,
                                  held_repeats, out_of_range, repeat_share, spikes, stuck_rule, stuck_runs)
from graybox.data.readers import Rows, row_at
from graybox.data.spec import DataSpec, TagSpec
from graybox.data.time_axis import backward_steps
from graybox.data.units import Conversion


@dataclass(frozen=True)
class Chunk:
    """One tag's rows from one file, in recorded order, stamped in UTC."""

    file: int  # index into the experiment's files
    word: str
    table_numbers: np.ndarray  # line/row number of every row of the file's table
    rows: Rows  # this tag's rows of that table
    t_ns: np.ndarray
    nonexistent: np.ndarray | None  # None: no stamp of the file fell into a spring-forward gap
    values: np.ndarray
    quality: np.ndarray | None
    nan: np.ndarray | None = None  # True where the cell held a NaN value (None: none did)

    def number(self, i: int) -> int:
        """The line/row number of this chunk's sample ``i`` (looked up only for messages)."""
        return int(self.table_numbers[row_at(self.rows, i)])

    def nonexistent_rows(self) -> np.ndarray:
        """Where the chunk's stamps fell into a spring-forward gap (all False when none did)."""
        return self.nonexistent if self.nonexistent is not None else np.zeros(self.values.size, bool)


@dataclass(frozen=True)
class TagData:
    """One tag after all judgement: sorted samples in model units with their use mask."""

    spec: TagSpec
    t_ns: np.ndarray
    values: np.ndarray  # model units
    use: np.ndarray  # True = usable (not masked)
    stuck: np.ndarray  # True = judged stuck (masked too if stuck_action = "mask")
    conversion: Conversion
    stats: dict
    logged: np.ndarray | None = None  # times of the usable rows as logged, held repeats included (None: t_ns[use])
    rule: GapRule | None = None  # the gap limit that applies
    gaps: tuple[Gap, ...] = ()  # gaps over it between usable samples
    median_s: float | None = None  # median and interquartile range of the intervals as logged
    spread_s: float | None = None
    stuck_runs: tuple[tuple[int, int, int], ...] = ()  # (first ns, last ns, rows) of each stuck run
    stuck_rule: StuckRule | None = None  # the stuck rule that applies
    silence_rule: SilenceRule = NO_SILENCE_RULE  # which silences under the gap limit are reported
    silences: tuple[Gap, ...] = ()  # those silences (held, not split)

    @property
    def usable_rows(self) -> np.ndarray:
        """Times of the usable rows as logged: a held repeat says its value still held."""
        if self.logged is not None:
            return self.logged
        return self.t_ns if bool(self.use.all()) else self.t_ns[self.use]


def iso(ns: int | None) -> str | None:
    """An instant in UTC nanoseconds as ISO 8601 text to the microsecond (None stays None)."""
    if ns is None:
        return None
    return datetime.fromtimestamp(ns // 10**9, tz=timezone.utc).replace(
        microsecond=(ns % 10**9) // 1000).isoformat()


def quartiles(x: np.ndarray) -> np.ndarray:
    """The 25th, 50th and 75th percentiles of ``x`` with linear interpolation (as
    ``numpy.percentile``'s default), from one sort: sample intervals are mostly equal, which
    sorts much faster than the selection numpy.percentile runs."""
    s = np.sort(x)
    pos = np.array([0.25, 0.5, 0.75]) * (s.size - 1)
    lo = np.floor(pos).astype(np.intp)
    hi = np.minimum(lo + 1, s.size - 1)
    a, b = s[lo].astype(float), s[hi].astype(float)
    return a + (b - a) * (pos - lo)


# -- one tag ---------------------------------------------------------------------------------
def _in_windows(t: np.ndarray, windows) -> np.ndarray:
    hit = np.zeros(t.size, bool)
    for lo, hi in windows:
        hit |= (t >= lo) & (t < hi)
    return hit


def _concat(chunks: list[Chunk]):
    """Times, spring-forward flags, values, quality codes and NaN-value flags (or None) of a
    tag's chunks, end to end."""
    if len(chunks) == 1:  # one file: its arrays as they are (none is changed in place later)
        c = chunks[0]
        return c.t_ns, c.nonexistent_rows(), c.values, c.quality, c.nan
    cat = np.concatenate
    t = cat([c.t_ns for c in chunks])
    gap = cat([c.nonexistent_rows() for c in chunks])
    v = cat([c.values for c in chunks])
    if any(c.quality is not None for c in chunks):
        q = cat([c.quality if c.quality is not None else np.full(c.values.size, -1, np.int32) for c in chunks])
    else:
        q = None
    nan = None
    if any(c.nan is not None for c in chunks):
        nan = cat([c.nan if c.nan is not None else np.zeros(c.values.size, bool) for c in chunks])
    return t, gap, v, q, nan


def _source(chunks: list[Chunk], i: int, files) -> str:
    """File and line/row of sample ``i`` of the chunks end to end."""
    for c in chunks:
        if i < c.values.size:
            return f"{files[c.file]} {c.word} {c.number(i)}"
        i -= c.values.size
    raise IndexError(i)


def _dedupe(t, v, q):
    """Indices to keep after a stable sort (None: all, in the order given); counts of exact
    and conflicting duplicates, and the (earlier, later) positions of the first conflict."""
    if t.size < 2 or bool(np.all(t[1:] > t[:-1])):  # already strictly increasing: nothing to do
        return None, 0, 0, None
    order = np.argsort(t, kind="stable")
    ts, vs = t[order], v[order]
    same_t = np.zeros(ts.size, bool)
    same_t[1:] = ts[1:] == ts[:-1]
    if not same_t.any():
        return order, 0, 0, None
    # compare each duplicate with the first row of its time
    first_of = np.maximum.accumulate(np.where(~same_t, np.arange(ts.size), 0))
    same_v = (vs == vs[first_of]) | (np.isnan(vs) & np.isnan(vs[first_of]))
    if q is not None:
        qs = q[order]
        same_v &= qs == qs[first_of]
    exact = same_t & same_v
    conflict = same_t & ~same_v
    example = None
    if conflict.any():
        j = int(np.argmax(conflict))
        example = (int(order[first_of[j]]), int(order[j]))
    return order[~same_t], int(exact.sum()), int(conflict.sum()), example


def _out_of_order(t: np.ndarray, chunks: list[Chunk], idx: np.ndarray | None, files) -> tuple[int, str | None]:
    """Rows stamped earlier than the row before them in the same file (the kept rows, in
    recorded order), and the first such pair as text."""
    file_starts = None
    if len(chunks) > 1:
        file_starts = np.cumsum([0] + [c.values.size for c in chunks[:-1]])
        if idx is not None:
            file_starts = np.searchsorted(idx, file_starts)
    n, pos = backward_steps(t, file_starts)
    if not n:
        return 0, None
    ra, rb = (pos - 1, pos) if idx is None else (int(idx[pos - 1]), int(idx[pos]))
    return n, (f"{_source(chunks, rb, files)} ({iso(int(t[pos]))}) after "
               f"{_source(chunks, ra, files)} ({iso(int(t[pos - 1]))})")


def _interval_stats(t: np.ndarray) -> tuple[float | None, float | None, float | None]:
    """Lower quartile, median and upper quartile (s) of a tag's intervals as logged; None
    below two rows."""
    if t.size < 2:
        return None, None, None
    q25, q50, q75 = quartiles(np.diff(t)) / 1e9
    return float(q25), float(q50), float(q75)


def _thin_repeats(t: np.ndarray, v: np.ndarray, masked: np.ndarray, limit_s: float
                  ) -> tuple[np.ndarray | None, np.ndarray | None]:
    """Which rows to keep after dropping held repeats (None: every row), and for every row
    the position among the kept ones of the row whose value it holds (None: every row).  A
    row after a gap over ``limit_s`` is a new reading, never a repeat of the row before it."""
    rep = held_repeats(v, masked)
    if np.isfinite(limit_s) and rep.any():
        rep[1:] &= np.diff(t) <= limit_s * 1e9
    if not rep.any():
        return None, None
    return np.flatnonzero(~rep), np.cumsum(~rep) - 1


def _non_numbers(v: np.ndarray, any_nan: bool) -> tuple[np.ndarray | None, np.ndarray | None]:
    """Where rows with a value hold NaN (only when the reader saw any) and where they are
    infinite; None for either when there are none."""
    infinite = np.isinf(v)
    return (np.isnan(v) if any_nan else None), (infinite if infinite.any() else None)


def _stuck_rows(t: np.ndarray, v: np.ndarray, usable: np.ndarray, tg: TagSpec, rule: StuckRule
                ) -> tuple[np.ndarray, tuple[tuple[int, int, int], ...]]:
    """The rows in stuck runs (the tag's stuck rule, see quality.stuck_rule) and each run's
    (first ns, last ns, rows)."""
    runs = stuck_runs(t, v, usable, tg.deadband, rule.limit_s)
    st = np.zeros(t.size, bool)
    for a, b in runs:
        st[a:b + 1] = usable[a:b + 1]
    return st, tuple((int(t[a]), int(t[b]), int(st[a:b + 1].sum())) for a, b in runs)


def process_tag(tg: TagSpec, chunks: list[Chunk], spec: DataSpec, conv: Conversion,
                quality_texts: list[str] = (), start: int | None = None) -> TagData:
    """One tag's samples after judgement; ``start``: the experiment's start (ns), samples
    before it are dropped and counted."""
    t, gap, v, q, nan = _concat(chunks)
    is_nan = np.isnan(v)
    blank_rows = is_nan if nan is None else is_nan & ~nan
    has_value = ~blank_rows
    blank = int(blank_rows.sum())
    rows_read = int(has_value.sum())
    keep = has_value & ~gap
    n_nonexistent = int((has_value & gap).sum())
    outside = 0
    if spec.select or spec.exclude:
        inside = np.ones(t.size, bool)
        if spec.select:
            inside &= _in_windows(t, spec.select)
        if spec.exclude:
            inside &= ~_in_windows(t, spec.exclude)
        outside = int((keep & ~inside).sum())
        keep &= inside
    before_start = 0
    if start is not None and t.size and int(t.min()) < start:
        early = keep & (t < start)
        before_start = int(early.sum())
        keep &= ~early
    idx = None if keep.all() else np.flatnonzero(keep)
    if idx is not None:
        t, v = t[idx], v[idx]
        q = q[idx] if q is not None else None
    order, n_exact, n_conflict, example = _dedupe(t, v, q)
    n_back, back_text = (_out_of_order(t, chunks, idx, spec.files) if order is not None else (0, None))
    conflict_text = None
    if example is not None:
        a, b = example
        ra, rb = (a, b) if idx is None else (int(idx[a]), int(idx[b]))  # rows in the concatenation
        conflict_text = (f"{_source(chunks, ra, spec.files)} ({v[a]:g}) and "
                         f"{_source(chunks, rb, spec.files)} ({v[b]:g}) at {iso(int(t[a]))}")
    if order is not None:
        t, v = t[order], v[order]
        q = q[order] if q is not None else None
    # judged on the rows as logged, before any held repeat is thinned
    span = (int(t[0]), int(t[-1])) if t.size else (None, None)
    lower_s, median_s, upper_s = _interval_stats(t)
    spread_s = upper_s - lower_s if median_s is not None else None
    rule = gap_rule(tg, spec, median_s)
    bad_range = out_of_range(v, tg.valid)
    bq = bad_quality(q, list(quality_texts), spec.good_quality)
    not_number, infinite = _non_numbers(v, nan is not None)
    pre_bad = bad_range
    for m in (bq, not_number, infinite):
        if m is not None:
            pre_bad = pre_bad | m
    stuck = _tag_stuck_rule(tg, spec, v, ~pre_bad, median_s)
    st, runs_ns = _stuck_rows(t, v, ~pre_bad, tg, stuck)
    mask_stuck = spec.stuck_action == "mask"
    n_stuck = int(st.sum())  # rows as logged, held repeats among them included
    repeats = repeats_in_stuck = 0
    t_rows = owner = None
    if tg.logging == "exception" and v.size:
        kept, owner = _thin_repeats(t, v, pre_bad | st if mask_stuck else pre_bad, rule.limit_s)
        if kept is not None:
            t_rows = t
            repeats = int(t.size - kept.size)
            if n_stuck:
                dropped = np.ones(t.size, bool)
                dropped[kept] = False
                repeats_in_stuck = int((dropped & st).sum())
            t, v, bad_range, st, pre_bad = t[kept], v[kept], bad_range[kept], st[kept], pre_bad[kept]
            bq = bq[kept] if bq is not None else None
            not_number = not_number[kept] if not_number is not None else None
            infinite = infinite[kept] if infinite is not None else None
    judged = {REASON_RANGE: bad_range}
    if bq is not None:
        judged[REASON_QUALITY] = bq
    if not_number is not None:
        judged[REASON_NAN] = not_number
    if infinite is not None:
        judged[REASON_INF] = infinite
    values = conv.apply(v)
    if spec.spikes is not None:
        floor = tg.deadband * abs(conv.scale)
        judged[REASON_SPIKE] = spikes(t, values, ~(pre_bad | st), spec.spikes.window, spec.spikes.threshold, floor)
    flagged: dict[str, int] = {}
    if mask_stuck:
        judged[REASON_STUCK] = st
    elif n_stuck:
        flagged[REASON_STUCK] = n_stuck
    masked_now, counts = count_first_reasons(judged)
    masked = {REASON_NONEXISTENT: n_nonexistent} if n_nonexistent else {}
    masked.update(counts)
    use = ~masked_now
    logged = t_rows[use[owner]] if t_rows is not None else None  # a repeat is usable as its value is
    rows = logged if logged is not None else (t if bool(use.all()) else t[use])
    gaps = gaps_between(rows, rule.limit_s)
    quiet = silence_rule(tg, rule, lower_s, upper_s)
    silences = tuple(Gap(int(rows[i]), int(rows[i + 1])) for i in silences_within(rows, quiet, rule))
    stats = dict(files=tuple(dict.fromkeys(str(spec.files[c.file]) for c in chunks)), rows_read=rows_read,
                 blank=blank, masked=masked, flagged=flagged, exact=n_exact, conflict=n_conflict,
                 conflict_example=conflict_text, repeats=repeats, repeats_in_stuck=repeats_in_stuck,
                 outside=outside, before_start=before_start, out_of_order=n_back, out_of_order_example=back_text,
                 span=span)
    return TagData(tg, t, values, use, st, conv, stats, logged, rule, gaps, median_s, spread_s, runs_ns, stuck,
                   quiet, silences)


def _tag_stuck_rule(tg: TagSpec, spec: DataSpec, v: np.ndarray, usable: np.ndarray, median_s: float | None
                    ) -> StuckRule:
    """The stuck rule of a tag; its repeat share is counted only when "auto" needs it."""
    share = None
    if STUCK_AUTO in (tg.stuck_after, spec.stuck_after) and tg.logging != "exception":
        share = repeat_share(v, usable, tg.deadband)
    return stuck_rule(tg.role, tg.logging, tg.stuck_after, spec.stuck_after, median_s, share)


def gaps_between(rows: np.ndarray, limit_s: float) -> tuple[Gap, ...]:
    """The gaps over ``limit_s`` between consecutive usable rows (times in ns)."""
    at = gaps_over(rows, limit_s)
    return tuple(Gap(int(rows[i]), int(rows[i + 1])) for i in at)
