"""Small toolkit for validating TOML tables with every error located.

A :class:`Table` wraps one TOML table with its dotted path and the file it came from.  Its
accessors check types, reject unknown keys with a "did you mean" and produce locations such
as ``configs/vessel.toml:14 [parameters.UA] key 'guess'`` (the line is found by scanning the
file's text for the table header and key; tomllib keeps no positions).
"""

from __future__ import annotations

import difflib
import math
import re
import tomllib
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from typing import Any, Iterable, Iterator

from graybox.errors import ConfigError

_MISSING = object()


@lru_cache(maxsize=32)
def _file_lines(path: str) -> tuple[str, ...]:
    try:
        return tuple(Path(path).read_text(encoding="utf-8").splitlines())
    except OSError:
        return ()


def _find_line(path: Path | None, table: tuple[str, ...], key: str | None) -> int | None:
    """Best-effort 1-based line of ``key`` in ``[table]`` (or of the header)."""
    if path is None:
        return None
    lines = _file_lines(str(path))
    if not lines:
        return None
    header_re = re.compile(r"^\s*\[\[?\s*([^\]]+?)\s*\]\]?\s*(#.*)?$")
    current: tuple[str, ...] = ()
    header_line = None
    sub_header = None  # [table.key] when key names a table
    inline_line = None  # parent = { ... } when the table is written inline
    parent_header = None  # the last resort for a table not written at all
    best = None
    dotted = ".".join(table)
    for i, line in enumerate(lines, start=1):
        m = header_re.match(line)
        if m:
            current = tuple(p.strip().strip('"') for p in m.group(1).split("."))
            if current == table:
                header_line = i
            if table and current == table[:-1]:
                parent_header = parent_header or i
            if key is not None and current[:len(table) + 1] == (*table, key):
                sub_header = sub_header or i
            continue
        stripped = line.strip()
        if (table and inline_line is None and current == table[:-1]
                and re.match(rf'^"?{re.escape(table[-1])}"?\s*=', stripped)):
            inline_line = i
        if key is None:
            continue
        # key = ... inside [table], or table.key = ..., or inline table on the parent
        if current == table and re.match(rf'^"?{re.escape(key)}"?\s*=', stripped):
            return i
        if re.match(rf'^"?{re.escape(dotted)}\.{re.escape(key)}"?\s*=', stripped) or (
            table and current == table[:-1] and re.match(rf'^"?{re.escape(table[-1])}"?\s*=', stripped)
            and re.search(rf'\b{re.escape(key)}\s*=', stripped)
        ):
            best = best or i
    return best or sub_header or header_line or inline_line or parent_header


MAX_CONFIG_BYTES = 1 << 20  # a study file is a few kilobytes; 1 MiB is far beyond any real one
MAX_NESTING = 32  # arrays and tables inside each other; a real study file nests 3 or 4 deep

# the tokens that matter for nesting: strings and comments (skipped) and brackets
_NEST_TOKENS = re.compile(r'"""(?:\\.|[^\\])*?"""|\'\'\'.*?\'\'\'|"(?:\\.|[^"\\\n])*"|\'[^\'\n]*\'|#[^\n]*|[\[\]{}]',
                          re.DOTALL)


def nesting_error(text: str, path: Path, limit: int = MAX_NESTING) -> ConfigError | None:
    """A located error if arrays or inline tables in ``text`` nest deeper than ``limit``
    (tomllib parses them recursively: a few hundred levels exhaust Python's stack).  A scan
    of strings, comments and brackets only; the TOML grammar itself is tomllib's job."""
    depth = 0
    for m in _NEST_TOKENS.finditer(text):
        tok = m.group()
        if tok in "[{":
            depth += 1
            if depth > limit:
                line = text.count("\n", 0, m.start()) + 1
                col = m.start() - (text.rfind("\n", 0, m.start()) + 1) + 1
                return ConfigError(f"arrays or inline tables nested more than {limit} levels deep",
                                   where=f"{path}:{line}:{col}",
                                   hint="a study file needs a few levels at most; check for a runaway bracket")
        elif tok in "]}":
            depth = max(depth - 1, 0)
    return None


def _depth_error(data: dict, path: Path, limit: int = MAX_NESTING) -> ConfigError | None:
    """A located error if the parsed tables (dotted keys and headers included) nest deeper
    than ``limit``; walked without recursion."""
    stack: list[tuple[object, tuple[str, ...]]] = [(data, ())]
    while stack:
        value, keys = stack.pop()
        if len(keys) > limit:
            shown = ".".join(keys[:4]) + "..."
            return ConfigError(f"tables nested more than {limit} levels deep", where=f"{path} [{shown}]",
                               hint="a study file needs a few levels at most")
        if isinstance(value, dict):
            stack.extend((v, (*keys, str(k))) for k, v in value.items())
        elif isinstance(value, list):
            stack.extend((v, (*keys, f"[{i}]")) for i, v in enumerate(value))
    return None


def load_toml(path: Path) -> dict:
    """Read a TOML file; a syntax error becomes a ConfigError with file and line.  Only a
    regular file of at most ``MAX_CONFIG_BYTES`` is read (not a FIFO, a device, a folder),
    nested at most ``MAX_NESTING`` levels deep."""
    from graybox.files import read_regular_file

    raw = read_regular_file(path, what="config file", max_bytes=MAX_CONFIG_BYTES, error=ConfigError)
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ConfigError(f"{path}: not UTF-8 text (byte {exc.start})", hint="save the config as UTF-8") from None
    deep = nesting_error(text, path)
    if deep is not None:
        raise deep
    try:
        data = tomllib.loads(text)
    except RecursionError:  # a nesting the scan did not see (it errs on the side of tomllib's grammar)
        raise ConfigError(f"{path}: nested too deeply to read",
                          hint=f"a study file nests at most {MAX_NESTING} levels") from None
    except tomllib.TOMLDecodeError as exc:
        msg = str(exc)
        hint = None
        if "overwrite" in msg.lower() or "duplicate" in msg.lower():
            hint = "a key or table is given twice; a state has exactly one rate equation"
        raise ConfigError(f"{path}: TOML syntax error: {msg}", hint=hint) from None
    deep = _depth_error(data, path)
    if deep is not None:
        raise deep
    return data


@dataclass(frozen=True)
class Table:
    """A table of a study file with where it sits (the file and the path of table names):
    every getter checks the value's type and range and raises a ConfigError located at
    file:line [table] key, with a hint."""

    data: dict
    path: tuple[str, ...] = ()
    file: Path | None = None

    # -- locations ---------------------------------------------------------------------------
    def where(self, key: str | None = None) -> str:
        """The location of the table (or of its ``key``) for messages: file:line [table.path] key 'key'."""
        line = _find_line(self.file, self.path, key)
        loc = str(self.file) if self.file else "<config>"
        if line:
            loc += f":{line}"
        if self.path:
            loc += f" [{'.'.join(self.path)}]"
        if key is not None:
            loc += f" key '{key}'"
        return loc

    def error(self, key: str | None, message: str, hint: str | None = None) -> ConfigError:
        """A ConfigError located at ``key`` of this table (None: the table itself)."""
        return ConfigError(message, where=self.where(key), hint=hint)

    # -- structure ---------------------------------------------------------------------------
    def keys(self) -> list[str]:
        """The keys the table holds, in file order."""
        return list(self.data)

    def __contains__(self, key: str) -> bool:
        return key in self.data

    def check_keys(self, allowed: Iterable[str]) -> None:
        """A ConfigError for the first key not in ``allowed``, suggesting the closest allowed key."""
        allowed = list(allowed)
        for key in self.data:
            if key not in allowed:
                close = difflib.get_close_matches(key, allowed, n=1, cutoff=0.6)
                hint = f"did you mean '{close[0]}'?" if close else f"allowed keys: {', '.join(allowed)}"
                raise self.error(key, "unknown key", hint=hint)

    def sub(self, key: str, *, required: bool = False) -> "Table":
        """The sub-table ``key`` (an empty one when absent, unless ``required``); a ConfigError when
        it is missing but required or not a table."""
        value = self.data.get(key, _MISSING)
        if value is _MISSING:
            if required:
                raise self.error(key, "missing table", hint=f"add a [{'.'.join((*self.path, key))}] table")
            return Table({}, (*self.path, key), self.file)
        if not isinstance(value, dict):
            raise self.error(key, f"must be a table, got {type(value).__name__}")
        return Table(value, (*self.path, key), self.file)

    def items(self) -> Iterator[tuple[str, Any]]:
        """The table's (key, value) pairs, values as read."""
        return iter(self.data.items())

    # -- typed accessors ---------------------------------------------------------------------
    def get(self, key: str, default: Any = _MISSING):
        """The value of ``key``, or ``default``; a ConfigError when it is absent and has no default."""
        if key not in self.data:
            if default is _MISSING:
                raise self.error(key, "missing required key")
            return default
        return self.data[key]

    def string(self, key: str, default: Any = _MISSING, choices: Iterable[str] | None = None) -> str:
        """The text value of ``key`` (or ``default``); a ConfigError when it is not text or not one
        of ``choices`` (suggesting the closest)."""
        value = self.get(key, default)
        if value is default and default is not _MISSING:
            return value
        if not isinstance(value, str):
            raise self.error(key, f"must be text, got {value!r}")
        if choices is not None:
            choices = list(choices)
            if value not in choices:
                close = difflib.get_close_matches(value, choices, n=1)
                hint = (f"did you mean '{close[0]}'? " if close else "") + f"choose one of: {', '.join(choices)}"
                raise self.error(key, f"'{value}' is not a valid choice", hint=hint)
        return value

    def number(self, key: str, default: Any = _MISSING, *, positive: bool = False, finite: bool = True,
               integer: bool = False, minimum: float | None = None) -> float:
        """The number at ``key`` (or ``default``), checked: a number (not a boolean) fitting in 64
        bits, finite, positive, an integer, at least ``minimum``, as asked; an int when
        ``integer``, else a float."""
        value = self.get(key, default)
        if value is default and default is not _MISSING:
            return value
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise self.error(key, f"must be a number, got {value!r}")
        if isinstance(value, int) and abs(value) > 2**63 - 1:  # TOML integers are 64-bit; tomllib reads any
            raise self.error(key, f"must fit in 64 bits, got {value}", hint="TOML integers are 64-bit")
        if integer and not float(value).is_integer():
            raise self.error(key, f"must be a whole number, got {value!r}")
        if finite and not math.isfinite(value):
            raise self.error(key, f"must be finite, got {value!r}")
        if positive and not value > 0:
            raise self.error(key, f"must be positive, got {value!r}")
        if minimum is not None and value < minimum:
            raise self.error(key, f"must be at least {minimum}, got {value!r}")
        return int(value) if integer else float(value)

    def boolean(self, key: str, default: Any = _MISSING) -> bool:
        """The true/false value of ``key`` (or ``default``); a ConfigError for anything else."""
        value = self.get(key, default)
        if not isinstance(value, bool):
            raise self.error(key, f"must be true or false, got {value!r}")
        return value

    def string_list(self, key: str, default: Any = _MISSING) -> list[str]:
        """The text or list of texts at ``key`` as a list (or ``default``)."""
        value = self.get(key, default)
        if value is default and default is not _MISSING:
            return value
        if isinstance(value, str):
            return [value]
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            raise self.error(key, f"must be text or a list of text, got {value!r}")
        return list(value)

    def pair(self, key: str, default: Any = _MISSING) -> tuple[float, float]:
        """The pair ``[low, high]`` of numbers at ``key`` (or ``default``), with low below high."""
        value = self.get(key, default)
        if value is default and default is not _MISSING:
            return value
        if (not isinstance(value, list) or len(value) != 2
                or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value)):
            raise self.error(key, f"must be a pair of numbers [low, high], got {value!r}")
        lo, hi = float(value[0]), float(value[1])
        if not lo < hi:
            raise self.error(key, f"low must be below high, got [{lo}, {hi}]")
        return lo, hi


def parse_duration(text: str | float | int, where: str) -> float:
    """A duration in seconds from a number (seconds) or text like '15 min', '2 h', '30 s'."""
    if isinstance(text, (int, float)) and not isinstance(text, bool):
        if text <= 0:
            raise ConfigError(f"a duration must be positive, got {text}", where=where)
        return float(text)
    if not isinstance(text, str):
        raise ConfigError(f"a duration must be a number of seconds or text like '15 min', got {text!r}", where=where)
    from graybox.unitreg import registry

    ureg = registry()
    try:
        q = ureg.Quantity(text)
        seconds = float(q.to("s").magnitude)
    except Exception:  # noqa: BLE001 - pint raises many kinds; all mean "not a duration"
        raise ConfigError(f"'{text}' is not a duration", where=where, hint="write e.g. '30 s', '15 min', '2 h', '1 day'") from None
    if seconds <= 0:
        raise ConfigError(f"a duration must be positive, got '{text}'", where=where)
    return seconds
