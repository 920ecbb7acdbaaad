"""Time stamps of every dialect into UTC nanoseconds.

* ``iso``: ISO 8601 text where every stamp carries its offset (``Z``, ``+01:00``); offsets
  may differ from row to row (a DST change inside the export).  A stamp without an offset
  among stamps with one is an error: naive and aware stamps are never mixed.
* ``local``: wall-clock text (or naive stored date-times) in the declared IANA zone, with a
  declared date order (``ymd`` default, ``dmy``, ``mdy``) and clock (``24h``, ``12h``).
* ``epoch_s``: seconds since 1970-01-01T00:00Z (rounded to the microsecond).
* ``serial_1900`` / ``serial_1904``: spreadsheet day numbers of wall-clock time in the
  declared zone (rounded to the millisecond); the 1900 system counts a 29 February 1900
  that never was, so day 60 is rejected and days from 61 on count from 1899-12-30.
* ``elapsed``: numbers of elapsed time since the start of a run (lab and batch records), in
  the declared ``time_units`` (``min``, ``h``, ``s``, ``day``: any time unit pint knows,
  converted with the one registry; rounded to the nanosecond).  They name no calendar
  instant: elapsed zero is put at 1970-01-01T00:00Z, and reports print elapsed times.

The time axis is declared, never guessed.  A model with states needs a time column
(:func:`graybox.data.time_axis.require_time_axis`); only a static model may take a table's
rows in order.  An experiment starts at its declared ``start`` or else at the first time
stamp of its data, a row without any value included (a batch record's ``0,,,`` row says
when it started); a selected window that opens later moves the start to its opening
(:func:`graybox.data.time_axis.experiment_start`).  The initial state applies at that start.

Wall-clock times are resolved in *recorded order*, before any sorting: in the hour that a
fall-back change repeats, the first pass through the hour is summer time and a stamp not
later than the one before it (same tag, same repeated hour) starts the second pass.  A wall
time that a spring-forward change skips does not exist; it is reported as such (the rows
are then masked with that reason by the caller).  Every clock change that wall-clock stamps
cross is reported (:class:`ClockChange`): where, the offsets before and after, and how the
stamps of the repeated or skipped hour were read.  (ISO stamps carry their offsets; nothing
is resolved there, so nothing is reported.)
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from datetime import datetime, timezone

import numpy as np
import pandas as pd

from graybox.data.columns import arrow_text as _arrow_text, regex_matches, text_codes, text_runs
from graybox.data.config import ELAPSED
from graybox.data.spec import TimeSpec
from graybox.errors import DataError

NAT = np.iinfo(np.int64).min
_DAY_NS = 86_400 * 10**9
_SERIAL_1900_BASE = np.datetime64("1899-12-30T00:00:00", "ns").astype(np.int64)
_SERIAL_1904_BASE = np.datetime64("1904-01-01T00:00:00", "ns").astype(np.int64)

_ISO_OFFSET_PD = r"[T ]\d{1,2}:\d{2}(?::\d{2}(?:[.,]\d+)?)?\s*(?:[Zz]|[+-]\d{2}(?::?\d{2})?)$"
_WALL = (r"^\s*(\d{1,4})[-/.](\d{1,2})[-/.](\d{1,4})"
         r"(?:[T ]+(\d{1,2}):(\d{2})(?::(\d{2})(?:[.,](\d{1,9}))?)?)?\s*([AaPp]\.?[Mm]\.?)?\s*$")


@dataclass(frozen=True)
class ClockChange:
    """A change of the zone's UTC offset that wall-clock stamps cross, and how the stamps
    of the repeated hour (clocks back) or the skipped hour (clocks forward) were read."""

    zone: str
    utc_ns: int  # the instant of the change
    offset_before_s: int
    offset_after_s: int
    rows: int  # stamps in the repeated (back) or skipped (forward) wall-clock span
    first_pass: int = 0  # back: stamps read with the offset before (the first pass through the span)
    second_pass: int = 0  # back: stamps read with the offset after
    file: str = ""
    tags: tuple[str, ...] = ()  # long tables: the tags with stamps in the span (each resolved in its own order)
    group_codes: tuple[int, ...] = ()

    @property
    def back(self) -> bool:
        """Whether the clocks went back (an hour of local stamps repeats)."""
        return self.offset_after_s < self.offset_before_s

    def named(self, file: str, names: list[str] | None) -> "ClockChange":
        """The same change, placed in ``file``, its group codes turned into tag names."""
        tags = tuple(names[g] for g in self.group_codes if 0 <= g < len(names)) if names else ()
        return replace(self, file=file, tags=tags, group_codes=())

    def _wall(self, offset_s: int) -> str:
        return datetime.fromtimestamp(self.utc_ns / 1e9 + offset_s, tz=timezone.utc).strftime("%Y-%m-%d %H:%M:%S")

    @property
    def local_before(self) -> str:
        """The wall clock at the change, read on the old offset (e.g. 02:00:00 when clocks go back)."""
        return self._wall(self.offset_before_s)

    @property
    def local_after(self) -> str:
        """The wall clock right after the change (e.g. 01:00:00 when clocks go back)."""
        return self._wall(self.offset_after_s)

    def resolution(self) -> str:
        """How the stamps around the change were read, in words (the part of :meth:`warning` after the change)."""
        if self.back:
            span = f"{self.local_after[11:16]}-{self.local_before[11:16]}"
            if not self.rows:
                return f"no stamp fell in the repeated hour {span}"
            how = (f"{self.rows} stamps fell in the repeated hour {span}: {self.first_pass} read as the first pass "
                   f"({_offset_text(self.offset_before_s)}), {self.second_pass} as the second "
                   f"({_offset_text(self.offset_after_s)}), told apart by recorded order (a stamp not later than the "
                   "one before it starts the second pass" + (", each tag in its own order" if self.tags else "") + ")")
            if not (self.first_pass and self.second_pass):
                how += ("; every one was read as the " + ("first" if self.first_pass else "second") + " pass: if the "
                        "export holds the other pass only, those stamps are an hour off")
            return how
        span = f"{self.local_before[11:16]}-{self.local_after[11:16]}"
        if not self.rows:
            return f"no stamp fell in the skipped hour {span}"
        return f"{self.rows} stamps fell in the skipped hour {span}: they do not exist there and were masked"

    def warning(self) -> str:
        """The warning a data report shows: file, zone, tags, local times and offsets, UTC instant and :meth:`resolution`."""
        where = f"{self.file}: " if self.file else ""
        tags = f" (tags {', '.join(self.tags)})" if self.tags else ""
        verb = "went back" if self.back else "went forward"
        return (f"{where}clock change in {self.zone}{tags}: at {self.local_before} local "
                f"({_offset_text(self.offset_before_s)}) clocks {verb} to {self.local_after[11:]} "
                f"({_offset_text(self.offset_after_s)}), {_utc_text(self.utc_ns)}; {self.resolution()}")

    def to_dict(self) -> dict:
        """The change as plain values for the run record (offsets and UTC as text)."""
        return {"file": self.file, "zone": self.zone, "utc": _utc_text(self.utc_ns),
                "kind": "back" if self.back else "forward", "local_before": self.local_before,
                "local_after": self.local_after, "offset_before": _offset_text(self.offset_before_s),
                "offset_after": _offset_text(self.offset_after_s), "rows": self.rows, "first_pass": self.first_pass,
                "second_pass": self.second_pass, "tags": list(self.tags), "resolution": self.resolution()}


def _offset_text(seconds: int) -> str:
    sign = "+" if seconds >= 0 else "-"
    m = abs(int(seconds)) // 60
    return f"{sign}{m // 60:02d}:{m % 60:02d}"


def _utc_text(ns: int) -> str:
    return datetime.fromtimestamp(ns // 10**9, tz=timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


@dataclass(frozen=True)
class Stamps:
    """UTC nanoseconds per row (``NAT`` where the wall time does not exist), which rows
    fell into a spring-forward gap, and the clock changes the wall-clock stamps cross."""

    utc_ns: np.ndarray
    nonexistent: np.ndarray
    changes: tuple[ClockChange, ...] = ()


@dataclass(frozen=True)
class Place:
    """Where rows came from, for messages: ``file``, the row word ("line" for text files,
    "row" otherwise) and the 1-based number of each row."""

    file: str
    word: str
    numbers: np.ndarray
    column: str

    def at(self, i: int) -> str:
        """Where row ``i`` is, for messages: file, line/row number and column."""
        return f"{self.file} {self.word} {int(self.numbers[i])} column '{self.column}'"


def parse_stamps(raw: pd.Series, spec: TimeSpec, place: Place, groups: np.ndarray | None = None) -> Stamps:
    """UTC nanoseconds of a raw time column (text, numbers or stored date-times)."""
    raw = raw.reset_index(drop=True)
    _check_blank(raw, place)
    kind = _kind(raw, place)
    fmt = spec.format
    if kind == "aware":
        if fmt != "iso":
            raise DataError(f"the stamps carry their UTC offsets but time_format = '{fmt}'", where=place.file,
                            hint="set time_format = \"iso\"")
        ns = pd.DatetimeIndex(raw).tz_convert("UTC").as_unit("ns").asi8
        return Stamps(np.asarray(ns, np.int64), np.zeros(ns.size, bool))
    if kind == "naive":
        if fmt in ("epoch_s", "iso", ELAPSED):
            raise DataError(f"the file stores date-times without an offset but time_format = '{fmt}'",
                            where=place.file, hint="set time_format = \"local\" with timezone = \"...\"")
        wall = np.asarray(pd.DatetimeIndex(raw).as_unit("ns").asi8, np.int64)
        return localize(wall, spec.timezone, groups)
    if kind == "number":
        values = raw.to_numpy(dtype=float)
        return _numbers(values, spec, place, groups)
    # text
    if fmt == "iso":
        return _iso_text(raw, place)
    if fmt == "local":
        wall = _wall_text(raw, spec, place)
        return localize(wall, spec.timezone, groups)
    numbers = pd.to_numeric(raw.astype("str").str.strip(), errors="coerce")
    bad = numbers.isna().to_numpy()
    if bad.any():
        i = int(np.argmax(bad))
        raise DataError(f"'{raw.iloc[i]}' is not a number, but time_format = '{fmt}' expects one",
                        where=place.at(i), hint="check time_format, or fix that cell")
    return _numbers(numbers.to_numpy(dtype=float), spec, place, groups)


def _check_blank(raw: pd.Series, place: Place) -> None:
    blank = raw.isna().to_numpy()
    if blank.any():
        i = int(np.argmax(blank))
        raise DataError("no time stamp in this row", where=place.at(i), hint="fill it in or delete the row")


def _kind(raw: pd.Series, place: Place) -> str:
    dtype = raw.dtype
    if isinstance(dtype, pd.CategoricalDtype):  # dictionary-encoded text from the fast reader
        dtype = dtype.categories.dtype
        if pd.api.types.is_string_dtype(dtype):
            return "text"
    if isinstance(dtype, pd.DatetimeTZDtype):
        return "aware"
    if pd.api.types.is_datetime64_dtype(dtype):
        return "naive"
    if pd.api.types.is_numeric_dtype(dtype) and not pd.api.types.is_bool_dtype(dtype):
        return "number"
    if pd.api.types.is_string_dtype(dtype) and dtype != object:
        return "text"
    # object: spreadsheet cells of mixed Python types
    kinds = raw.map(_cell_kind)
    first = kinds.iloc[0]
    differ = (kinds != first).to_numpy()
    if differ.any():
        i = int(np.argmax(differ))
        raise DataError(f"this time cell holds {kinds.iloc[i]} while the first holds {first}", where=place.at(i),
                        hint="store every time stamp the same way (all date-times, all numbers or all text)")
    if first == "aware":
        return "aware"
    if first == "naive":
        return "naive"
    if first == "number":
        return "number"
    return "text"


def _cell_kind(v) -> str:
    import datetime as _dt

    if isinstance(v, (pd.Timestamp, _dt.datetime)):
        return "aware" if v.tzinfo is not None else "naive"
    if isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, bool):
        return "number"
    return "text"


def _numbers(values: np.ndarray, spec: TimeSpec, place: Place, groups) -> Stamps:
    bad = ~np.isfinite(values)
    if bad.any():
        i = int(np.argmax(bad))
        raise DataError("the time stamp is not a finite number", where=place.at(i))
    fmt = spec.format
    if fmt == "epoch_s":
        ns = np.round(values * 1e6).astype(np.int64) * 1000
        return Stamps(ns, np.zeros(ns.size, bool))
    if fmt == ELAPSED:
        ns = np.round(values * (spec.seconds_per_unit * 1e9)).astype(np.int64)
        return Stamps(ns, np.zeros(ns.size, bool))
    if fmt in ("serial_1900", "serial_1904"):
        return localize(serial_to_wall_ns(values, fmt, place), spec.timezone, groups)
    raise DataError(f"the time column holds numbers but time_format = '{fmt}'", where=place.at(0),
                    hint="set time_format = \"epoch_s\", \"serial_1900\" or \"serial_1904\"; for time "
                         "since the start of a run, time_format = \"elapsed\" with time_units = \"min\" (or \"h\")")


def serial_to_wall_ns(days: np.ndarray, system: str, place: Place | None = None) -> np.ndarray:
    """Wall-clock nanoseconds (as if UTC) of spreadsheet serial day numbers."""
    days = np.asarray(days, dtype=float)
    ms = np.round(days * 86_400_000.0).astype(np.int64)
    if system == "serial_1900":
        low = days < 61
        if low.any():
            i = int(np.argmax(low))
            where = place.at(i) if place else None
            raise DataError(f"serial day {days[i]:g} falls before 1900-03-01, where the 1900 date system counts a "
                            "29 February that never was", where=where,
                            hint="check the date system (serial_1904?) or the column")
        base = _SERIAL_1900_BASE
    else:
        base = _SERIAL_1904_BASE
    return base + ms * 1_000_000


def _first_rows(codes: np.ndarray, n_unique: int) -> np.ndarray:
    """The first row index of each unique value (pd.factorize numbers them in order of
    appearance, so a code's first row is where the running maximum grows)."""
    prev = np.maximum.accumulate(np.concatenate([[-1], codes[:-1]]))
    idx = np.flatnonzero(codes > prev)
    return idx[:n_unique]


def _iso_text(raw: pd.Series, place: Place) -> Stamps:
    runs = text_runs(raw, arrow=True)  # a long table repeats each stamp once per tag
    if runs is not None:
        lengths, values = runs
        uns = _iso_arrow(values)  # arrow refuses a stamp without an offset: success means all are aware
        if uns is None:
            codes = np.repeat(np.arange(lengths.size, dtype=np.int64), lengths)
            uns = _iso_general(raw, codes, pd.Series(values.to_pandas(), dtype=raw.dtype), place)
        return Stamps(np.repeat(uns, lengths), np.zeros(len(raw), bool))
    codes, uniq = text_codes(raw, runs=False)
    uns = _iso_fast(uniq)
    if uns is None:
        uns = _iso_general(raw, codes, uniq, place)
    return Stamps(uns[codes], np.zeros(codes.size, bool))


def _iso_general(raw: pd.Series, codes: np.ndarray, uniq: pd.Series, place: Place) -> np.ndarray:
    """UTC nanoseconds of the distinct stamps ``uniq`` after trimming blanks and reading a
    decimal comma; the errors for naive, mixed and unreadable stamps."""
    u = uniq.astype("str").str.strip()
    text = u.str.replace(",", ".", regex=False)
    uns = _iso_fast(text)
    if uns is not None:
        return uns
    aware = regex_matches(u, _ISO_OFFSET_PD)
    if not aware.all():
        first = _first_rows(codes, len(u))
        naive_i = int(first[np.flatnonzero(~aware)].min())
        if aware.any():
            aware_i = int(first[np.flatnonzero(aware)].min())
            raise DataError(
                f"'{raw.iloc[naive_i]}' has no UTC offset, but {place.word} {int(place.numbers[aware_i])} "
                f"('{raw.iloc[aware_i]}') has one: naive and offset-aware stamps are mixed", where=place.at(naive_i),
                hint="export every stamp with its offset, or every stamp as local time (time_format = \"local\")")
        raise DataError(f"'{raw.iloc[naive_i]}' has no UTC offset, but time_format = 'iso' needs one on every stamp",
                        where=place.at(naive_i),
                        hint="for wall-clock stamps set time_format = \"local\" and timezone = \"...\"")
    # a spelling arrow's parser refuses: pandas' reads more of them and finds the bad one
    parsed = pd.to_datetime(text, format="ISO8601", utc=True, errors="coerce")
    bad = parsed.isna().to_numpy()
    if bad.any():
        i = int(_first_rows(codes, len(u))[np.flatnonzero(bad)].min())
        raise DataError(f"'{raw.iloc[i]}' is not an ISO 8601 date and time", where=place.at(i),
                        hint="write e.g. 2026-01-05T06:00:00+01:00")
    return np.asarray(pd.DatetimeIndex(parsed).as_unit("ns").asi8, np.int64)


def _iso_fast(text: pd.Series) -> np.ndarray | None:
    """UTC nanoseconds of ISO 8601 text through pyarrow's parser (about 4x pandas'), or None
    when it refuses any stamp, which it does for every stamp without an offset (it never
    guesses a zone).  Agreement with pandas' parser is checked in the tests."""
    arr = _arrow_text(text)
    return None if arr is None else _iso_arrow(arr)


def _iso_arrow(arr) -> np.ndarray | None:
    """:func:`_iso_fast` on a pyarrow string array."""
    import pyarrow as pa

    try:
        stamps = arr.cast(pa.timestamp("ns", tz="UTC"))
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        return None
    if stamps.null_count:
        return None
    return np.asarray(stamps.cast(pa.int64()).to_numpy(zero_copy_only=False), np.int64)


def _wall_text(raw: pd.Series, spec: TimeSpec, place: Place) -> np.ndarray:
    """Wall-clock nanoseconds (as if UTC) of local date-time text, by the declared order and clock."""
    codes, uniq = pd.factorize(raw, sort=False)
    u = pd.Series(uniq, dtype="str")
    parts = u.str.extract(_WALL)
    nomatch = parts[0].isna().to_numpy()

    def first_rows():
        return _first_rows(codes, len(u))
    if nomatch.any():
        i = int(first_rows()[np.flatnonzero(nomatch)].min())
        raise DataError(f"'{raw.iloc[i]}' is not a date and time", where=place.at(i),
                        hint="local stamps look like 2026-01-05 06:00:00, 05.01.2026 06:00 or 1/5/2026 6:00 AM; an "
                             "offset (+01:00) means time_format = \"iso\"")

    def row_of(mask) -> int:
        return int(first_rows()[np.flatnonzero(np.asarray(mask, bool))].min())

    a, b, c = parts[0], parts[1], parts[2]
    year_first = (a.str.len() == 4).to_numpy()
    year_last = (c.str.len() == 4).to_numpy()
    if not (year_first | year_last).all():
        i = row_of(~(year_first | year_last))
        raise DataError(f"'{raw.iloc[i]}' has no four-digit year", where=place.at(i),
                        hint="export dates with four-digit years")
    order = spec.date_order
    if year_first.any() and year_last.any():
        i, j = row_of(year_first), row_of(year_last)
        raise DataError(f"'{raw.iloc[j]}' puts the year last, but {place.word} {int(place.numbers[i])} "
                        f"('{raw.iloc[i]}') puts it first", where=place.at(j), hint="use one date order in a file")
    if year_first.all():
        if order not in (None, "ymd"):
            i = row_of(year_first)
            raise DataError(f"'{raw.iloc[i]}' is year-first but date_order = '{order}' is declared", where=place.at(i),
                            hint="set date_order = \"ymd\" (or remove it)")
        year, month, day = a, b, c
    else:
        first_num, second_num = a.astype(int).to_numpy(), b.astype(int).to_numpy()
        if order in (None, "ymd"):
            i = row_of(np.ones(len(u), bool))
            if (first_num > 12).any():
                evidence = "the data show day first: declare date_order = \"dmy\""
                k = row_of(first_num > 12)
            elif (second_num > 12).any():
                evidence = "the data show month first: declare date_order = \"mdy\""
                k = row_of(second_num > 12)
            else:
                evidence, k = "declare date_order = \"dmy\" or \"mdy\"", i
            what = "is not year-first and no day/month order is declared" if order is None else \
                "contradicts the declared date_order = 'ymd'"
            raise DataError(f"'{raw.iloc[k]}' {what}", where=place.at(k), hint=evidence)
        if order == "dmy":
            day, month = a, b
        else:
            month, day = a, b
        year = c
        month_n = month.astype(int).to_numpy()
        if (month_n > 12).any():
            k = row_of(month_n > 12)
            other = "mdy" if order == "dmy" else "dmy"
            raise DataError(f"'{raw.iloc[k]}' has month {int(month_n[np.flatnonzero(month_n > 12)[0]])} under the "
                            f"declared date_order = '{order}'", where=place.at(k),
                            hint=f"the data contradict the declared order; is it date_order = \"{other}\"?")
    hour = parts[3].fillna("0").astype(int).to_numpy()
    minute = parts[4].fillna("0").astype(int).to_numpy()
    second = parts[5].fillna("0").astype(int).to_numpy()
    frac = parts[6].fillna("0").to_numpy(dtype=str)
    ampm = parts[7]
    has_ampm = ampm.notna().to_numpy()
    if spec.clock == "24h":
        if has_ampm.any():
            i = row_of(has_ampm)
            raise DataError(f"'{raw.iloc[i]}' has AM/PM but clock = '24h'", where=place.at(i),
                            hint="set clock = \"12h\"")
    else:
        if not has_ampm.all():
            i = row_of(~has_ampm)
            raise DataError(f"'{raw.iloc[i]}' has no AM/PM but clock = '12h'", where=place.at(i),
                            hint="set clock = \"24h\", or fix the stamp")
        bad_h = (hour < 1) | (hour > 12)
        if bad_h.any():
            i = row_of(bad_h)
            raise DataError(f"'{raw.iloc[i]}': hour {hour[np.flatnonzero(bad_h)[0]]} on a 12-hour clock",
                            where=place.at(i))
        pm = ampm.str.lower().str.startswith("p").to_numpy(dtype=bool)
        hour = np.where(hour == 12, 0, hour) + np.where(pm, 12, 0)
    bad = (hour > 23) | (minute > 59) | (second > 59)
    if bad.any():
        i = row_of(bad)
        raise DataError(f"'{raw.iloc[i]}' is not a valid time of day", where=place.at(i))
    parsed = pd.to_datetime(pd.DataFrame({"year": year.astype(int), "month": month.astype(int),
                                          "day": day.astype(int)}), errors="coerce")
    badd = parsed.isna().to_numpy()
    if badd.any():
        i = row_of(badd)
        raise DataError(f"'{raw.iloc[i]}' is not a valid date (under date_order = '{order or 'ymd'}')",
                        where=place.at(i))
    frac_ns = np.array([int((f + "000000000")[:9]) for f in frac], dtype=np.int64) if len(frac) else np.zeros(0, np.int64)
    wall_u = (np.asarray(pd.DatetimeIndex(parsed).as_unit("ns").asi8, np.int64)
              + ((hour * 60 + minute) * 60 + second).astype(np.int64) * 10**9 + frac_ns)
    return wall_u[codes]


def localize(wall_ns: np.ndarray, tz: str, groups: np.ndarray | None = None) -> Stamps:
    """UTC of wall-clock times in zone ``tz``, resolved in recorded order.

    ``groups`` (one code per row, e.g. the tag in a long table) keeps each group's own
    order: rows of one group are compared only with earlier rows of the same group."""
    wall_ns = np.asarray(wall_ns, np.int64)
    codes, uniq = pd.factorize(wall_ns, sort=False)
    idx = pd.DatetimeIndex(np.asarray(uniq, np.int64).view("M8[ns]"))
    m = len(idx)
    early = idx.tz_localize(tz, ambiguous=np.ones(m, bool), nonexistent="NaT")  # summer-time reading
    late = idx.tz_localize(tz, ambiguous=np.zeros(m, bool), nonexistent="NaT")  # standard-time reading
    gap_u = np.asarray(early.isna())
    e = np.asarray(early.as_unit("ns").asi8, np.int64)
    lt = np.asarray(late.as_unit("ns").asi8, np.int64)
    amb_u = (e != lt) & ~gap_u
    utc = e[codes].copy()
    nonexistent = gap_u[codes]
    utc[nonexistent] = NAT
    amb_rows = np.flatnonzero(amb_u[codes])
    second_rows = np.zeros(0, np.intp)
    if amb_rows.size:
        second = _second_pass(wall_ns[amb_rows], None if groups is None else np.asarray(groups)[amb_rows])
        second_rows = amb_rows[second]
        utc[second_rows] = lt[codes[second_rows]]
    changes = clock_changes(np.asarray(uniq, np.int64), e, gap_u, tz, wall_ns, nonexistent, amb_rows, second_rows,
                            groups)
    return Stamps(utc, nonexistent, changes)


def _offset_at(zone, utc_s: float) -> int:
    return int(datetime.fromtimestamp(utc_s, tz=zone).utcoffset().total_seconds())


def _change_instant(zone, lo_s: int, hi_s: int) -> int:
    """The first whole second in ``(lo_s, hi_s]`` whose UTC offset differs from ``lo_s``'s
    (by bisection; offsets are steps that change on whole seconds)."""
    before = _offset_at(zone, lo_s)
    while hi_s - lo_s > 1:
        mid = (lo_s + hi_s) // 2
        if _offset_at(zone, mid) == before:
            lo_s = mid
        else:
            hi_s = mid
    return hi_s


def clock_changes(walls: np.ndarray, early_utc: np.ndarray, gap: np.ndarray, tz: str, wall_ns: np.ndarray,
                  nonexistent: np.ndarray, amb_rows: np.ndarray, second_rows: np.ndarray,
                  groups: np.ndarray | None) -> tuple[ClockChange, ...]:
    """Every change of the zone's offset between the distinct wall times ``walls`` (their
    summer-time readings ``early_utc``, NaT-free where not ``gap``), with the rows in the
    repeated or skipped span counted as they were read."""
    ok = ~gap
    if ok.sum() < 2:
        return ()
    w, off = walls[ok], walls[ok] - early_utc[ok]
    if off.min() == off.max():  # the usual case: one offset throughout
        return ()
    import zoneinfo

    zone = zoneinfo.ZoneInfo(tz)
    order = np.argsort(w, kind="stable")
    w, off = w[order], off[order]
    at = np.flatnonzero(off[1:] != off[:-1])
    out = []
    second = np.zeros(wall_ns.size, bool)
    second[second_rows] = True
    amb = np.zeros(wall_ns.size, bool)
    amb[amb_rows] = True
    for i in at:
        lo_s = int((w[i] - off[i]) // 10**9)
        hi_s = int(-((-(w[i + 1] - off[i + 1])) // 10**9))
        t_s = _change_instant(zone, lo_s, hi_s)
        before = _offset_at(zone, t_s - 1)
        after = _offset_at(zone, t_s)
        a_ns = (t_s + min(before, after)) * 10**9
        b_ns = (t_s + max(before, after)) * 10**9
        in_span = (wall_ns >= a_ns) & (wall_ns < b_ns)
        rows = in_span & (amb if after < before else nonexistent)
        n = int(rows.sum())
        n_second = int((rows & second).sum()) if after < before else 0
        codes = tuple(int(g) for g in np.unique(np.asarray(groups)[rows])) if groups is not None and n else ()
        out.append(ClockChange(tz, t_s * 10**9, before, after, n, n - n_second if after < before else 0, n_second,
                               group_codes=codes))
    return tuple(out)


def _second_pass(wall: np.ndarray, groups: np.ndarray | None) -> np.ndarray:
    """Among the rows in a repeated hour (in recorded order), those on the second pass: from
    the first row not later than the one before it (same group, same day) on."""
    n = wall.size
    g = np.zeros(n, np.int64) if groups is None else pd.factorize(groups)[0].astype(np.int64)
    day = wall // _DAY_NS
    order = np.lexsort((np.arange(n), day, g))  # stable by group, day, then recorded order
    w, gg, dd = wall[order], g[order], day[order]
    same = np.zeros(n, bool)
    same[1:] = (gg[1:] == gg[:-1]) & (dd[1:] == dd[:-1])
    back = np.zeros(n, bool)
    back[1:] = same[1:] & (w[1:] <= w[:-1])
    starts = ~same
    run_id = np.cumsum(starts) - 1
    cum = np.cumsum(back)
    base = cum[np.flatnonzero(starts)][run_id] - back[np.flatnonzero(starts)][run_id]
    passed = (cum - base) > 0
    out = np.zeros(n, bool)
    out[order] = passed
    return out
