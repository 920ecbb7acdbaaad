"""The validated data table, as frozen specs (built by :func:`graybox.data.config.parse_data_table`,
which documents every key): a symbol the model lets data feed (:class:`SymbolInfo`), each
tag (:class:`TagSpec`), how files are read (:class:`ReadOptions`), the time axis
(:class:`TimeSpec`), the spike and window-search settings, and one experiment's whole
data table (:class:`DataSpec`).  Durations are seconds, instants UTC nanoseconds.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Mapping

from graybox.data.record import HOLD_MODES, HOLD_PREVIOUS
from graybox.data.units import TagUnits

ROLE_INPUT = "input"
ROLE_OUTPUT = "output"


@dataclass(frozen=True)
class SymbolInfo:
    """What the model says about a symbol that data may feed."""

    name: str
    role: str  # "input" | "output"
    units: str  # pint-parsable, model units
    hold: str = HOLD_PREVIOUS  # inputs: "previous" | "linear"

    def __post_init__(self):
        if self.role not in (ROLE_INPUT, ROLE_OUTPUT):
            raise ValueError(f"symbol '{self.name}': role must be 'input' or 'output', got {self.role!r}")
        if self.hold not in HOLD_MODES:
            raise ValueError(f"symbol '{self.name}': hold must be one of {HOLD_MODES}, got {self.hold!r}")


@dataclass(frozen=True)
class TagSpec:
    """One model symbol's tag, checked: which column (or long-table tag) feeds it, its role
    (``input`` or ``output``), model and tag units (:class:`~graybox.data.units.TagUnits`),
    hold mode, valid range, deadband, logging kind, per-tag quality column, gap and stuck
    rules (seconds, ``"auto"``, ``inf`` = off, None = the experiment's) and the locations
    used in messages."""

    symbol: str
    tag: str
    role: str
    model_units: str
    hold: str
    units: TagUnits
    valid: tuple[float, float] | None
    deadband: float
    logging: str
    quality_column: str | None
    max_gap: float | str | None  # seconds; "auto" (GAP_AUTO); inf = "off"; None = the experiment's
    where: str  # location of this tag's units (or table), for unit messages
    where_tag: str = ""  # location of the tag name, for messages about the tag itself
    stuck_after: float | str | None = None  # s; "auto"; inf = "off"; None = the experiment's (outputs), off (inputs)


@dataclass(frozen=True)
class ReadOptions:
    """How an experiment's files are read: format (None = by file ending), wide or long
    layout, delimiter, decimal mark, encoding, header row and rows skipped after it, the
    texts that mean "no value", the sheet, and the long layout's tag/value/quality columns."""

    file_format: str | None  # None = from each file's ending
    layout: str
    delimiter: str
    decimal: str
    encoding: str
    header_row: int
    skip_after_header: int
    no_value: tuple[str, ...]
    sheet: str | None
    tag_column: str
    value_column: str
    quality_column: str | None


@dataclass(frozen=True)
class TimeSpec:
    """The time column and how its stamps read: format (``iso``, ``local``, ``epoch_s``,
    ``serial_1900``, ``serial_1904``, ``elapsed``), zone, date order, 12/24-hour clock, and
    for elapsed time the declared unit and its length in seconds."""

    column: str | None
    format: str
    timezone: str | None
    date_order: str | None
    clock: str
    units: str | None = None  # elapsed time: the declared unit ("min", "h", ...)
    seconds_per_unit: float = 1.0


@dataclass(frozen=True)
class SpikeSpec:
    """The spike test: the running-median window (seconds) and the threshold, in robust
    standard deviations from the running median (:func:`graybox.data.quality.spikes`)."""

    window: float  # seconds
    threshold: float


@dataclass(frozen=True)
class SearchSpec:
    """The informative-window search: window length and step (seconds), how many windows
    to keep, and per-output noise levels (model units) for the scores."""

    window: float
    step: float
    top: int
    noise: Mapping[str, float] = field(default_factory=dict)


@dataclass(frozen=True)
class DataSpec:
    """One experiment's ``[data]`` table, validated (no file read yet): files, read options,
    time axis, good-quality texts, tags, gap and stuck rules (seconds; ``"auto"``; ``inf`` =
    off), select/exclude windows (UTC ns, half-open), holdout (fraction or instant), spike
    and window-search settings, and the declared start (ns; None = the first stamp)."""

    name: str
    where: str
    files: tuple[Path, ...]
    read: ReadOptions
    time: TimeSpec
    good_quality: frozenset[str]
    tags: tuple[TagSpec, ...]
    max_gap: float | str  # seconds; "auto" (GAP_AUTO, see AUTO_GAP_*); inf = "off"
    select: tuple[tuple[int, int], ...]  # UTC ns, half-open [start, end)
    exclude: tuple[tuple[int, int], ...]
    holdout: float | datetime | None
    stuck_after: float | str  # seconds, for measured outputs; "auto" (STUCK_AUTO, see AUTO_STUCK_*); inf = "off"
    stuck_action: str
    spikes: SpikeSpec | None
    search: SearchSpec | None
    start: int | None = None  # the declared start (UTC ns; elapsed ns for elapsed time); None = the data's first stamp

    def tag_of(self, symbol: str) -> TagSpec:
        """The tag that feeds model symbol ``symbol`` (StopIteration if none does)."""
        return next(t for t in self.tags if t.symbol == symbol)
