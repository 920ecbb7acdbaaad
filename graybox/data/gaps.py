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
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from graybox.data.config import (AUTO_GAP_EXCEPTION_FLOOR_S, AUTO_GAP_FLOOR_S, AUTO_GAP_INTERVALS, GAP_AUTO,
                                 ROLE_INPUT, DataSpec, TagSpec)
from graybox.data.report import duration_text as _dur

ACTION_SPLIT = "the record is split into segments there"
ACTION_NONE = "no observation is compared there"


@dataclass(frozen=True)
class GapRule:
    """The gap limit of one tag: ``limit_s`` (inf: none) and how it was set, for the report."""

    limit_s: float
    how: str

    @property
    def active(self) -> bool:
        return math.isfinite(self.limit_s)


def _auto(tag: TagSpec, median_s: float | None, origin: str) -> GapRule:
    exception = tag.logging == "exception"
    floor = AUTO_GAP_EXCEPTION_FLOOR_S if exception else AUTO_GAP_FLOOR_S
    by_interval = AUTO_GAP_INTERVALS * median_s if median_s else 0.0
    limit = max(floor, by_interval)
    kind = " for a tag logged by exception" if exception else ""
    median = (f"{AUTO_GAP_INTERVALS:g} x the median interval ({_dur(median_s)})" if median_s
              else "(no interval: a single row)")
    return GapRule(limit, f"{origin}auto{kind}, the longer of {_dur(floor)} and {median}")


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
        return (self.end_ns - self.start_ns) / 1e9


def gap_action(tag: TagSpec) -> str:
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

