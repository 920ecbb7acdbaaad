"""Gaps in a tag's samples: the limit that applies to each tag, the gaps over it, and what a
reader is told about each.

The limit of a tag, in order:

1. its own ``max_gap`` (a duration, "auto" or "off");
2. the experiment's ``max_gap`` = "off": no limit;
3. a tag logged by exception (``logging = "exception"``): "auto" for such tags, whatever
   duration the experiment gives (a silence of such a tag may be a value that held, so a
   limit meant for sampled tags would split the record at every steady stretch);
4. the experiment's ``max_gap`` (a duration, or "auto", the default).

"auto" is the longer of a floor and ten of the tag's median intervals as logged (every row
of the tag after windows, sorting and duplicates, before any judgement): the floor is 15 min
for a sampled tag and 1 h for one logged by exception (see ``AUTO_GAP_*`` in
:mod:`graybox.data.config`).  A tag with fewer than two rows has no interval; "auto" then
uses the floor.

A gap runs from one usable row to the next: for a tag logged by exception the held repeats
of a value (dropped as observations) are rows too, saying that the value still held;
masked rows say nothing.  Every
gap over the limit is reported; an input's splits the record into segments (the model
would otherwise run on a value held across the outage); an output's only means that
nothing is compared there.

Silences under the limit.  An input logged by exception is silent while its value holds, so
its limit is long (12.6 h for a tag that changes every 75 min), and a data outage shorter
than that is bridged: the model runs on the value before it.  Silence alone cannot tell an
outage from a value that held, so such a silence is not split but reported, when it is long
against the tag's own rhythm: longer than the longer of 1 h and Tukey's outlier fence of its
intervals as logged (the upper quartile plus 1.5 interquartile ranges; J. W. Tukey,
Exploratory Data Analysis, 1977; the constants are ``SILENCE_*`` in
:mod:`graybox.data.config`).  The fence adapts to the rhythm: a tag moved every 30-120 min
(uniform) gets about 2.8 h; one whose changes come at random (exponential intervals) gets
(ln 4 + 1.5 ln 3) / rate = 4.38 median intervals, and 4.7% of its intervals are reported
(1 / (4 * 3**1.5) = 4.8% lie over the fence, 2**-10 = 0.1% over a limit of ten median
intervals; the lines printed are capped).  Other tags of the same file that
keep reporting through the silence are no evidence either way (a tag logged by exception is
silent by design), so they are not consulted.  An output's silence is not reported: nothing
is compared there, and no value is held into the model.  Nor is a silence under a max_gap
the study sets for the tag or the experiment (a duration or "off"): that limit is the
user's own judgement of how long the value may hold.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from graybox.data.config import (AUTO_GAP_EXCEPTION_FLOOR_S, AUTO_GAP_FLOOR_S, AUTO_GAP_INTERVALS, GAP_AUTO,
                                 SILENCE_FENCE_IQR, SILENCE_FLOOR_S)
from graybox.data.spec import ROLE_INPUT, DataSpec, TagSpec
from graybox.data.report import duration_text as _dur

ACTION_SPLIT = "the record is split into segments there"
ACTION_NONE = "no observation is compared there"


@dataclass(frozen=True)
class GapRule:
    """The gap limit of one tag: ``limit_s`` (inf: none) and how it was set, for the report."""

    limit_s: float
    how: str
    auto: bool = False  # set by the "auto" rule (not by a duration or "off" the study gives)

    @property
    def active(self) -> bool:
        """Whether the rule can find gaps (a finite limit; ``inf`` means off)."""
        return math.isfinite(self.limit_s)


def _auto(tag: TagSpec, median_s: float | None, origin: str) -> GapRule:
    exception = tag.logging == "exception"
    floor = AUTO_GAP_EXCEPTION_FLOOR_S if exception else AUTO_GAP_FLOOR_S
    by_interval = AUTO_GAP_INTERVALS * median_s if median_s else 0.0
    limit = max(floor, by_interval)
    kind = " for a tag logged by exception" if exception else ""
    median = (f"{AUTO_GAP_INTERVALS:g} x the median interval ({_dur(median_s)})" if median_s
              else "(no interval: a single row)")
    return GapRule(limit, f"{origin}auto{kind}, the longer of {_dur(floor)} and {median}", auto=True)


def gap_rule(tag: TagSpec, spec: DataSpec, median_s: float | None) -> GapRule:
    """The limit that applies to ``tag`` (see the module docstring), given the median of its
    intervals as logged (seconds, None when it has fewer than two rows)."""
    if tag.max_gap is not None:
        if tag.max_gap == GAP_AUTO:
            return _auto(tag, median_s, "the tag's max_gap = ")
        return GapRule(float(tag.max_gap), "max_gap = \"off\" on the tag" if math.isinf(tag.max_gap)
                       else "the tag's max_gap")
    if spec.max_gap != GAP_AUTO and math.isinf(spec.max_gap):
        return GapRule(math.inf, "max_gap = \"off\" for the experiment")
    if tag.logging == "exception":
        return _auto(tag, median_s, "")
    if spec.max_gap == GAP_AUTO:
        return _auto(tag, median_s, "")
    return GapRule(float(spec.max_gap), "the experiment's max_gap")


def gaps_over(rows_ns: np.ndarray, limit_s: float) -> np.ndarray:
    """Positions ``i`` where usable row ``i + 1`` comes more than ``limit_s`` after row ``i``
    (times in ns, sorted)."""
    if not math.isfinite(limit_s) or rows_ns.size < 2:
        return np.zeros(0, np.intp)
    return np.flatnonzero(np.diff(rows_ns) > limit_s * 1e9)


@dataclass(frozen=True)
class Gap:
    """One gap over a tag's limit: from ``start_ns`` (the last usable row before it) to
    ``end_ns`` (the next usable row)."""

    start_ns: int
    end_ns: int

    @property
    def duration_s(self) -> float:
        """The gap's length in seconds."""
        return (self.end_ns - self.start_ns) / 1e9


def gap_action(tag: TagSpec) -> str:
    """What a gap does to a tag: an input's gap splits the record into segments (its value
    is unknown there); an output's gap only leaves observations out."""
    return ACTION_SPLIT if tag.role == ROLE_INPUT else ACTION_NONE


def gap_dict(gap: Gap, tag: TagSpec, iso) -> dict:
    """A gap for results.json: start, end (ISO 8601 UTC), duration and what was done."""
    return {"start_utc": iso(gap.start_ns), "end_utc": iso(gap.end_ns), "duration_s": gap.duration_s,
            "action": gap_action(tag)}


def gap_warning(gap: Gap, tag: TagSpec, rule: GapRule, iso) -> str:
    """One line for a reader: which tag, from when to when, how long, the limit, what was done."""
    what = "sample" if tag.role == ROLE_INPUT else "observation"
    text = (f"{tag.role} {tag.symbol} (tag '{tag.tag}'): no usable {what} for {_dur(gap.duration_s)}, "
            f"{iso(gap.start_ns)} .. {iso(gap.end_ns)} (gap limit {_dur(rule.limit_s)}: {rule.how}): "
            f"{gap_action(tag)}")
    if tag.logging == "exception" and tag.role == ROLE_INPUT:
        text += "; if its value held unchanged, set max_gap = \"off\" (or longer) on the tag"
    return text



# -- silences under the limit ----------------------------------------------------------------------
ACTION_HELD = "held, not split"


@dataclass(frozen=True)
class SilenceRule:
    """Which silences of a tag are reported though under its gap limit: those longer than
    ``after_s`` (inf: none are), and how ``after_s`` was set."""

    after_s: float
    how: str

    @property
    def active(self) -> bool:
        """Whether the rule can find silences (a finite ``after_s``; ``inf`` means off)."""
        return math.isfinite(self.after_s)


NO_SILENCE_RULE = SilenceRule(math.inf, "")


def silence_rule(tag: TagSpec, gap: GapRule, lower_s: float | None, upper_s: float | None) -> SilenceRule:
    """The silence rule of ``tag`` (see the module docstring), from its gap rule and the lower
    and upper quartiles of its intervals as logged (seconds; None below two rows): inputs
    logged by exception under an automatic gap limit only."""
    if tag.logging != "exception" or tag.role != ROLE_INPUT:
        return NO_SILENCE_RULE
    if not gap.auto:
        return SilenceRule(math.inf, f"none: {gap.how}, the study's own limit")
    if lower_s is None or upper_s is None:
        return SilenceRule(SILENCE_FLOOR_S, f"{_dur(SILENCE_FLOOR_S)} (no interval: a single row)")
    spread = upper_s - lower_s
    fence = upper_s + SILENCE_FENCE_IQR * spread
    return SilenceRule(max(SILENCE_FLOOR_S, fence),
                       f"the longer of {_dur(SILENCE_FLOOR_S)} and its intervals' upper quartile ({_dur(upper_s)}) "
                       f"plus {SILENCE_FENCE_IQR:g} x their interquartile range ({_dur(spread)})")


def silences_within(rows_ns: np.ndarray, rule: SilenceRule, gap: GapRule) -> np.ndarray:
    """Positions ``i`` where usable row ``i + 1`` comes more than ``rule.after_s`` after row
    ``i`` but not more than the gap limit (a longer one is a gap)."""
    if not rule.active or rows_ns.size < 2 or rule.after_s >= gap.limit_s:
        return np.zeros(0, np.intp)
    step = np.diff(rows_ns)
    within = step > rule.after_s * 1e9
    if gap.active:
        within &= step <= gap.limit_s * 1e9
    return np.flatnonzero(within)


def silence_dict(silence: Gap, iso) -> dict:
    """A silence for results.json: start, end (ISO 8601 UTC), duration and what was done."""
    return {"start_utc": iso(silence.start_ns), "end_utc": iso(silence.end_ns), "duration_s": silence.duration_s,
            "action": ACTION_HELD}


def suggested_max_gap(over_s: float, under_s: float) -> str | None:
    """A round max_gap that splits a silence of ``under_s`` but no interval up to ``over_s``
    (the silence rule): the first multiple of 1 h, 30, 10, 5 or 1 min, or 1 s at or above
    ``over_s`` and below ``under_s``, as a study file writes it; None when there is none."""
    for step in (3600.0, 1800.0, 600.0, 300.0, 60.0, 1.0):
        value = math.ceil(over_s / step) * step
        if value < under_s:
            if step == 3600.0:
                return f"{value / 3600:g} h"
            return f"{value / 60:g} min" if step >= 60.0 else f"{value:g} s"
    return None


def silence_warning(silence: Gap, tag: TagSpec, rule: SilenceRule, gap: GapRule, iso) -> str:
    """One line for a reader: which input, from when to when, how long, against which rule,
    that its value was held there, and what to set if it did not hold."""
    held = _dur(silence.duration_s)
    text = (f"{tag.role} {tag.symbol} (tag '{tag.tag}', logged by exception): no usable sample for {held}, "
            f"{iso(silence.start_ns)} .. {iso(silence.end_ns)}, long against its rhythm (over {_dur(rule.after_s)}: "
            f"{rule.how}): held for {held} (not split: under its gap limit {_dur(gap.limit_s)}); silence alone "
            "cannot tell a value that held from a data outage; if the value did not hold (a data outage), set "
            "max_gap on this tag shorter than this silence")
    example = suggested_max_gap(rule.after_s, silence.duration_s)
    if example:
        text += f" (e.g. max_gap = \"{example}\", which splits no interval up to {_dur(rule.after_s)})"
    return text
