"""Historian data layer: plant exports in, clean records in model units out.

``load_experiment`` reads one experiment's files as its config table says (see
:mod:`graybox.data.config` for every key) and returns the Record and a DataReport;
``check_experiment`` does the same without stopping at problems that only stop a fit
(``load_spec`` and ``check_spec`` do both from a table already validated into its
``DataSpec``, as ``graybox.Study`` holds them; the files may be pandas DataFrames, see
:mod:`graybox.data.frames`);
``split_record`` cuts a record into fit and validation parts; ``rank_windows`` ranks
candidate windows by how much they would inform the free parameters.
"""

from graybox.data.record import (  # noqa: F401
    HOLD_LINEAR,
    HOLD_PREVIOUS,
    InputSeries,
    OutputSeries,
    Record,
    Segment,
    record_from_arrays,
)
from graybox.data.spec import SymbolInfo  # noqa: F401
from graybox.data.report import DataReport, SegmentReport, TagReport  # noqa: F401
from graybox.data.assemble import check_experiment, check_spec, load_experiment, load_spec  # noqa: F401
from graybox.data.split import split_record  # noqa: F401
from graybox.data.windows import (  # noqa: F401
    InputMove,
    WindowScore,
    rank_windows,
    windows_to_frame,
    write_windows,
)
