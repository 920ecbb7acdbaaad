"""From files to a Record: read every file, stamp rows in UTC, gather each tag's samples,
sort, drop duplicates, judge quality, convert units, cut windows and segments.

Order of work per tag (each step a small function below):

1. every file's rows of the tag, in recorded order (files in the order given);
2. time stamps resolved per file in recorded order (see timestamps.py); rows whose wall time
   does not exist are masked with that reason, and each clock change met is reported;
3. selected windows kept, excluded windows dropped, samples before the experiment's start
   dropped (counted; the start: see timestamps.experiment_start);
4. sorted by time (stably; rows stamped earlier than the row before them in their file are
   counted and the first named); exact duplicates (same time, value and flag) dropped; of
   conflicting duplicates (same time, another value) the first recorded is kept, the others
   are counted and one example is named;
5. on the rows as logged: values that are not numbers (NaN) or infinite, quality flag, valid
   range (in the tag's own units), the tag's usual interval, stuck runs (measured outputs by
   default; "auto" from the usual interval and how often the readings repeat, see
   quality.py);
6. report-by-exception tags: held repeats (unmasked rows equal to the row before) dropped;
7. units into the model's, spikes.

Outputs keep every sample with a mask; inputs lose their masked samples (the last good
value holds).  Input gaps longer than the gap limit (see gaps.py: by default "auto", from
each tag's usual interval), excluded windows and the spaces between selected windows split
the record into segments; a segment without a valid observation of every output is dropped
(and noted).  Every gap over a limit, every stuck run, every clock change and every silence
of an input logged by exception that is long against its rhythm but under its gap limit
(held, not split: see gaps.py) is a warning in the report (``DataReport.warnings``), which
`graybox check` and `graybox fit` print; at most ``MAX_WARNED`` of each kind per tag one by
one, the rest counted (the tag's report lists every one).
"""

from __future__ import annotations

import difflib
from concurrent.futures import Executor, Future, ThreadPoolExecutor
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Mapping

import numpy as np

from graybox.data.config import ROLE_INPUT, STUCK_AUTO, DataSpec, SymbolInfo, TagSpec, parse_data_table
from graybox.data.gaps import (NO_SILENCE_RULE, Gap, GapRule, SilenceRule, gap_dict, gap_rule, gap_warning, gaps_over,
                               silence_dict, silence_rule, silence_warning, silences_within)
from graybox.data.quality import (REASON_INF, REASON_NAN, REASON_NONEXISTENT, REASON_QUALITY, REASON_RANGE,
                                  REASON_SPIKE, REASON_STUCK, StuckRule, bad_quality, count_first_reasons,
                                  held_repeats, out_of_range, repeat_share, spikes, stuck_rule, stuck_runs)
from graybox.data.readers import QualityVocab, RawTable, Rows, file_sha256, read_table, row_at, row_count, take_rows
from graybox.data.record import InputSeries, OutputSeries, Record, Segment
from graybox.data.report import DataReport, SegmentReport, TagReport, duration_text
from graybox.data.timestamps import (NAT, ClockChange, Place, backward_steps, describe_instant, experiment_start,
                                     first_stamp, parse_stamps, require_time_axis)
from graybox.data.units import Conversion, tag_conversion
from graybox.errors import DataError

_EPOCH = datetime(1970, 1, 1, tzinfo=timezone.utc)


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


def iso_z(ns: int) -> str:
    """An instant as ISO 8601 UTC with a Z, for warnings."""
    return iso(ns).replace("+00:00", "Z")


def ns_to_datetime(ns: int) -> datetime:
    """An instant in UTC nanoseconds as a timezone-aware ``datetime`` (microseconds kept)."""
    return datetime.fromtimestamp(ns // 10**9, tz=timezone.utc).replace(microsecond=(ns % 10**9) // 1000)


# -- reading -------------------------------------------------------------------------------
def read_files(spec: DataSpec, vocab: QualityVocab, hasher: Executor
               ) -> tuple[dict[str, list[Chunk]], list[Future], dict[int, RawTable], list[ClockChange]]:
    """Every file's rows of every wanted tag, stamped; each file's SHA-256 digest, being
    computed on ``hasher`` (started after the file's parse, which it would only slow down);
    and the clock changes met in local stamps."""
    wanted: dict[str, str | None] = {}
    for tg in spec.tags:
        wanted.setdefault(tg.tag, tg.quality_column)
    text_time = spec.time.format in ("iso", "local")
    chunks: dict[str, list[Chunk]] = {}
    tables: dict[int, RawTable] = {}
    digests: list[Future] = []
    changes: list[ClockChange] = []
    _read_each(spec, vocab, wanted, text_time, chunks, tables,
               after_parse=lambda path: digests.append(hasher.submit(file_sha256, path)), changes=changes)
    return chunks, digests, tables, changes


def _read_each(spec: DataSpec, vocab: QualityVocab, wanted: dict, text_time: bool,
               chunks: dict[str, list[Chunk]], tables: dict[int, RawTable], after_parse,
               changes: list | None = None) -> None:
    """Read every file into ``tables`` and its stamped rows of each wanted tag into ``chunks``
    (and the clock changes of its local stamps into ``changes``)."""
    static_offset = 0
    for k, path in enumerate(spec.files):
        table = read_table(path, spec.read, spec.time.column, wanted, text_time, vocab,
                           after_parse=lambda: after_parse(path))
        tables[k] = table
        if not table.tags:
            continue
        if len(table.tags) == 1 or spec.read.layout == "wide":
            used = next(iter(table.tags.values())).rows if spec.read.layout == "long" else \
                slice(0, len(table.numbers), 1)
        else:
            flag = np.zeros(len(table.numbers), bool)
            for tr in table.tags.values():
                flag[tr.rows] = True
            used = np.flatnonzero(flag)
        if table.time is None:
            n = len(table.numbers)
            t_all = (static_offset + np.arange(n, dtype=np.int64)) * 10**9
            static_offset += n
            gap_all = np.zeros(n, bool)
        else:
            every = row_count(used) == len(table.numbers)
            groups = None
            if spec.read.layout == "long" and spec.time.format not in ("iso", "epoch_s"):
                groups = np.full(len(table.numbers), -1, np.int64)  # wall clocks resolve per tag
                for gi, tr in enumerate(table.tags.values()):
                    groups[tr.rows] = gi
                groups = groups if every else groups[used]
            place = Place(str(path), table.word, table.numbers if every else table.numbers[used], spec.time.column)
            raw_time = table.time if every else table.time.iloc[used]
            stamps = parse_stamps(raw_time, spec.time, place, groups)
            if changes is not None and stamps.changes:
                names = list(table.tags) if groups is not None else None
                changes.extend(c.named(str(path), names) for c in stamps.changes)
            if every:
                t_all, gap_all = stamps.utc_ns, stamps.nonexistent
            else:
                t_all = np.full(len(table.numbers), NAT, np.int64)
                gap_all = np.zeros(len(table.numbers), bool)
                t_all[used] = stamps.utc_ns
                gap_all[used] = stamps.nonexistent
        any_gap = bool(gap_all.any())
        for name, tr in table.tags.items():
            chunks.setdefault(name, []).append(Chunk(k, table.word, table.numbers, tr.rows, take_rows(t_all, tr.rows),
                                                     take_rows(gap_all, tr.rows) if any_gap else None, tr.values,
                                                     tr.quality, tr.nan))


def missing_tag_error(tg: TagSpec, spec: DataSpec, tables: dict[int, RawTable]) -> DataError:
    """The DataError for a tag found in no column of an experiment's files, located at the
    tag's name, with the closest column names (case-insensitive matches first) or the
    columns the files do hold as the hint."""
    names = sorted({c for tb in tables.values() for c in tb.columns if c != tb.time_column})
    close = difflib.get_close_matches(tg.tag, names, n=3, cutoff=0.5)
    lower = [n for n in names if n.lower() == tg.tag.lower() and n not in close]
    close = lower + close
    what = "tag column" if spec.read.layout == "long" else "column"
    files = ", ".join(str(p) for p in spec.files)
    hint = (f"close matches: {', '.join(repr(c) for c in close)}" if close else
            f"the files hold: {', '.join(repr(n) for n in names[:15])}{' ...' if len(names) > 15 else ''}")
    return DataError(f"tag '{tg.tag}' (model symbol '{tg.symbol}') is in no {what} of {files}", where=tg.where_tag,
                     hint=hint + "; correct the tag name in the config")


# -- one tag ---------------------------------------------------------------------------------
def _in_windows(t: np.ndarray, windows) -> np.ndarray:
    hit = np.zeros(t.size, bool)
    for lo, hi in windows:
        hit |= (t >= lo) & (t < hi)
    return hit


def _gaps(c: Chunk) -> np.ndarray:
    return c.nonexistent if c.nonexistent is not None else np.zeros(c.values.size, bool)


def _concat(chunks: list[Chunk]):
    """Times, spring-forward flags, values, quality codes and NaN-value flags (or None) of a
    tag's chunks, end to end."""
    if len(chunks) == 1:  # one file: its arrays as they are (none is changed in place later)
        c = chunks[0]
        return c.t_ns, _gaps(c), c.values, c.quality, c.nan
    cat = np.concatenate
    t = cat([c.t_ns for c in chunks])
    gap = cat([_gaps(c) for c in chunks])
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
    gaps = _gaps_over(rows, rule.limit_s)
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


def _gaps_over(rows: np.ndarray, limit_s: float) -> tuple[Gap, ...]:
    """The gaps over ``limit_s`` between consecutive usable rows (times in ns)."""
    at = gaps_over(rows, limit_s)
    return tuple(Gap(int(rows[i]), int(rows[i + 1])) for i in at)


# -- gaps, segments ----------------------------------------------------------------------------
def merge_breaks(breaks: list[tuple[int, int]]) -> list[tuple[int, int]]:
    """Overlapping or touching ``(start, end)`` intervals (any time unit, ends included)
    merged into sorted disjoint ones."""
    out: list[list[int]] = []
    for a, b in sorted(breaks):
        if out and a <= out[-1][1]:
            out[-1][1] = max(out[-1][1], b)
        else:
            out.append([a, b])
    return [(a, b) for a, b in out]


def segment_spans(start: int, end: int, breaks: list[tuple[int, int]]) -> list[tuple[int, int]]:
    """The parts of ``[start, end]`` outside every break, in order: the record's segments
    (same time unit as the arguments; a break touching an end may leave a zero-length part)."""
    spans, cur = [], start
    for a, b in merge_breaks(breaks):
        if b <= cur or a >= end:
            if a >= end:
                break
            continue
        if a > cur:
            spans.append((cur, a))
        cur = max(cur, b)
    if cur <= end:
        spans.append((cur, end))
    return spans


# -- the whole experiment --------------------------------------------------------------------
@dataclass(frozen=True)
class Assembly:
    """What :func:`assemble` made of one experiment's data."""

    spec: DataSpec
    record: Record | None
    report: DataReport
    problems: tuple[DataError, ...]


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


def _tag_report(td: TagData, spec: DataSpec, start: int | None, end: int | None) -> TagReport:
    s, t, use = td.stats, td.t_ns, td.use
    cover = longest = None
    rule = td.rule
    med, spread = td.median_s, td.spread_s
    every = bool(use.all())
    tu = t if every else t[use]
    first_valid = int(tu[0]) if tu.size else None
    if tu.size and start is not None and end is not None and end > start:
        rows = td.usable_rows
        if rule is not None and rule.active:
            gaps = [(g.start_ns, g.end_ns) for g in td.gaps]
        else:  # no limit: for the coverage, three median intervals of a sampled tag; none for a tag
            # logged by exception (its value holds between changes, however long)
            lim = None if td.spec.logging == "exception" or not med else 3.0 * med
            gaps = [(g.start_ns, g.end_ns) for g in _gaps_over(rows, lim or np.inf)]
        lo, hi = max(int(rows[0]), start), min(int(rows[-1]), end)
        covered = max(hi - lo, 0) - sum(b - a for a, b in gaps)
        cover = 100.0 * covered / (end - start)
        if gaps:
            longest = max(b - a for a, b in gaps) / 1e9
    limit = rule.limit_s if rule is not None and rule.active else None
    stuck = td.stuck_rule
    action = "masked" if spec.stuck_action == "mask" else "flagged, not masked"
    return TagReport(
        symbol=td.spec.symbol, tag=td.spec.tag, role=td.spec.role, files=s["files"], rows_read=s["rows_read"],
        blank_cells=s["blank"], first_utc=iso(s["span"][0]), last_utc=iso(s["span"][1]),
        median_interval_s=med, interval_spread_s=spread,
        coverage_pct=cover, valid=int(use.sum()), masked=s["masked"], flagged=s["flagged"],
        exact_duplicates=s["exact"], conflicting_duplicates=s["conflict"], conflict_example=s["conflict_example"],
        held_repeats_dropped=s["repeats"], outside_windows=s["outside"], conversion=td.conversion.text,
        gap_limit_s=limit, gaps=len(td.gaps), longest_gap_s=longest, before_start=s["before_start"],
        out_of_order=s["out_of_order"], out_of_order_example=s["out_of_order_example"],
        first_valid_utc=iso(first_valid), first_valid_text=describe_instant(first_valid, spec.time, start),
        gap_rule=rule.how if rule is not None else "", gap_list=tuple(gap_dict(g, td.spec, iso) for g in td.gaps),
        stuck_after_s=stuck.limit_s if stuck is not None and stuck.active else None,
        stuck_rule=stuck.how if stuck is not None else "",
        stuck_runs=tuple({"start_utc": iso(a), "end_utc": iso(b), "duration_s": (b - a) / 1e9, "rows": n,
                          "action": action} for a, b, n in td.stuck_runs),
        held_repeats_in_stuck=s["repeats_in_stuck"], logging=td.spec.logging,
        silence_after_s=td.silence_rule.after_s if td.silence_rule.active else None,
        silence_rule=td.silence_rule.how, silences=tuple(silence_dict(g, iso) for g in td.silences))


MAX_WARNED = 20  # gaps (stuck runs, silences) of one tag printed one by one; the rest counted in one line


def _tag_warnings(td: TagData, spec: DataSpec) -> list[str]:
    """What a reader must be told about a tag: every gap over its limit, every silence long
    against its rhythm under that limit (inputs logged by exception) and every stuck run."""
    out = [gap_warning(g, td.spec, td.rule, iso_z) for g in td.gaps[:MAX_WARNED]]
    who = f"{td.spec.role} {td.spec.symbol} (tag '{td.spec.tag}')"
    if len(td.gaps) > MAX_WARNED:
        rest = td.gaps[MAX_WARNED:]
        out.append(f"{who}: {len(rest)} more gaps over {duration_text(td.rule.limit_s)} after these, the longest "
                   f"{duration_text(max(g.duration_s for g in rest))} (the data report lists every one: gap_list)")
    out += [silence_warning(g, td.spec, td.silence_rule, td.rule, iso_z) for g in td.silences[:MAX_WARNED]]
    if len(td.silences) > MAX_WARNED:
        rest = td.silences[MAX_WARNED:]
        out.append(f"{who}: {len(rest)} more silences over {duration_text(td.silence_rule.after_s)} held (not split) "
                   f"after these, the longest {duration_text(max(g.duration_s for g in rest))} (the data report lists "
                   "every one: silences)")
    limit = td.stuck_rule.limit_s
    auto = " (auto)" if td.stuck_rule.how.startswith("auto") else ""
    for a, b, n in td.stuck_runs[:MAX_WARNED]:
        what = "masked" if spec.stuck_action == "mask" else "flagged, not masked (stuck_action = \"mask\" masks it)"
        held = (" (logged by exception: a frozen sensor, or a value that held within the deadband)"
                if td.spec.logging == "exception" else "")
        flat = (f"flat within half its deadband ({td.spec.deadband:g})" if td.spec.deadband
                else "one value repeated exactly")
        out.append(f"{who}: {flat} for {duration_text((b - a) / 1e9)}, "
                   f"{iso_z(a)} .. {iso_z(b)}, {n} rows, over stuck_after {duration_text(limit)}{auto}: a stuck "
                   f"sensor{held}; {what}")
    if len(td.stuck_runs) > MAX_WARNED:
        out.append(f"{who}: {len(td.stuck_runs) - MAX_WARNED} more stuck runs after these (the data report lists "
                   "every one: stuck_runs)")
    return out


def _valid_within(td: TagData, lo: int, hi: int) -> int:
    """How many usable samples of the tag lie in ``[lo, hi]`` (its times are sorted)."""
    a, b = np.searchsorted(td.t_ns, lo, side="left"), np.searchsorted(td.t_ns, hi, side="right")
    return int(np.count_nonzero(td.use[a:b]))


def _check_select(spec: DataSpec, tags: list[TagData], raw_spans: list[tuple[int, int]]) -> None:
    """A selected window in which no tag has a sample is an error."""
    from graybox.data.config import table_from_where

    for lo, hi in spec.select:
        if not any(((td.t_ns >= lo) & (td.t_ns < hi)).any() for td in tags):
            first = min(a for a, _ in raw_spans) if raw_spans else None
            last = max(b for _, b in raw_spans) if raw_spans else None
            where = table_from_where({}, spec.where).where("select")
            raise DataError(f"the window {iso(lo)} .. {iso(hi)} selects nothing", where=where,
                            hint=f"the data run from {iso(first)} to {iso(last)} (UTC)")


def assemble(spec: DataSpec) -> Assembly:
    """Everything the data layer makes of a data spec's files: the record (None when a
    problem stops a fit), the report, and those problems (none raised here)."""
    with ThreadPoolExecutor(max_workers=1) as hasher:
        # the files are hashed on a second thread (hashlib releases the GIL) while this one
        # reads, stamps and judges their samples; the digests are collected at the end
        return _assemble(spec, hasher)


def _assemble(spec: DataSpec, hasher: Executor) -> Assembly:
    vocab = QualityVocab()
    chunks, digests, tables, clock_changes = read_files(spec, vocab, hasher)
    convs = {tg.symbol: tag_conversion(tg.units, tg.model_units, tag=tg.tag, where=tg.where) for tg in spec.tags}
    tags: list[TagData] = []
    raw_spans = []
    for tg in spec.tags:
        if tg.tag not in chunks:
            raise missing_tag_error(tg, spec, tables)
    every_chunk = [c for cs in chunks.values() for c in cs]
    origin, origin_from = experiment_start(spec.start, first_stamp([c.t_ns for c in every_chunk],
                                                                   [c.nonexistent for c in every_chunk]), spec.select)
    for tg in spec.tags:
        if spec.select:  # the span of the data, for the message of a window that selects nothing
            for c in chunks[tg.tag]:
                ok = c.t_ns[~_gaps(c) & np.isfinite(c.values)]
                if ok.size:
                    raw_spans.append((int(ok.min()), int(ok.max())))
        tags.append(process_tag(tg, chunks[tg.tag], spec, convs[tg.symbol], vocab.texts, start=origin))
    if spec.select:
        _check_select(spec, tags, raw_spans)
    problems: list[DataError] = []
    nonempty = [td for td in tags if td.t_ns.size]
    start = origin if origin is not None else (min(int(td.t_ns[0]) for td in nonempty) if nonempty else None)
    end = max(int(td.t_ns[-1]) for td in nonempty) if nonempty else None
    for td in tags:
        if td.t_ns.size == 0:
            problems.append(DataError(f"{td.spec.role} '{td.spec.symbol}' (tag '{td.spec.tag}') has no sample left",
                                      where=td.spec.where_tag, hint="check the start and the selected and excluded windows"))
        elif not td.use.any():
            reasons = ", ".join(f"{n} {r}" for r, n in td.stats["masked"].items())
            problems.append(DataError(
                f"every sample of {td.spec.role} '{td.spec.symbol}' (tag '{td.spec.tag}') is masked ({reasons})",
                where=td.spec.where_tag, hint="check good_quality, the valid range and the units of that tag"))
    segments: list[tuple[int, int]] = []
    notes: list[str] = []
    if not problems and start is not None:
        segments, notes = _segments(spec, tags, start, end)
        if not segments:
            problems.append(DataError("no segment holds a valid observation of every output",
                                      where=spec.where, hint="widen the windows or raise max_gap"))
    tag_reports = tuple(_tag_report(td, spec, start, end) for td in tags)
    warnings = [c.warning() for c in clock_changes]
    for td in tags:
        warnings += _tag_warnings(td, spec)
    start_text = describe_instant(start, spec.time) + (f" ({origin_from})" if origin_from else "")
    sources = tuple({"path": str(path), "sha256": d.result()} for path, d in zip(spec.files, digests))
    record = _record(spec, tags, start, segments, sources, notes) if segments else None
    seg_reports = tuple(
        SegmentReport(i + 1, iso(lo), iso(hi), (hi - lo) / 1e9,
                      sum(_valid_within(td, lo, hi) for td in tags if td.spec.role != ROLE_INPUT))
        for i, (lo, hi) in enumerate(segments))
    holdout = spec.holdout.isoformat() if isinstance(spec.holdout, datetime) else spec.holdout
    report = DataReport(
        experiment=spec.name, sources=sources, tags=tag_reports,
        start_utc=iso(start), end_utc=iso(end), segments=seg_reports,
        select=tuple((iso(a), iso(b)) for a, b in spec.select), exclude=tuple((iso(a), iso(b)) for a, b in spec.exclude),
        holdout=holdout, problems=tuple(p.render() for p in problems), notes=tuple(notes),
        start_from=origin_from, start_text=start_text, warnings=tuple(warnings),
        clock_changes=tuple(c.to_dict() for c in clock_changes))
    return Assembly(spec, record, report, tuple(problems))


def _segments(spec: DataSpec, tags: list[TagData], start: int, end: int
              ) -> tuple[list[tuple[int, int]], list[str]]:
    """The spans between input gaps, excluded windows and gaps between selected windows that
    hold a valid observation of every output; a note for each span dropped."""
    breaks = []
    for td in tags:
        if td.spec.role == ROLE_INPUT:
            breaks += [(g.start_ns, g.end_ns) for g in td.gaps]
    breaks += [(lo, hi) for lo, hi in spec.exclude if hi > start and lo < end]
    sel = sorted(spec.select)
    breaks += [(sel[i][1], sel[i + 1][0]) for i in range(len(sel) - 1) if sel[i + 1][0] > sel[i][1]]
    outs = [td for td in tags if td.spec.role != ROLE_INPUT]
    segments, notes = [], []
    for lo, hi in segment_spans(start, end, breaks):
        lacking = [td.spec.symbol for td in outs if not _valid_within(td, lo, hi)]
        if lacking:
            notes.append(f"segment {iso(lo)} .. {iso(hi)} dropped: no valid observation of {', '.join(lacking)}")
        else:
            segments.append((lo, hi))
    return segments, notes


def _seconds_since(t_ns: np.ndarray, start: int) -> np.ndarray:
    """``(t_ns - start) / 1e9`` into one new array."""
    out = np.empty(t_ns.size)
    np.subtract(t_ns, start, out=out, casting="unsafe")
    out /= 1e9
    return out


def _record(spec: DataSpec, tags: list[TagData], start: int, segments, sources, notes) -> Record:
    inputs, outputs = {}, {}
    for td in tags:
        t = _seconds_since(td.t_ns, start)
        name, units = td.spec.symbol, td.spec.model_units
        if td.spec.role == ROLE_INPUT:  # masked input samples are left out: the input holds across them
            every = bool(td.use.all())
            inputs[name] = InputSeries(name, t if every else t[td.use], td.values if every else td.values[td.use],
                                       hold=td.spec.hold, units=units)
        else:
            outputs[name] = OutputSeries(name, t, td.values, mask=td.use, units=units)
    segs = tuple(Segment((lo - start) / 1e9, (hi - start) / 1e9) for lo, hi in segments)
    return Record(spec.name, ns_to_datetime(start), inputs, outputs, segs, tuple(sources), tuple(notes))


# -- public ------------------------------------------------------------------------------------
def load_spec(spec: DataSpec) -> tuple[Record, DataReport]:
    """Read, check and convert the data a validated data spec names into a Record in model
    units; the first problem that stops a fit is raised (each located at the file and line,
    column or tag)."""
    result = assemble(spec)
    if result.problems:
        raise result.problems[0]
    assert result.record is not None
    return result.record, result.report


def check_spec(spec: DataSpec, sensitivity_fn=None) -> DataReport:
    """Read and validate the data of a data spec without fitting.  Problems that stop a fit
    (an output with every sample masked, no usable segment) are listed in
    ``report.problems`` (``report.ok`` is False); errors that stop reading are raised.  With
    ``sensitivity_fn`` (see :func:`graybox.data.windows.rank_windows`) the informative
    windows of the record are ranked too, laid out by the one rule for their settings
    (:func:`graybox.data.windows.window_plan`: the ``[informative]`` table or its defaults)."""
    result = assemble(spec)
    report = result.report
    if sensitivity_fn is not None and result.record is not None:
        from graybox.data.windows import rank_record

        report = report.with_windows(rank_record(result.record, sensitivity_fn, spec.search))
    return report


def load_experiment(table: dict, name: str, *, symbols: Mapping[str, SymbolInfo], base_dir: Path,
                    where: str, dynamic: bool = False) -> tuple[Record, DataReport]:
    """Validate one experiment's data table and read its data (:func:`load_spec`).

    ``dynamic``: the model has states, so the table must name its time column (a static
    model may take the rows in order).  Raises ConfigError for mistakes in the table,
    DataError for problems with the data (each located at the file and line, column or tag)."""
    spec = parse_data_table(table, name, symbols=symbols, base_dir=Path(base_dir), where=where)
    require_time_axis(spec, dynamic)
    return load_spec(spec)


def check_experiment(table: dict, name: str, *, symbols: Mapping[str, SymbolInfo], base_dir: Path,
                     where: str, sensitivity_fn=None, dynamic: bool = False) -> DataReport:
    """Validate one experiment's data table and check its data without fitting
    (:func:`check_spec`).  ``dynamic``: as for :func:`load_experiment`."""
    spec = parse_data_table(table, name, symbols=symbols, base_dir=Path(base_dir), where=where)
    require_time_axis(spec, dynamic)
    return check_spec(spec, sensitivity_fn)
