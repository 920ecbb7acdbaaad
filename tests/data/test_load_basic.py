"""Wide CSV exports into a Record; the config schema and its located errors.

Reference for expected values: the scenario's own numbers converted by hand with the exact
factors (NIST SP 811 B.8/B.9: T/K = (t/degF + 459.67)/1.8, 1 h = 3600 s); pandas
(pd.Timestamp) as the reference for UTC instants.
"""

import numpy as np
import pandas as pd
import pytest

from graybox.data import Record
from graybox.errors import ConfigError, DataError

from .util import load, write

CSV = """timestamp,TI_101,QI_7,FI_3
2026-01-05T00:00:00Z,50.0,1.5,360
2026-01-05T00:01:00Z,51.0,1.5,360
2026-01-05T00:02:00Z,52.5,2.0,720
2026-01-05T00:03:00Z,53.0,2.0,720
"""

TABLE = {
    "files": ["log.csv"],
    "time_column": "timestamp",
    "tags": {
        "T": {"tag": "TI_101", "units": "degF", "temperature": "reading"},
        "Q": {"tag": "QI_7", "units": "kW"},
        "F": {"tag": "FI_3", "units": "kg/h"},
    },
}


def test_wide_csv_into_record(tmp_path):
    """Values in model units, times in seconds from the first stamp (pandas as reference)."""
    write(tmp_path, "log.csv", CSV)
    rec, rep = load(tmp_path, TABLE)
    assert isinstance(rec, Record)
    assert rec.start_utc == pd.Timestamp("2026-01-05T00:00Z").to_pydatetime()
    T = rec.outputs["T"]
    np.testing.assert_allclose(T.t, [0, 60, 120, 180])
    np.testing.assert_allclose(T.values, (np.array([50, 51, 52.5, 53]) + 459.67) / 1.8, rtol=1e-14)
    assert T.mask.all() and T.units == "K"
    np.testing.assert_allclose(rec.inputs["Q"].values, [1500, 1500, 2000, 2000])
    np.testing.assert_allclose(rec.inputs["F"].values, [0.1, 0.1, 0.2, 0.2], rtol=1e-14)
    assert rec.inputs["F"].hold == "previous"
    assert len(rec.segments) == 1 and rec.segments[0].t_end == 180.0
    assert rec.sources[0]["path"].endswith("log.csv") and len(rec.sources[0]["sha256"]) == 64
    tr = rep.tag("T")
    assert tr.rows_read == 4 and tr.median_interval_s == 60.0 and tr.coverage_pct == 100.0
    assert "degF" in tr.conversion or "°F" in tr.conversion
    d = rep.to_dict()
    import json

    json.dumps(d)
    assert "TI_101" in rep.summary()


def test_shorthand_mapping_means_model_units(tmp_path):
    write(tmp_path, "log.csv", CSV)
    table = dict(TABLE, tags={"T": "TI_101", "Q": "QI_7", "F": "FI_3"})
    rec, rep = load(tmp_path, table)
    np.testing.assert_allclose(rec.outputs["T"].values, [50, 51, 52.5, 53])
    assert rep.tag("T").conversion.startswith("none")


def test_epoch_seconds(tmp_path):
    """Epoch seconds: pandas pd.Timestamp(sec, unit='s') as the reference instant."""
    t0 = int(pd.Timestamp("2026-01-05T00:00Z").timestamp())
    lines = ["time,TI_101,QI_7,FI_3"] + [f"{t0 + 60 * i},{50 + i},1,1" for i in range(4)]
    write(tmp_path, "e.csv", "\n".join(lines) + "\n")
    rec, _ = load(tmp_path, dict(TABLE, files=["e.csv"], time_column="time", time_format="epoch_s",
                                 tags={"T": "TI_101", "Q": "QI_7", "F": "FI_3"}))
    assert rec.start_utc == pd.Timestamp(t0, unit="s", tz="UTC").to_pydatetime()
    np.testing.assert_allclose(rec.outputs["T"].t, [0, 60, 120, 180])


def test_static_table_rows_are_numbered_seconds(tmp_path):
    write(tmp_path, "s.csv", "TI_101,QI_7,FI_3\n1,2,3\n4,5,6\n")
    table = {"files": ["s.csv"], "tags": {"T": "TI_101", "Q": "QI_7", "F": "FI_3"}}
    rec, _ = load(tmp_path, table)
    np.testing.assert_allclose(rec.outputs["T"].t, [0, 1])
    np.testing.assert_allclose(rec.outputs["T"].values, [1, 4])


def test_unknown_key_suggests_close_match(tmp_path):
    write(tmp_path, "log.csv", CSV)
    cfg = write(tmp_path, "cfg.toml", '[data]\nfiles = ["log.csv"]\n[data.tags.T]\ntag = "TI_101"\nunit = "degF"\n')
    table = dict(TABLE, tags=dict(TABLE["tags"], T={"tag": "TI_101", "unit": "degF"}))
    with pytest.raises(ConfigError) as exc:
        load(tmp_path, table)
    text = str(exc.value)
    assert str(cfg) in text and "[data.tags.T]" in text and "key 'unit'" in text
    assert "unknown key" in text and "did you mean 'units'?" in text
    assert ":5" in text  # the line of the key in the config file


def test_unknown_data_key_and_bad_type(tmp_path):
    write(tmp_path, "log.csv", CSV)
    with pytest.raises(ConfigError, match="did you mean 'time_column'"):
        load(tmp_path, dict(TABLE, time_colum="timestamp"))
    with pytest.raises(ConfigError, match="header_row.*must be a number"):
        load(tmp_path, dict(TABLE, header_row="one"))
    with pytest.raises(ConfigError, match="'wider' is not a valid choice"):
        load(tmp_path, dict(TABLE, layout="wider"))


def test_symbol_without_tag_is_named(tmp_path):
    write(tmp_path, "log.csv", CSV)
    tags = dict(TABLE["tags"])
    del tags["F"]
    with pytest.raises(ConfigError) as exc:
        load(tmp_path, dict(TABLE, tags=tags))
    assert "'F'" in str(exc.value) and "[data.tags]" in str(exc.value)


def test_missing_file_is_located(tmp_path):
    with pytest.raises(DataError, match="file not found"):
        load(tmp_path, dict(TABLE, files=["nope.csv"]))


def test_local_and_serial_need_a_timezone(tmp_path):
    write(tmp_path, "log.csv", CSV)
    with pytest.raises(ConfigError, match="time zone is needed"):
        load(tmp_path, dict(TABLE, time_format="local"))
    with pytest.raises(ConfigError, match="did you mean Europe/Berlin"):
        load(tmp_path, dict(TABLE, time_format="local", timezone="Europe/Berlim"))


def test_quartiles_match_numpy_percentile():
    # reference: numpy.percentile's default (linear) method, a general-purpose library
    from graybox.data.tags import quartiles

    rng = np.random.default_rng(3)
    for x in (rng.integers(0, 10**12, 1001), np.full(7, 5, np.int64), np.array([3, 1]), np.array([9]),
              (rng.normal(10, 0.5, 10_000) * 1e9).astype(np.int64)):
        np.testing.assert_allclose(quartiles(x), np.percentile(x, [25, 50, 75]), rtol=1e-15, atol=0)


def test_file_digest_in_blocks_equals_hashlib(tmp_path, monkeypatch):
    # reference: SHA-256 as specified in FIPS 180-4 through Python's hashlib on the whole
    # bytes; the known digest of "abc" is the standard's first example (value from memory)
    import hashlib

    from graybox.data import readers

    abc = tmp_path / "abc.txt"
    abc.write_bytes(b"abc")
    assert readers.file_sha256(abc) == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    big = tmp_path / "big.bin"
    big.write_bytes(np.random.default_rng(2).integers(0, 256, 100_003, dtype=np.uint8).tobytes())
    monkeypatch.setattr(readers, "_HASH_BLOCK", 4096)  # many blocks and a short last one
    assert readers.file_sha256(big) == hashlib.sha256(big.read_bytes()).hexdigest()
    empty = tmp_path / "empty.bin"
    empty.write_bytes(b"")
    assert readers.file_sha256(empty) == hashlib.sha256(b"").hexdigest()
