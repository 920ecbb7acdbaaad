"""The README's five-line fit from a DataFrame (section "From Python") gives the demo's
numbers.

References: the demo's own run through the command line on the study file and its CSV
(`graybox fit`, what README's Quick start runs), which the DataFrame path must reproduce to
1e-10 relative (the same data read by pandas instead of graybox's CSV reader, then the same
checks and conversions); and the values the demo data were generated with
(datasets/storage_vessel/truth.json and the generator's sensor noise of 0.08 K,
datasets/storage_vessel/generate.py), which the 95% intervals must contain."""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import graybox
from graybox.cli import main

ROOT = Path(__file__).resolve().parents[2]
CFG = ROOT / "configs" / "storage_vessel.toml"
CSV = ROOT / "datasets" / "storage_vessel" / "vessel_log.csv"
REL = 1e-10


def readme_example() -> str:
    """The Python block of README.md's "From Python" section."""
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text.split("## From Python", 1)[1].split("\n## ", 1)[0]
    blocks = re.findall(r"```python\n(.*?)```", section, re.DOTALL)
    assert len(blocks) == 1, "the section shows one Python block"
    return blocks[0]


@pytest.fixture(scope="module")
def cli_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("cli") / "run"
    assert main(["fit", str(CFG), "--out", str(out), "--no-sample"]) == 0
    return json.loads((out / "results.json").read_text())


@pytest.fixture(scope="module")
def five_lines():
    """Run the README's block as written, from the top folder; returns its names."""
    code = readme_example()
    assert len(code.strip().splitlines()) == 5
    import os

    here = os.getcwd()
    os.chdir(ROOT)
    try:
        names: dict = {}
        exec(compile(code, "README.md", "exec"), names)  # noqa: S102 - the README's own example
    finally:
        os.chdir(here)
    return names


def test_the_readme_block_fits_from_a_dataframe(five_lines, capsys):
    result = five_lines["result"]
    assert isinstance(five_lines["log"], pd.DataFrame)
    assert isinstance(result, graybox.StudyFit)
    assert result.to_dict()["run"]["data_files"][0]["path"] == "DataFrame data.files[0]"


def test_the_dataframe_fit_gives_the_demo_numbers(five_lines, cli_run):
    doc = five_lines["result"].to_dict()
    for name, ref in cli_run["parameters"].items():
        p = doc["parameters"][name]
        assert p["estimate"] == pytest.approx(ref["estimate"], rel=REL), name
        assert p["stderr"] == pytest.approx(ref["stderr"], rel=REL), name
        assert p["ci95"] == pytest.approx(ref["ci95"], rel=REL), name
    assert doc["noise"]["T"]["sigma"] == pytest.approx(cli_run["noise"]["T"]["sigma"], rel=REL)
    for key in ("sse", "loglik", "aic", "bic", "weighted_sse"):
        assert doc["fit"][key] == pytest.approx(cli_run["fit"][key], rel=REL), key
    assert doc["fit"]["n_obs"] == cli_run["fit"]["n_obs"]


def test_the_dataframe_fit_contains_the_generating_values(five_lines):
    doc = five_lines["result"].to_dict()
    truth = json.loads((CSV.parent / "truth.json").read_text())["parameters"]
    for name, value in truth.items():
        lo, hi = doc["parameters"][name]["ci95"]
        assert lo <= value <= hi, (name, value, lo, hi)
    assert doc["noise"]["T"]["sigma"] == pytest.approx(0.08, rel=0.05)


def test_file_path_and_dataframe_path_are_identical(five_lines):
    """The same study through graybox's CSV reader and through a DataFrame: every number of
    the fit and of the data report is the same float (only the source's name and digest
    differ)."""
    frame_fit = five_lines["result"]
    file_fit = graybox.fit(graybox.load_study(CFG))
    a, b = frame_fit.estimate, file_fit.estimate
    assert np.array_equal(a.x, b.x) and a.sse == b.sse and a.sigmas == b.sigmas
    assert np.array_equal(a.covariance, b.covariance)
    assert {n: p.to_dict() for n, p in a.parameters.items()} == {n: p.to_dict() for n, p in b.parameters.items()}
    ra, rb = frame_fit.to_dict()["data"]["main"], file_fit.to_dict()["data"]["main"]
    for rep in (ra, rb):
        rep.pop("sources")
        for tag in rep["tags"]:
            tag.pop("files")
    assert ra == rb
    assert [w.to_dict() for w in frame_fit.windows] == [w.to_dict() for w in file_fit.windows]


def test_the_frame_is_not_modified_and_later_changes_do_not_reach_the_study():
    log = pd.read_csv(CSV)
    before = log.copy(deep=True)
    study = graybox.Study.from_file(CFG, data=log)
    pd.testing.assert_frame_equal(log, before)
    log.loc[:, "TT301_vessel_temp"] = 0.0  # the caller edits its frame afterwards
    fitted = graybox.fit(study)
    reference = graybox.fit(graybox.load_study(CFG))
    assert np.array_equal(fitted.estimate.x, reference.estimate.x)
