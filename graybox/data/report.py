"""What the data layer did to each tag, as data (``to_dict``) and as a readable table
(``summary``)."""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any


@dataclass(frozen=True)
class TagReport:
    """What loading did to one tag: rows read and blank cells over every file, first and
    last stamps (UTC text), median sample interval and its interquartile spread (s),
    coverage (% of the record's span outside this tag's gaps), samples used, and the
    samples masked or flagged by reason."""

    symbol: str
    tag: str
    role: str
    files: tuple[str, ...]
    rows_read: int  # samples with a value, over every file
    blank_cells: int  # rows of the tag (or table) without a value
    first_utc: str | None
    last_utc: str | None
    median_interval_s: float | None
    interval_spread_s: float | None  # interquartile range of the sample intervals
    coverage_pct: float | None  # share of the record's span not inside a gap of this tag
    valid: int  # samples used (inputs) or compared (outputs)
    masked: dict[str, int]
    flagged: dict[str, int]
    exact_duplicates: int
    conflicting_duplicates: int
    conflict_example: str | None
    held_repeats_dropped: int
    outside_windows: int
    conversion: str
    gap_limit_s: float | None
    gaps: int
    longest_gap_s: float | None
    before_start: int = 0  # samples stamped before the experiment's start, dropped
    out_of_order: int = 0  # rows stamped earlier than the row before them (same file), sorted
    out_of_order_example: str | None = None
    first_valid_utc: str | None = None  # the first usable sample (an output's first observation)
    first_valid_text: str = ""  # the same for a reader (elapsed time, offset from the start)
    gap_rule: str = ""  # how gap_limit_s was set ("auto (default; ...)", "the tag's max_gap", "off (...)")
    gap_list: tuple[dict, ...] = ()  # every gap over the limit: start_utc, end_utc, duration_s, action
    stuck_after_s: float | None = None  # the stuck rule's duration for this tag; None = not judged
    stuck_runs: tuple[dict, ...] = ()  # every stuck run: start_utc, end_utc, duration_s, rows, action
    held_repeats_in_stuck: int = 0  # of held_repeats_dropped, those inside stuck runs (flagged, not masked)
    logging: str = "sampled"
    stuck_rule: str = ""  # how stuck_after_s was set ("auto, ...", "the tag's stuck_after", ...)
    silence_after_s: float | None = None  # inputs logged by exception: silences longer are reported; None = none
    silence_rule: str = ""  # how silence_after_s was set
    silences: tuple[dict, ...] = ()  # each silence over it, under the gap limit: start_utc, end_utc, duration_s, action

    @property
    def masked_total(self) -> int:
        """The samples masked, over every reason."""
        return sum(self.masked.values())


@dataclass(frozen=True)
class SegmentReport:
    """One segment of the record: its number, UTC span, duration (s) and observations in it."""

    index: int
    start_utc: str
    end_utc: str
    duration_s: float
    observations: int


@dataclass(frozen=True)
class DataReport:
    """What loading an experiment found, for people: the files read (path, sha256), each
    tag's report, the record's span and segments, the select/exclude windows and holdout,
    problems that stop a fit (empty = it can run), notes, informative windows when ranked,
    and where the experiment's start came from."""

    experiment: str
    sources: tuple[dict, ...]
    tags: tuple[TagReport, ...]
    start_utc: str | None
    end_utc: str | None
    segments: tuple[SegmentReport, ...]
    select: tuple[tuple[str, str], ...] = ()
    exclude: tuple[tuple[str, str], ...] = ()
    holdout: float | str | None = None
    problems: tuple[str, ...] = ()  # why a fit could not run; empty = it could
    notes: tuple[str, ...] = ()
    windows: tuple[Any, ...] = field(default=())  # informative windows (WindowScore), when ranked
    start_from: str = ""  # what set start_utc (the experiment's start): declared, first stamp, select window
    start_text: str = ""  # the start for a reader
    warnings: tuple[str, ...] = ()  # what a reader must know: clock changes, long gaps, long silences, stuck runs
    clock_changes: tuple[dict, ...] = ()  # each clock change met in local stamps, and how it was resolved

    @property
    def ok(self) -> bool:
        """Whether a fit can run on this data (no problems found)."""
        return not self.problems

    def tag(self, symbol: str) -> TagReport:
        """The report of the tag that feeds model symbol ``symbol`` (StopIteration if none)."""
        return next(t for t in self.tags if t.symbol == symbol)

    def with_windows(self, windows) -> "DataReport":
        """The same report with the informative windows (``WindowScore``) attached."""
        from dataclasses import replace

        return replace(self, windows=tuple(windows))

    def to_dict(self) -> dict:
        """The report as plain values (JSON-ready), with ``ok`` and each window's dict form."""
        d = asdict(self)
        d["windows"] = [w.to_dict() if hasattr(w, "to_dict") else w for w in self.windows]
        d["ok"] = self.ok
        return d

    def summary(self) -> str:
        """The report as the text ``graybox check`` prints: span, start, sources, a table of
        tags, segments, windows, warnings and problems."""
        lines = [f"experiment '{self.experiment}': {self.start_utc or '?'} .. {self.end_utc or '?'} (UTC)"]
        if self.start_text:
            lines.append(f"  start: {self.start_text}; the initial state applies here")
            firsts = [f"{t.symbol} {t.first_valid_text}" for t in self.tags if t.role == "output" and t.first_valid_text]
            if firsts:
                lines.append("  first observation: " + ", ".join(firsts))
        for s in self.sources:
            lines.append(f"  read {s['path']}  sha256 {s['sha256'][:12]}")
        head = ("symbol", "tag", "role", "rows", "span (UTC)", "interval", "spread", "cover", "valid", "masked",
                "flagged")
        rows = []
        for t in self.tags:
            span = f"{_short(t.first_utc)}..{_short(t.last_utc)}" if t.first_utc else "-"
            rows.append((t.symbol, t.tag, t.role, str(t.rows_read), span, duration_text(t.median_interval_s),
                         duration_text(t.interval_spread_s), "-" if t.coverage_pct is None else f"{t.coverage_pct:.1f}%",
                         str(t.valid), str(t.masked_total), str(sum(t.flagged.values()))))
        widths = [max(len(h), *(len(r[i]) for r in rows)) if rows else len(h) for i, h in enumerate(head)]
        lines.append("")
        lines.append("  " + "  ".join(h.ljust(w) for h, w in zip(head, widths)))
        for r in rows:
            lines.append("  " + "  ".join(c.ljust(w) for c, w in zip(r, widths)))
        lines.append("")
        for t in self.tags:
            details = [f"conversion {t.conversion}"]
            for reason, n in t.masked.items():
                extra = "; list the text in no_value if it means no sample" if reason == "not a number" else ""
                details.append(f"masked {n} ({reason}{extra})")
            for reason, n in t.flagged.items():
                details.append(f"flagged {n} ({reason}, not masked)")
            if t.exact_duplicates:
                details.append(f"{t.exact_duplicates} exact duplicate rows dropped")
            if t.conflicting_duplicates:
                details.append(f"{t.conflicting_duplicates} conflicting duplicates (first kept; e.g. "
                               f"{t.conflict_example})")
            if t.out_of_order:
                details.append(f"{t.out_of_order} rows stamped before the row above them, sorted into time order "
                               f"(e.g. {t.out_of_order_example})")
            if t.before_start:
                details.append(f"{t.before_start} samples before the start dropped")
            if t.held_repeats_dropped:
                inside = f", {t.held_repeats_in_stuck} of them in stuck runs" if t.held_repeats_in_stuck else ""
                details.append(f"{t.held_repeats_dropped} held repeats dropped (exception logging, after the "
                               f"quality and stuck judgements{inside})")
            if t.outside_windows:
                details.append(f"{t.outside_windows} samples outside the selected windows")
            if t.blank_cells:
                details.append(f"{t.blank_cells} cells without a value")
            if t.gaps:
                details.append(f"{t.gaps} gap{'s' if t.gaps != 1 else ''} over {duration_text(t.gap_limit_s)} "
                               f"(longest {duration_text(t.longest_gap_s)})")
            if t.gap_rule:
                details.append(f"gap limit {duration_text(t.gap_limit_s)} ({t.gap_rule})" if t.gap_limit_s
                               else f"no gap limit ({t.gap_rule})")
            if t.silences:
                details.append(f"{len(t.silences)} silence{'s' if len(t.silences) != 1 else ''} over "
                               f"{duration_text(t.silence_after_s)} held, not split (longest "
                               f"{duration_text(max(s['duration_s'] for s in t.silences))})")
            if t.silence_rule:
                details.append(f"silence rule {duration_text(t.silence_after_s)} ({t.silence_rule})"
                               if t.silence_after_s else f"no silence rule ({t.silence_rule})")
            rule = f" ({t.stuck_rule})" if t.stuck_rule.startswith("auto") else ""
            details.append(f"stuck after {duration_text(t.stuck_after_s)}{rule}" if t.stuck_after_s
                           else "stuck: not judged")
            lines.append(f"  {t.symbol} ({t.tag}): " + "; ".join(d for d in details if d))
        lines.append("")
        lines.append(f"  segments: {len(self.segments)}")
        for s in self.segments:
            lines.append(f"    {s.index}: {_short(s.start_utc)} .. {_short(s.end_utc)}  ({duration_text(s.duration_s)}, "
                         f"{s.observations} observations)")
        if self.select:
            lines.append("  selected: " + ", ".join(f"{a}..{b}" for a, b in self.select))
        if self.exclude:
            lines.append("  excluded: " + ", ".join(f"{a}..{b}" for a, b in self.exclude))
        if self.holdout is not None:
            lines.append(f"  held out for validation: {self.holdout}")
        for n in self.notes:
            lines.append(f"  note: {n}")
        if self.windows:
            lines.append("")
            lines.append("  informative windows (log det of the Fisher information at the guesses):")
            for w in self.windows:
                lines.append("    " + w.describe())
        if self.warnings:
            lines.append("")
            for w in self.warnings:
                lines.append("  warning: " + w)
        if self.problems:
            lines.append("")
            lines.append("  a fit cannot run:")
            for p in self.problems:
                lines.append("    - " + p.replace("\n", "\n      "))
        return "\n".join(lines)


def _short(iso: str | None) -> str:
    if not iso:
        return "-"
    return iso.replace("+00:00", "Z").replace(":00Z", "Z")


def duration_text(seconds: float | None, digits: int = 3) -> str:
    """A duration for a reader: seconds, minutes, hours or days (from two of the larger unit
    on), ``digits`` significant digits; ``-`` for None."""
    if seconds is None:
        return "-"
    s = float(seconds)
    if s >= 86400 * 2:
        return f"{s / 86400:.{digits}g} d"
    if s >= 3600 * 2:
        return f"{s / 3600:.{digits}g} h"
    if s >= 120:
        return f"{s / 60:.{digits}g} min"
    return f"{s:.{digits}g} s"
