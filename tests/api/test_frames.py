"""DataFrames read as files: the same checks, conversions and messages.

References: graybox's own CSV path on the same data (README "Historian data": the rules for
cells without a value and for text that is not a number), and pandas' own parsing of the ISO
8601 stamps with their offsets (pandas.to_datetime, utc=True) for a frame indexed by time."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import graybox
from graybox.errors import DataError

ROOT = Path(__file__).resolve().parents[2]
CFG = ROOT / "configs" / "storage_vessel.toml"
CSV = ROOT / "datasets" / "storage_vessel" / "vessel_log.csv"


@pytest.fixture(scope="module")
def reference():
    return graybox.fit(graybox.load_study(CFG))


def test_a_cell_that_is_not_a_number_names_the_frame_row_and_column():
    log = pd.read_csv(CSV, dtype={"JQ301_heater_kW": str})
    log.loc[100, "JQ301_heater_kW"] = "twelve"
    with pytest.raises(DataError) as err:
        graybox.fit(graybox.Study.from_file(CFG, data=log))
    assert "'twelve' is not a number" in str(err.value)
    assert "DataFrame data.files[0] iloc 100 column 'JQ301_heater_kW'" in str(err.value)


def test_text_columns_read_as_a_csv_file_is(reference):
    """Every column as text, blanks as empty strings: no_value texts make them cells without a value."""
    log = pd.read_csv(CSV, dtype=str, keep_default_na=False)
    assert (log["JQ301_heater_kW"] == "").any()  # exception logging leaves cells empty
    fitted = graybox.fit(graybox.Study.from_file(CFG, data=log))
    assert np.array_equal(fitted.estimate.x, reference.estimate.x)


def test_a_time_index_with_offsets_gives_the_same_fit(reference):
    log = pd.read_csv(CSV)
    log = log.set_index(pd.DatetimeIndex(pd.to_datetime(log.pop("timestamp"), utc=True), name="timestamp"))
    fitted = graybox.fit(graybox.Study.from_file(CFG, data=log))
    assert np.array_equal(fitted.estimate.x, reference.estimate.x)
    rep, ref = fitted.reports["main"], reference.reports["main"]
    assert (rep.start_utc, rep.end_utc) == (ref.start_utc, ref.end_utc)


def test_an_unnamed_time_index_is_a_clear_error():
    log = pd.read_csv(CSV)
    log.index = pd.DatetimeIndex(pd.to_datetime(log.pop("timestamp"), utc=True))
    log = log.rename_axis(None)
    with pytest.raises(DataError, match="its time stamps are in its index, which has no name") as err:
        graybox.fit(graybox.Study.from_file(CFG, data=log))
    assert 'rename_axis("timestamp")' in str(err.value)


def test_two_frames_feed_one_experiment_as_two_files_do(reference):
    log = pd.read_csv(CSV)
    half = len(log) // 2
    fitted = graybox.fit(graybox.Study.from_file(CFG, data=[log.iloc[:half], log.iloc[half:]]))
    assert np.array_equal(fitted.estimate.x, reference.estimate.x)
    assert [s["path"] for s in fitted.reports["main"].sources] == ["DataFrame data.files[0]",
                                                                    "DataFrame data.files[1]"]


def test_the_run_record_digest_follows_the_values():
    log = pd.read_csv(CSV)
    one = graybox.load_study(CFG, data=log).experiments["main"].files[0].sha256()
    assert one == graybox.load_study(CFG, data=log.copy()).experiments["main"].files[0].sha256()
    log.loc[5, "TT301_vessel_temp"] += 1e-9
    assert graybox.load_study(CFG, data=log).experiments["main"].files[0].sha256() != one
