"""Historian data layer: plant exports in, clean records in model units out."""

from graybox.data.record import (  # noqa: F401
    HOLD_LINEAR,
    HOLD_PREVIOUS,
    InputSeries,
    OutputSeries,
    Record,
    Segment,
    record_from_arrays,
)
