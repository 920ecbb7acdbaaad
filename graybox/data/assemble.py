"""From files to a Record: read every file, stamp rows in UTC, gather each tag's samples,
sort, drop duplicates, judge quality, convert units, cut windows and segments.

The order of work:

1. every file's rows of every wanted tag, in recorded order (files in the order given), as
   one :class:`~graybox.data.tags.Chunk` per tag and file;
2. time stamps resolved per file in recorded order (see timestamps.py); rows whose wall time
   does not exist are flagged, and each clock change met is reported; the experiment's start
   (time_axis.experiment_start);
3. each tag judged on its own (tags.py: windows, start, sorting, duplicates, quality, valid
   range, stuck runs, held repeats, units, spikes, gaps) into a
   :class:`~graybox.data.tags.TagData`;
4. the experiment: segments, the Record and the DataReport.

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

from graybox.data.config import parse_data_table
from graybox.data.gaps import gap_dict, gap_warning, silence_dict, silence_warning
from graybox.data.readers import QualityVocab, RawTable, file_sha256, read_table, row_count, take_rows
from graybox.data.record import InputSeries, OutputSeries, Record, Segment
from graybox.data.report import DataReport, SegmentReport, TagReport, duration_text
from graybox.data.spec import ROLE_INPUT, DataSpec, SymbolInfo, TagSpec
from graybox.data.tags import Chunk, TagData, gaps_between, iso, process_tag
from graybox.data.time_axis import describe_instant, experiment_start, first_stamp, require_time_axis
from graybox.data.timestamps import NAT, ClockChange, Place, parse_stamps
from graybox.data.units import tag_conversion
from graybox.errors import DataError

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
            gaps = [(g.start_ns, g.end_ns) for g in gaps_between(rows, lim or np.inf)]
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
                ok = c.t_ns[~c.nonexistent_rows() & np.isfinite(c.values)]
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
