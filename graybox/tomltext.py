"""TOML text of a study given as Python values, for its run folder's ``study.toml``.

Tables become ``[headers]`` (nested ones ``[a.b]``), values basic strings, integers, floats
(``inf``, ``nan``), booleans, date-times, inline arrays and inline tables (inside arrays).
Anything else (a pandas DataFrame in a data table's ``files``) is written as a string that
describes it; the text reads back with ``tomllib`` to the same tables otherwise.
"""

from __future__ import annotations

import json
import math
import re
from datetime import date, datetime, time
from typing import Any

_BARE = re.compile(r"^[A-Za-z0-9_-]+$")


def _key(k: Any) -> str:
    k = str(k)
    return k if _BARE.match(k) else json.dumps(k, ensure_ascii=False)


def describe_object(v: Any) -> str:
    """Text for a value TOML cannot hold (a DataFrame: its size and columns)."""
    shape = getattr(v, "shape", None)
    if shape is not None and hasattr(v, "columns"):
        cols = ", ".join(str(c) for c in list(v.columns)[:8]) + (", ..." if len(v.columns) > 8 else "")
        return f"<pandas DataFrame, {shape[0]} rows x {shape[1]} columns: {cols}>"
    return f"<{type(v).__name__}>"


def _value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False)
    if isinstance(v, (datetime, date, time)):
        return v.isoformat()
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{_key(k)} = {_value(x)}" for k, x in v.items()) + "}"
    return json.dumps(describe_object(v))


def toml_text(tables: dict) -> str:
    """``tables`` (a dict of dicts, as ``tomllib.loads`` returns) as TOML text."""
    lines: list[str] = []

    def emit(path: tuple[str, ...], table: dict) -> None:
        plain = [(k, v) for k, v in table.items() if not isinstance(v, dict)]
        subs = [(k, v) for k, v in table.items() if isinstance(v, dict)]
        if path and (plain or not subs):
            if lines:
                lines.append("")
            lines.append("[" + ".".join(_key(p) for p in path) + "]")
        for k, v in plain:
            lines.append(f"{_key(k)} = {_value(v)}")
        for k, v in subs:
            emit((*path, str(k)), v)

    emit((), tables)
    return "\n".join(lines) + "\n"
