"""A study written as Python values is the study file's tables as dicts: checked by the same
rules, fitted to the same numbers, and written to its run folder as TOML that reads back to
the same tables.

References: the demo study file itself (its tables as Python's tomllib reads them, TOML 1.0)
and its fit through the file; tomllib for the written study.toml."""

from __future__ import annotations

import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import graybox
from graybox.errors import ConfigError, DataError

ROOT = Path(__file__).resolve().parents[2]
CFG = ROOT / "configs" / "storage_vessel.toml"
CSV = ROOT / "datasets" / "storage_vessel" / "vessel_log.csv"


def demo_tables() -> dict:
    return tomllib.loads(CFG.read_text(encoding="utf-8"))


def values_study(tables: dict, **changes):
    data = dict(tables["data"], files=[pd.read_csv(CSV)])
    kwargs = dict(model=tables["model"], parameters=tables["parameters"], data=data, noise=tables["noise"],
                  sampling=tables["sampling"], name=tables["study"]["name"], seed=tables["study"]["seed"],
                  dataset=tables["study"]["dataset"])
    kwargs.update(changes)
    return graybox.Study.from_values(**kwargs)


def test_values_fit_as_the_file_does(tmp_path):
    tables = demo_tables()
    study = values_study(tables)
    assert study.path is None and study.seed == tables["study"]["seed"]
    fitted = graybox.fit(study)
    reference = graybox.fit(graybox.load_study(CFG))
    assert np.array_equal(fitted.estimate.x, reference.estimate.x)
    assert fitted.to_dict()["run"]["config"] is None
    out = graybox.write_run(tmp_path / "run", fitted)
    written = tomllib.loads((out / "study.toml").read_text(encoding="utf-8"))
    files = written["data"].pop("files")
    assert len(files) == 1 and files[0].startswith("<pandas DataFrame, 4492 rows x 7 columns")
    tables["data"].pop("files")
    assert written == tables


def test_a_dataframe_with_the_tables_of_one_experiment():
    """data= a DataFrame beside experiments= the tables: the frame feeds the one experiment."""
    tables = demo_tables()
    table = dict(tables["data"])
    table.pop("files")
    study = graybox.Study.from_values(model=tables["model"], parameters=tables["parameters"],
                                      experiments={"vessel": table}, data=pd.read_csv(CSV), sample=False)
    assert list(study.experiments) == ["vessel"] and not study.sampler.enabled
    assert str(study.experiments["vessel"].files[0]) == "DataFrame experiments.vessel.files[0]"


def test_values_errors_are_located_by_table_and_key():
    tables = demo_tables()
    params = {**tables["parameters"], "UA": {"gues": 10.0, "bounds": [0.5, 500.0], "units": "W/K"}}
    with pytest.raises(ConfigError) as err:
        values_study(tables, parameters=params)
    assert "[parameters.UA] key 'gues'" in str(err.value) and "did you mean 'guess'" in str(err.value)
    with pytest.raises(ConfigError, match="unknown key"):
        values_study(tables, estimate={"multistarts": 3})


def test_frames_and_paths_are_not_mixed():
    tables = demo_tables()
    data = dict(tables["data"], files=[pd.read_csv(CSV), str(CSV)])
    with pytest.raises(ConfigError, match="among pandas DataFrames"):
        values_study(tables, data=data)


def test_a_frame_without_a_needed_column_names_the_frame_and_the_column():
    tables = demo_tables()
    log = pd.read_csv(CSV).rename(columns={"TT303_mains_temp": "TT303_mains_tmp"})
    with pytest.raises(DataError) as err:
        graybox.fit(graybox.Study.from_file(CFG, data=log))
    text = str(err.value)
    assert "DataFrame data.files[0]" in text and "TT303_mains_temp" in text and "TT303_mains_tmp" in text
