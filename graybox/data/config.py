"""The data section of a graybox config: which files, how to read them, which tag feeds
which model symbol, in which units, and how to judge their quality.

One experiment is a ``[data]`` table (named "main"); several are ``[experiments.NAME]``
tables with the same keys.  Every key; a key that has a default shows it (the tests compare
these lines with :data:`DATA_DEFAULTS` and :data:`TAG_DEFAULTS`), a value marked "e.g." is
an example::

    [data]
    files = ["vessel_log.csv"]        # e.g.; paths or glob patterns, relative to the config's folder;
                                      # several files feed one experiment (per tag, per month);
                                      # from Python: pandas DataFrames instead (graybox.data.frames)
    format = "csv"                    # e.g.; csv | parquet | excel; default: from the file ending
    layout = "wide"                   # wide: a time column and a column per tag
                                      # long: a time column, a tag column, a value column
    # -- reading text and spreadsheets
    delimiter = ","                   # csv field separator (";" for many European exports)
    decimal = "."                     # decimal mark ("," with delimiter = ";")
    encoding = "utf-8"                # a byte-order mark is skipped
    header_row = 1                    # the line (csv) or row (excel) holding column names
    skip_after_header = 0             # lines between the header and the data (units rows)
    no_value = ["", "NA", "#N/A"]     # cell texts meaning "no sample here" (counted as cells without a
                                      # value); other texts that are not numbers are errors, except
                                      # "nan" and "inf", "-inf" (any case): masked and counted as
                                      # "not a number" and "infinite" (list "NaN" here if it means no sample)
    sheet = "Sheet1"                  # e.g.; excel: the sheet; default the first
    # -- time stamps
    time_column = "timestamp"         # e.g.; omit only for a static model (no states): rows become 0, 1, 2, ... s;
                                      # a model with states without it is an error
    time_format = "iso"               # iso:        ISO 8601 text, each stamp with its offset (Z, +01:00)
                                      # local:      wall-clock text (or naive stored times) in `timezone`
                                      # epoch_s:    seconds since 1970-01-01T00:00Z
                                      # serial_1900 / serial_1904: spreadsheet day numbers, wall-clock
                                      #             in `timezone`, in that date system
                                      # elapsed:    numbers of time since the start of a run (lab, batch)
    time_units = "min"                # e.g.; elapsed only, and required there: any pint time unit (s, min, h, day)
    start = "2026-01-05T06:00Z"       # e.g.; where the experiment starts and its initial state applies: an
                                      # instant (ISO with offset, or local in `timezone`); for elapsed
                                      # time a number in time_units (start = 0).  Default: the first
                                      # time stamp of the data, a row without values included; a select
                                      # window opening later moves it there.  Rows before it are dropped
                                      # (counted).  Stamps out of order within a file are sorted (stably,
                                      # counted); duplicates (same tag and instant): identical ones
                                      # dropped, of conflicting ones the first recorded kept (counted)
    timezone = "Europe/Berlin"        # e.g.; an IANA zone; required by local and serial stamps
    date_order = "dmy"                # e.g.; local text only: ymd | dmy | mdy; never guessed (default:
                                      # year-first stamps only)
    clock = "24h"                     # local text only: 24h | 12h (12h stamps end in AM/PM)
    # -- long layout columns
    tag_column = "tag"
    value_column = "value"
    quality_column = "quality"        # e.g.; optional; in a wide table give it per tag instead
    good_quality = ["good"]           # quality texts (case-insensitive) or codes that count as good
    # -- physical references (required only when a tag needs them)
    atmosphere = "101.325 kPa"        # e.g.; for gauge pressures (psig, barg, ...)
    standard_pressure = "101.325 kPa" # e.g.; for standard volumetric flows (scfm, Nm3/h, ...)
    standard_temperature = "0 degC"   # e.g.
    # -- gaps, windows, checks
    max_gap = "auto"                  # gap limit of each sampled tag: "auto" is the longer of 15 min and
                                      # 10 of the tag's median intervals (as logged); or a duration, or
                                      # "off".  An input gap over it splits the record into segments;
                                      # every gap over it (inputs and outputs) is warned about.  Tags
                                      # with logging = "exception" keep their own max_gap, else the
                                      # longer of 1 h and 10 median intervals ("auto"), since their
                                      # silences may be held values.  "off" here: no limit for any tag
                                      # that declares none of its own.  An input logged by exception:
                                      # every silence longer than the longer of 1 h and the upper quartile
                                      # of its intervals plus 1.5 interquartile ranges (Tukey's outlier
                                      # fence), but under its auto gap limit, is warned about (its value
                                      # is held there; silence alone cannot tell that from an outage; a
                                      # max_gap the study sets is its own judgement: not warned)
    select = [["2026-01-05T00:00Z", "2026-01-20T00:00Z"]]   # e.g.; keep only these spans (elapsed: numbers)
    exclude = [["2026-01-11T06:00Z", "2026-01-11T18:00Z"]]  # e.g.; drop these (shutdown, cleaning)
    holdout = 0.25                    # e.g.; last fraction (or from an instant) kept for validation
    stuck_after = "auto"              # measured outputs: a run of samples flat to within half the
                                      # deadband this long is a stuck sensor; "auto": for a sampled tag
                                      # the shorter of 2 h and the longer of 10 min and 20 of its median
                                      # intervals, unless over 1 in 4 of its successive readings repeat
                                      # (within half the deadband: coarse steps against its noise), then
                                      # 2 h; 2 h for a tag logged by exception; or a duration, or "off"
                                      # (never).  Inputs are not judged (a controller holds a setpoint)
                                      # unless a tag says so
    stuck_action = "flag"             # flag | mask
    [data.spikes]                     # optional robust spike filter (masks)
    window = "30 min"                 # e.g.; centred window of the running median
    threshold = 6                     # in robust standard deviations (1.4826 * MAD)
    [data.informative]                # the window finder of `graybox check`
    window = "1 day"
    step = "6 h"
    top = 5
    noise = { T = 0.2 }               # e.g.; output noise (model units) weighting each output; default 1

    [data.tags]
    F = "FI_200"                      # e.g.; shorthand: tag name, already in model units
    [data.tags.T]
    tag = "TI_101"                    # e.g.
    units = "degF"                    # e.g.; what the historian logs (default: the model's units);
                                      # trade names: see graybox/unitreg.py (gpm, psig, scfm, ...)
    temperature = "reading"           # e.g.; reading | difference (needed when an offset scale is involved)
    pressure = "gauge"                # e.g.; gauge | absolute (psig, barg, kPag, ... imply gauge)
    flow_basis = "standard"           # e.g.; standard | actual (Nm3/h, scfm, ... imply standard)
    molar_mass = "28.96 g/mol"        # e.g.; standard flow into a mass flow
    span = [0, 250]                   # e.g.; percent-of-span tags: units = "%", span in span_units
    span_units = "degF"               # e.g.
    valid = [0, 300]                  # e.g.; valid range, in the tag's own units (as logged)
    deadband = 0                      # logging deadband, tag units: a run flat to half of it is stuck
    logging = "sampled"               # sampled | exception (report-by-exception: a repeated value is a
                                      # hold, dropped after the quality, range and stuck judgements)
    quality_column = "TI_101.Q"       # e.g.; wide layout: this tag's quality column
    max_gap = "1 h"                   # e.g.; this tag's own gap limit (a duration, "auto" or "off")
    stuck_after = "30 min"            # e.g.; this tag's own stuck rule (a duration, "auto" or "off"); default:
                                      # the experiment's for an output, "off" for an input
    atmosphere = "14.5 psi"           # e.g.; per-tag overrides of the physical references
"""

from __future__ import annotations

import glob
import re
import zoneinfo
from datetime import datetime, timezone
from functools import lru_cache
from pathlib import Path
from typing import Mapping

import numpy as np

from graybox.configkit import Table, parse_duration
from graybox.data.spec import DataSpec, ReadOptions, SearchSpec, SpikeSpec, SymbolInfo, TagSpec, TimeSpec
from graybox.data.units import TagUnits, seconds_per_time_unit
from graybox.errors import ConfigError, DataError

LAYOUTS = ("wide", "long")
FORMATS = ("csv", "parquet", "excel")
ELAPSED = "elapsed"  # time since the start of a run, in declared time_units
TIME_FORMATS = ("iso", "local", "epoch_s", "serial_1900", "serial_1904", ELAPSED)
DATE_ORDERS = ("ymd", "dmy", "mdy")
CLOCKS = ("24h", "12h")
STUCK_ACTIONS = ("flag", "mask")
LOGGING = ("sampled", "exception")
DEFAULT_NO_VALUE = ("", "NA", "#N/A")

# The defaults of the keys that have one, as a study file writes them: the parser takes them
# from here, and a test compares them with the lines of the module docstring above.
DATA_DEFAULTS = {
    "layout": "wide", "delimiter": ",", "decimal": ".", "encoding": "utf-8", "header_row": 1,
    "skip_after_header": 0, "no_value": list(DEFAULT_NO_VALUE), "time_format": "iso", "clock": "24h",
    "tag_column": "tag", "value_column": "value", "good_quality": ["good"], "max_gap": "auto",
    "stuck_after": "auto", "stuck_action": "flag",
}
SPIKE_DEFAULTS = {"threshold": 6}
INFORMATIVE_DEFAULTS = {"window": "1 day", "step": "6 h", "top": 5}
TAG_DEFAULTS = {"deadband": 0, "logging": "sampled"}

GAP_AUTO = "auto"
OFF_WORDS = ("off", "none", "never")
AUTO_GAP_FLOOR_S = 900.0  # "auto" gap limit of a sampled tag: the longer of 15 min and ...
AUTO_GAP_INTERVALS = 10.0  # ... ten of the tag's median sample intervals (as logged)
AUTO_GAP_EXCEPTION_FLOOR_S = 3600.0  # a tag logged by exception: the longer of 1 h and ten intervals
# A silence of an input logged by exception is warned about (held, not split) when it is under
# the gap limit but longer than the longer of SILENCE_FLOOR_S and the tag's upper quartile of
# intervals plus SILENCE_FENCE_IQR interquartile ranges (Tukey's outlier fence, see gaps.py).
SILENCE_FLOOR_S = 3600.0
SILENCE_FENCE_IQR = 1.5
# stuck_after = "auto" (see quality.py): a sampled tag is stuck after the shorter of
# AUTO_STUCK_CAP_S and the longer of AUTO_STUCK_FLOOR_S and AUTO_STUCK_INTERVALS median
# intervals, while at most AUTO_STUCK_REPEAT_SHARE of its successive readings repeat (within
# half its deadband); otherwise, and for a tag logged by exception, after AUTO_STUCK_CAP_S.
STUCK_AUTO = GAP_AUTO  # the same word, "auto"
AUTO_STUCK_CAP_S = 7200.0
AUTO_STUCK_FLOOR_S = 600.0
AUTO_STUCK_INTERVALS = 20.0
AUTO_STUCK_REPEAT_SHARE = 0.25

DATA_KEYS = (
    "files", "format", "layout", "delimiter", "decimal", "encoding", "header_row", "skip_after_header", "no_value",
    "sheet", "time_column", "time_format", "time_units", "start", "timezone", "date_order", "clock", "tag_column",
    "value_column",
    "quality_column", "good_quality", "atmosphere", "standard_pressure", "standard_temperature", "max_gap",
    "select", "exclude", "holdout", "stuck_after", "stuck_action", "spikes", "informative", "tags",
)
TAG_KEYS = (
    "tag", "units", "temperature", "pressure", "flow_basis", "molar_mass", "span", "span_units", "valid", "deadband",
    "logging", "quality_column", "max_gap", "stuck_after", "atmosphere", "standard_pressure", "standard_temperature",
)
SPIKE_KEYS = ("window", "threshold")
INFORMATIVE_KEYS = ("window", "step", "top", "noise")


def table_from_where(table: dict, where: str) -> Table:
    """A configkit Table located by a prefix like ``configs/vessel.toml [data]`` (the file's
    lines are then found for each key)."""
    m = re.match(r"^(?P<file>.*?)(?::\d+)?\s*\[(?P<path>[^\]]+)\]\s*$", where or "")
    if m:
        path = tuple(p.strip().strip('"') for p in m.group("path").split("."))
        file = Path(m.group("file")) if m.group("file") else None
        return Table(table, path, file)
    return Table(table, ("data",), Path(where) if where else None)


def _duration(t: Table, key: str, default=None) -> float | None:
    if key not in t:
        return default
    return parse_duration(t.get(key), t.where(key))


def duration_or_off(value, where: str, key: str, auto: bool = False) -> float | str:
    """A duration in seconds from a number or text ("15 min"); ``inf`` for "off" (or false);
    "auto" (:data:`GAP_AUTO`) where ``auto`` allows it.  Located ConfigError otherwise."""
    if value is False or (isinstance(value, str) and value.strip().lower() in OFF_WORDS):
        return float("inf")
    if auto and isinstance(value, str) and value.strip().lower() == GAP_AUTO:
        return GAP_AUTO
    if value is True:
        raise ConfigError("must be a duration or \"off\", got true", where=where,
                          hint=f"{key} = \"2 h\" or {key} = \"off\"" + (" or \"auto\"" if auto else ""))
    try:
        return parse_duration(value, where)
    except ConfigError as exc:
        raise ConfigError(exc.message, where=where,
                          hint=f"write a duration ('30 min', '2 h') or \"off\"" + (" or \"auto\"" if auto else "")
                          ) from None


@lru_cache(maxsize=None)
def _default_duration(key: str, table: str) -> float | str:
    defaults = {"data": DATA_DEFAULTS, "informative": INFORMATIVE_DEFAULTS}[table]
    return duration_or_off(defaults[key], f"graybox/data/config.py default of '{key}'", key, auto=True)


def default_duration(key: str, defaults: dict = DATA_DEFAULTS) -> float | str:
    """The default of a duration key in seconds (or "auto"), from its text in the defaults."""
    return _default_duration(key, "informative" if defaults is INFORMATIVE_DEFAULTS else "data")


def _duration_or_off(t: Table, key: str, default=None, auto: bool = False) -> float | str | None:
    """:func:`duration_or_off` of ``t[key]``; ``default`` when the key is absent."""
    if key not in t:
        return default
    return duration_or_off(t.get(key), t.where(key), key, auto)


def _quantity_text(t: Table, key: str, default=None) -> str | None:
    if key not in t:
        return default
    value = t.get(key)
    if not isinstance(value, str):
        raise t.error(key, f"must be a quantity as text, e.g. \"101.325 kPa\", got {value!r}")
    return value


def parse_instant(text, tz: str | None, where: str) -> int:
    """UTC nanoseconds of a window bound: ISO 8601 with an offset, or wall-clock ISO in the
    declared time zone (an instant that is ambiguous there needs an offset)."""
    if isinstance(text, datetime):  # TOML offset date-times arrive as datetimes
        dt = text
    elif isinstance(text, str):
        try:
            dt = datetime.fromisoformat(text.strip().replace("Z", "+00:00"))
        except ValueError:
            raise ConfigError(f"'{text}' is not an ISO 8601 date and time", where=where,
                              hint="write e.g. \"2026-01-05T06:00Z\" or \"2026-01-05T06:00+01:00\"") from None
    else:
        raise ConfigError(f"a window bound must be a date and time, got {text!r}", where=where)
    if dt.tzinfo is None:
        if tz is None:
            raise ConfigError(f"'{text}' has no offset and no timezone is declared", where=where,
                              hint="add an offset (\"Z\", \"+01:00\") or declare timezone = \"...\"")
        zone = zoneinfo.ZoneInfo(tz)
        a, b = dt.replace(tzinfo=zone, fold=0), dt.replace(tzinfo=zone, fold=1)
        if a.utcoffset() != b.utcoffset():
            raise ConfigError(f"'{text}' happens twice in {tz} (clocks go back)", where=where,
                              hint="write it with its offset to say which")
        dt = a
        if dt.astimezone(timezone.utc).astimezone(zone).replace(tzinfo=None) != dt.replace(tzinfo=None):
            raise ConfigError(f"'{text}' does not exist in {tz} (clocks go forward)", where=where)
    delta = dt.astimezone(timezone.utc) - datetime(1970, 1, 1, tzinfo=timezone.utc)
    return (delta.days * 86400 + delta.seconds) * 10**9 + delta.microseconds * 1000


def _bound(value, tz: str | None, where: str, unit_s: float | None) -> int:
    """An instant in ns: as :func:`parse_instant`, or for elapsed-time tables (``unit_s``, the
    seconds of one time unit) a number in the time column's units."""
    if unit_s is None:
        return parse_instant(value, tz, where)
    if isinstance(value, (int, float)) and not isinstance(value, bool) and np.isfinite(value):
        return int(round(float(value) * unit_s * 1e9))
    raise ConfigError(f"the time column holds elapsed time: an instant here is a number in its time_units, got "
                      f"{value!r}", where=where, hint="e.g. 0 or 20 (in the declared time_units)")


def _windows(t: Table, key: str, tz: str | None, unit_s: float | None = None) -> tuple[tuple[int, int], ...]:
    if key not in t:
        return ()
    raw = t.get(key)
    if isinstance(raw, list) and len(raw) == 2 and all(isinstance(v, (str, datetime, int, float)) for v in raw):
        raw = [raw]
    if not isinstance(raw, list) or not all(isinstance(w, list) and len(w) == 2 for w in raw):
        raise t.error(key, f"must be a list of [start, end] pairs, got {raw!r}",
                      hint=f"{key} = [[\"2026-01-05T00:00Z\", \"2026-01-06T00:00Z\"]]")
    out = []
    for a, b in raw:
        lo, hi = _bound(a, tz, t.where(key), unit_s), _bound(b, tz, t.where(key), unit_s)
        if not hi > lo:
            raise t.error(key, f"window [{a}, {b}] ends before it starts")
        out.append((lo, hi))
    return tuple(out)


def _holdout(t: Table, tz: str | None, elapsed: bool = False):
    if "holdout" not in t:
        return None
    v = t.get("holdout")
    if isinstance(v, (int, float)) and not isinstance(v, bool):
        if not 0.0 < v < 1.0:
            raise t.error("holdout", f"a fraction must lie between 0 and 1, got {v}")
        return float(v)
    if elapsed:
        raise t.error("holdout", "on elapsed time, holdout is a fraction of the record",
                      hint="holdout = 0.25 holds out the last quarter")
    ns = parse_instant(v, tz, t.where("holdout"))
    return datetime.fromtimestamp(ns / 1e9, tz=timezone.utc)


def _files(t: Table, base_dir: Path) -> tuple[Path, ...]:
    """The files the table lists (paths, glob patterns), found; or the DataFrames it lists
    instead (:mod:`graybox.data.frames`)."""
    from graybox.data.frames import frame_sources, lists_frames

    if lists_frames(t):
        return frame_sources(t)
    entries = t.string_list("files")
    if not entries:
        raise t.error("files", "lists no file", hint="files = [\"export.csv\"]")
    out: list[Path] = []
    for entry in entries:
        p = Path(entry).expanduser()
        full = p if p.is_absolute() else base_dir / p
        if any(c in entry for c in "*?["):
            hits = sorted(Path(h) for h in glob.glob(str(full)))
            if not hits:
                raise DataError(f"no file matches '{entry}'", where=t.where("files"),
                                hint=f"patterns resolve against {base_dir}")
            out.extend(hits)
        else:
            if not full.is_file():
                raise DataError(f"file not found: {full}", where=t.where("files"),
                                hint="relative paths resolve against the config file's folder")
            out.append(full)
    return tuple(dict.fromkeys(out))


def _tag(t: Table, symbol: str, info: SymbolInfo, defaults: dict) -> TagSpec:
    raw = t.data.get(symbol)
    if isinstance(raw, str):
        sub = Table({"tag": raw}, (*t.path, symbol), t.file)
    elif isinstance(raw, dict):
        sub = t.sub(symbol)
    else:
        raise t.error(symbol, f"must be a tag name or a table, got {raw!r}",
                      hint=f"{symbol} = \"TI_101\" or [{'.'.join((*t.path, symbol))}] with tag = ...")
    sub.check_keys(TAG_KEYS)
    tag = sub.string("tag")
    if not tag.strip():
        raise sub.error("tag", "is empty")
    units_text = sub.string("units", info.units)
    temperature = sub.string("temperature", None, choices=("reading", "difference")) if "temperature" in sub else None
    pressure = sub.string("pressure", None, choices=("gauge", "absolute")) if "pressure" in sub else None
    basis = sub.string("flow_basis", None, choices=("standard", "actual")) if "flow_basis" in sub else None
    span = sub.pair("span") if "span" in sub else None
    valid = sub.pair("valid") if "valid" in sub else None
    deadband = sub.number("deadband", float(TAG_DEFAULTS["deadband"]), minimum=0.0)
    logging = sub.string("logging", TAG_DEFAULTS["logging"], choices=LOGGING)
    quality = sub.string("quality_column", None) if "quality_column" in sub else None
    max_gap = _duration_or_off(sub, "max_gap", auto=True)
    stuck_after = _duration_or_off(sub, "stuck_after", auto=True)
    units = TagUnits(
        units=units_text, temperature=temperature, pressure=pressure, flow_basis=basis, span=span,
        span_units=sub.string("span_units", None) if "span_units" in sub else None,
        molar_mass=_quantity_text(sub, "molar_mass"),
        atmosphere=_quantity_text(sub, "atmosphere", defaults["atmosphere"]),
        standard_pressure=_quantity_text(sub, "standard_pressure", defaults["standard_pressure"]),
        standard_temperature=_quantity_text(sub, "standard_temperature", defaults["standard_temperature"]),
    )
    return TagSpec(symbol, tag.strip(), info.role, info.units, info.hold, units, valid, float(deadband), logging,
                   quality, max_gap, sub.where("units" if "units" in sub else None),
                   sub.where("tag") if isinstance(raw, dict) else t.where(symbol), stuck_after)


def parse_data_table(table: dict, name: str, *, symbols: Mapping[str, SymbolInfo], base_dir: Path,
                     where: str) -> DataSpec:
    """Validate one experiment's table; every error is a located ConfigError (or a DataError
    for a file that is not there)."""
    t = table_from_where(table, where)
    if not isinstance(table, dict):
        raise ConfigError(f"the data section must be a table, got {type(table).__name__}", where=where)
    t.check_keys(DATA_KEYS)
    files = _files(t, Path(base_dir))
    fmt = t.string("format", None, choices=FORMATS) if "format" in t else None
    layout = t.string("layout", DATA_DEFAULTS["layout"], choices=LAYOUTS)
    delimiter = t.string("delimiter", DATA_DEFAULTS["delimiter"])
    if len(delimiter) != 1 and delimiter != "\\t":
        raise t.error("delimiter", f"must be one character, got {delimiter!r}", hint="\",\", \";\", \"\\t\" or \"|\"")
    delimiter = "\t" if delimiter == "\\t" else delimiter
    decimal = t.string("decimal", DATA_DEFAULTS["decimal"], choices=(".", ","))
    if decimal == delimiter:
        raise t.error("decimal", "is the same character as the delimiter", hint="delimiter = \";\" with decimal = \",\"")
    encoding = t.string("encoding", DATA_DEFAULTS["encoding"])
    try:
        import codecs

        codecs.lookup(encoding)
    except LookupError:
        raise t.error("encoding", f"'{encoding}' is not a known text encoding",
                      hint="e.g. \"utf-8\", \"cp1252\", \"latin-1\", \"utf-16\"") from None
    if encoding.lower().replace("_", "-") in ("utf-8", "utf8"):
        encoding = "utf-8-sig"
    header_row = t.number("header_row", DATA_DEFAULTS["header_row"], integer=True, minimum=1)
    skip = t.number("skip_after_header", DATA_DEFAULTS["skip_after_header"], integer=True, minimum=0)
    no_value = tuple(t.string_list("no_value", list(DATA_DEFAULTS["no_value"])))
    sheet = t.string("sheet", None) if "sheet" in t else None

    time_column = t.string("time_column", None) if "time_column" in t else None
    tfmt = t.string("time_format", DATA_DEFAULTS["time_format"], choices=TIME_FORMATS)
    time_units, unit_s = _time_units(t, tfmt)
    tz = t.string("timezone", None) if "timezone" in t else None
    if tz is not None:
        try:
            zoneinfo.ZoneInfo(tz)
        except (zoneinfo.ZoneInfoNotFoundError, ValueError):
            import difflib

            close = difflib.get_close_matches(tz, sorted(zoneinfo.available_timezones()), n=3)
            raise t.error("timezone", f"'{tz}' is not an IANA time zone",
                          hint=(f"did you mean {', '.join(close)}? " if close else "") + "e.g. \"Europe/Berlin\", "
                               "\"America/Chicago\", \"UTC\"") from None
    if time_column is not None and tfmt in ("local", "serial_1900", "serial_1904") and tz is None:
        raise t.error("time_format", f"'{tfmt}' stamps are wall-clock times; the time zone is needed",
                      hint="declare timezone = \"Europe/Berlin\" (an IANA name), or \"UTC\" if they are UTC")
    date_order = t.string("date_order", None, choices=DATE_ORDERS) if "date_order" in t else None
    clock = t.string("clock", DATA_DEFAULTS["clock"], choices=CLOCKS)

    tag_column = t.string("tag_column", DATA_DEFAULTS["tag_column"])
    value_column = t.string("value_column", DATA_DEFAULTS["value_column"])
    quality_column = t.string("quality_column", None) if "quality_column" in t else None
    good = t.get("good_quality", list(DATA_DEFAULTS["good_quality"]))
    if isinstance(good, (str, int)) and not isinstance(good, bool):
        good = [good]
    if not isinstance(good, list) or not all(isinstance(g, (str, int)) and not isinstance(g, bool) for g in good):
        raise t.error("good_quality", f"must be a list of quality texts or codes, got {good!r}")
    good_set = frozenset(normalize_quality(g) for g in good)

    defaults = {k: _quantity_text(t, k) for k in ("atmosphere", "standard_pressure", "standard_temperature")}
    max_gap = _duration_or_off(t, "max_gap", auto=True) if "max_gap" in t else default_duration("max_gap")
    select = _windows(t, "select", tz, unit_s)
    exclude = _windows(t, "exclude", tz, unit_s)
    holdout = _holdout(t, tz, unit_s is not None)
    start = _start(t, time_column, tz, unit_s)
    stuck_after = (_duration_or_off(t, "stuck_after", auto=True) if "stuck_after" in t
                   else default_duration("stuck_after"))
    stuck_action = t.string("stuck_action", DATA_DEFAULTS["stuck_action"], choices=STUCK_ACTIONS)
    spikes = None
    if "spikes" in t:
        st = t.sub("spikes")
        st.check_keys(SPIKE_KEYS)
        spikes = SpikeSpec(parse_duration(st.get("window"), st.where("window")),
                           st.number("threshold", float(SPIKE_DEFAULTS["threshold"]), positive=True))
    search = None
    if "informative" in t:
        it = t.sub("informative")
        it.check_keys(INFORMATIVE_KEYS)
        noise_t = it.sub("noise")
        noise = {k: noise_t.number(k, positive=True) for k in noise_t.keys()}
        search = SearchSpec(_duration(it, "window", default_duration("window", INFORMATIVE_DEFAULTS)),
                            _duration(it, "step", default_duration("step", INFORMATIVE_DEFAULTS)),
                            it.number("top", INFORMATIVE_DEFAULTS["top"], integer=True, minimum=1), noise)

    tags_t = t.sub("tags", required=True)
    missing = [s for s in symbols if s not in tags_t]
    if missing:
        raise tags_t.error(None, f"no tag is mapped to the model {'symbols' if len(missing) > 1 else 'symbol'} "
                                 f"{', '.join(repr(m) for m in missing)}",
                           hint=f"add e.g. {missing[0]} = \"TAG_NAME\" under [{'.'.join(tags_t.path)}]")
    unknown = [k for k in tags_t.keys() if k not in symbols]
    if unknown:
        import difflib

        close = difflib.get_close_matches(unknown[0], list(symbols), n=1)
        raise tags_t.error(unknown[0], "is not an input or measured output of the model",
                           hint=(f"did you mean '{close[0]}'? " if close else "")
                           + f"the model's data symbols: {', '.join(symbols)}")
    tags = tuple(_tag(tags_t, s, symbols[s], defaults) for s in symbols)
    if layout == "long" and any(tg.quality_column for tg in tags):
        bad = next(tg for tg in tags if tg.quality_column)
        raise ConfigError("a per-tag quality_column is for wide tables; a long table has one quality column",
                          where=bad.where, hint="set quality_column in the data table instead")
    read = ReadOptions(fmt, layout, delimiter, decimal, encoding, int(header_row), int(skip), no_value, sheet,
                       tag_column, value_column, quality_column)
    time = TimeSpec(time_column, tfmt, tz, date_order, clock, time_units, unit_s or 1.0)
    return DataSpec(name, where, files, read, time, good_set, tags,
                    max_gap, select, exclude, holdout, stuck_after, stuck_action, spikes, search, start)


def _time_units(t: Table, tfmt: str) -> tuple[str | None, float | None]:
    """The elapsed-time unit and its seconds: required by time_format = "elapsed", refused
    elsewhere (every other format says its own unit)."""
    if tfmt != ELAPSED:
        if "time_units" in t:
            raise t.error("time_units", f"time_format = '{tfmt}' stamps carry their own units",
                          hint="time_units is for time_format = \"elapsed\" (time since the start of a run)")
        return None, None
    if "time_units" not in t:
        raise t.error("time_format", "elapsed time needs its units declared",
                      hint="add time_units = \"min\" (or \"s\", \"h\", \"day\")")
    text = t.get("time_units")
    return str(text).strip(), seconds_per_time_unit(text, t.where("time_units"))


def _start(t: Table, time_column: str | None, tz: str | None, unit_s: float | None) -> int | None:
    """The declared start of the experiment (ns), where its initial state applies."""
    if "start" not in t:
        return None
    if time_column is None:
        raise t.error("start", "a start needs a time column to be placed on",
                      hint="declare time_column, or remove start")
    return _bound(t.get("start"), tz, t.where("start"), unit_s)


def normalize_quality(value) -> str:
    """Quality flags compare as stripped, lower-case text; whole numbers as integers ('192')."""
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, float):
        return str(int(value)) if value.is_integer() else str(value)
    text = str(value).strip().lower()
    if re.fullmatch(r"[+-]?\d+\.0*", text):
        return text.split(".")[0]
    return text
