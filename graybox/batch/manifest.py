"""The fleet manifest: one row per job (a unit, a time window), as a CSV table.

Columns (``job`` and ``study`` required, the rest optional)::

    job,study,data,start,end,sample
    HX-101,studies/exchanger.toml,data/hx101_jan.csv,2026-01-01T00:00Z,2026-02-01T00:00Z,no
    HX-102,studies/exchanger.toml,data/hx102_jan.csv;data/hx102_feb.csv,,,no

* ``job``: a unique name (letters, digits, ``-_.``); it names the job's run folder;
* ``study``: the study file (relative paths resolve against the manifest's folder);
* ``data``: data files replacing the study's ``[data] files`` (``;``-separated); empty:
  the study's own files;
* ``start`` / ``end``: a time window (ISO 8601, UTC if no offset) replacing the study's;
* ``sample``: ``yes``/``no`` (empty: the study's setting);
* ``timeout``: seconds this job may take (empty: the batch's ``--timeout``).

Every row is checked before any job starts: a missing file or a bad window is reported with
the manifest's line number.
"""

from __future__ import annotations

import csv
import re
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from graybox.errors import BatchError

REQUIRED = ("job", "study")
COLUMNS = ("job", "study", "data", "start", "end", "sample", "timeout")
_JOB_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.\-]*$")


@dataclass(frozen=True)
class Job:
    """One manifest row: the job's name, its study file, the data files replacing the study's
    (empty: the study's own), an optional UTC window (start/end text), whether it samples
    (None: as the study says), its manifest line and its own timeout (s; None: the batch's)."""

    name: str
    study: Path
    data: tuple[Path, ...]  # empty: the study's own files
    start: str | None
    end: str | None
    sample: bool | None
    line: int
    timeout_s: float | None = None

    def overrides(self) -> dict:
        """The study-file keys this job replaces (``{"data": {"files": [...], "select": [[start,
        end]]}}``; an open end of the window is far past or future), or ``{}``."""
        data: dict = {}
        if self.data:
            data["files"] = [str(p) for p in self.data]
        if self.start or self.end:
            data["select"] = [[self.start or "1900-01-01T00:00:00Z", self.end or "2200-01-01T00:00:00Z"]]
        return {"data": data} if data else {}


def _parse_time(text: str, where: str) -> str:
    try:
        ts = pd.Timestamp(text)
    except (ValueError, TypeError):
        raise BatchError(f"'{text}' is not a timestamp", where=where,
                         hint="write ISO 8601, e.g. 2026-01-01T00:00Z or 2026-01-01T00:00+01:00") from None
    if ts.tzinfo is None:
        ts = ts.tz_localize("UTC")
    return ts.tz_convert("UTC").strftime("%Y-%m-%dT%H:%M:%SZ")


def _parse_bool(text: str, where: str) -> bool | None:
    t = text.strip().lower()
    if t == "":
        return None
    if t in ("yes", "true", "1", "y"):
        return True
    if t in ("no", "false", "0", "n"):
        return False
    raise BatchError(f"sample must be yes or no, got '{text}'", where=where)


def read_manifest(path: str | Path) -> list[Job]:
    """The jobs of a CSV manifest, checked (known and required columns, cell counts, job
    names usable as folders and unique, study and data files present, timestamps and
    windows, sample yes/no, positive timeouts); a BatchError at the manifest line otherwise."""
    path = Path(path).resolve()
    try:
        text = path.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise BatchError(f"manifest not found: {path}") from None
    rows = list(csv.reader(text.splitlines()))
    if not rows or not any(cell.strip() for cell in rows[0]):
        raise BatchError(f"{path}: the manifest is empty", hint=f"first line: {','.join(COLUMNS)}")
    header = [h.strip() for h in rows[0]]
    for col in header:
        if col not in COLUMNS:
            import difflib

            close = difflib.get_close_matches(col, COLUMNS, n=1)
            raise BatchError(f"unknown column '{col}'", where=f"{path}:1",
                             hint=(f"did you mean '{close[0]}'? " if close else "") + f"columns: {', '.join(COLUMNS)}")
    for col in REQUIRED:
        if col not in header:
            raise BatchError(f"the manifest has no '{col}' column", where=f"{path}:1")
    jobs: list[Job] = []
    seen: dict[str, int] = {}
    base = path.parent
    for i, row in enumerate(rows[1:], start=2):
        if not any(cell.strip() for cell in row):
            continue
        where = f"{path}:{i}"
        if len(row) > len(header):
            raise BatchError(f"{len(row)} cells but {len(header)} columns", where=where)
        cells = dict(zip(header, [c.strip() for c in row] + [""] * (len(header) - len(row))))
        name = cells["job"]
        if not _JOB_NAME.match(name):
            raise BatchError(f"job name '{name}' is not usable as a folder name", where=where,
                             hint="use letters, digits, '-', '_' and '.'")
        if name in seen:
            raise BatchError(f"job '{name}' appears twice (first on line {seen[name]})", where=where)
        seen[name] = i
        study = (base / cells["study"]).resolve()
        if not cells["study"] or not study.is_file():
            raise BatchError(f"study file not found: {study}", where=where)
        data = tuple((base / d.strip()).resolve() for d in cells.get("data", "").split(";") if d.strip())
        for d in data:
            if not d.is_file():
                raise BatchError(f"data file not found: {d}", where=where)
        start = _parse_time(cells["start"], where) if cells.get("start") else None
        end = _parse_time(cells["end"], where) if cells.get("end") else None
        if start and end and not pd.Timestamp(start) < pd.Timestamp(end):
            raise BatchError(f"the window ends ({end}) before it starts ({start})", where=where)
        timeout = None
        if cells.get("timeout"):
            try:
                timeout = float(cells["timeout"])
            except ValueError:
                timeout = -1.0
            if not timeout > 0:
                raise BatchError(f"timeout must be a positive number of seconds, got '{cells['timeout']}'", where=where)
        jobs.append(Job(name, study, data, start, end, _parse_bool(cells.get("sample", ""), where), i, timeout))
    if not jobs:
        raise BatchError(f"{path}: the manifest lists no job")
    return jobs
