"""The documented defaults are the code's (issue 13, section 4: config.py documented
max_gap = "15 min" as the default while no limit applied).

The module docstring of graybox/data/config.py shows every key; a key with a default shows
it, an example is marked "e.g.".  Its lines are parsed with Python's tomllib (the TOML 1.0
reference parser of the standard library) and compared with the defaults the parser takes
(DATA_DEFAULTS, TAG_DEFAULTS, ...); then a table that says nothing is parsed and its spec is
compared with the same documented values (durations by NIST SP 811: 1 h = 3600 s).
"""

from __future__ import annotations

import re
import tomllib

import pytest

import graybox.data.config as cfg
from graybox.data import SymbolInfo
from graybox.data.config import parse_data_table

from .util import write


def _documented() -> dict[str, dict[str, object]]:
    """``{table: {key: value}}`` of the docstring's lines that show a default."""
    out: dict[str, dict[str, object]] = {}
    table = None
    for line in cfg.__doc__.splitlines():
        text = line.strip()
        head = re.match(r"^\[([\w.]+)\]", text)
        if head:
            table = head.group(1)
            out.setdefault(table, {})
            continue
        if not re.match(r"^\w+\s*=", text) or table is None or "# e.g." in text:
            continue
        out[table].update(tomllib.loads(text))  # TOML reads the value and skips the comment
    return out


def test_every_documented_default_is_the_codes():
    doc = _documented()
    for table, defaults in (("data", cfg.DATA_DEFAULTS), ("data.spikes", cfg.SPIKE_DEFAULTS),
                            ("data.informative", cfg.INFORMATIVE_DEFAULTS), ("data.tags.T", cfg.TAG_DEFAULTS)):
        assert doc[table] == defaults, table


def test_auto_gap_rule_text_matches_its_constants():
    """The docstring's words for "auto" name the constants' values."""
    text = " ".join(cfg.__doc__.replace("#", " ").split())  # comment lines joined
    assert cfg.AUTO_GAP_FLOOR_S == 15 * 60 and "the longer of 15 min and 10 of the tag's median intervals" in text
    assert cfg.AUTO_GAP_INTERVALS == 10
    assert cfg.AUTO_GAP_EXCEPTION_FLOOR_S == 3600 and "longer of 1 h and 10 median intervals" in text


def test_a_table_that_says_nothing_gets_the_documented_values(tmp_path):
    write(tmp_path, "x.csv", "timestamp,A\n2026-01-01T00:00:00Z,1\n")
    spec = parse_data_table({"files": ["x.csv"], "time_column": "timestamp", "tags": {"y": "A"},
                             "spikes": {"window": "1 h"}, "informative": {}},
                            "main", symbols={"y": SymbolInfo("y", "output", "K")}, base_dir=tmp_path,
                            where=f"{tmp_path}/cfg.toml [data]")
    doc = _documented()
    d, tag = doc["data"], doc["data.tags.T"]
    r = spec.read
    assert (r.layout, r.delimiter, r.decimal, r.header_row, r.skip_after_header, list(r.no_value), r.tag_column,
            r.value_column) == (d["layout"], d["delimiter"], d["decimal"], d["header_row"], d["skip_after_header"],
                                d["no_value"], d["tag_column"], d["value_column"])
    assert r.encoding == "utf-8-sig" and d["encoding"] == "utf-8"  # utf-8 is read skipping a byte-order mark
    assert (spec.time.format, spec.time.clock) == (d["time_format"], d["clock"])
    assert spec.good_quality == frozenset(d["good_quality"])
    assert spec.max_gap == d["max_gap"] == "auto"
    assert d["stuck_after"] == "auto" and spec.stuck_after == "auto"  # resolved per tag: test_stuck_auto.py
    assert spec.stuck_action == d["stuck_action"]
    assert spec.spikes.threshold == doc["data.spikes"]["threshold"]
    assert (spec.search.window, spec.search.step, spec.search.top) == (86400.0, 6 * 3600.0,
                                                                        doc["data.informative"]["top"])
    t = spec.tags[0]
    assert (t.deadband, t.logging, t.max_gap, t.stuck_after) == (tag["deadband"], tag["logging"], None, None)


@pytest.mark.parametrize("text, seconds", [("off", float("inf")), ("OFF", float("inf")), (False, float("inf")),
                                           ("auto", "auto"), ("90 min", 5400.0), (600, 600.0)])
def test_max_gap_spellings(tmp_path, text, seconds):
    write(tmp_path, "x.csv", "timestamp,A\n2026-01-01T00:00:00Z,1\n")
    spec = parse_data_table({"files": ["x.csv"], "time_column": "timestamp", "max_gap": text,
                             "tags": {"y": {"tag": "A", "max_gap": text, "stuck_after": "off" if text == "auto" else text}},
                             }, "main", symbols={"y": SymbolInfo("y", "output", "K")}, base_dir=tmp_path,
                            where=f"{tmp_path}/cfg.toml [data]")
    assert spec.max_gap == seconds and spec.tags[0].max_gap == seconds
