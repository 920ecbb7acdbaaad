"""The main job end to end on the bundled demo data: `graybox demo` (least squares).

Reference: the values the demo data were generated with (datasets/storage_vessel/truth.json,
written by its generator from an exact solution of the model under held inputs)."""

import hashlib
import json
from pathlib import Path

import pytest

from graybox.cli import main

ROOT = Path(__file__).resolve().parents[1]
DATA = ROOT / "datasets" / "storage_vessel"


def digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo") / "run"
    before = {p.name: digest(p) for p in DATA.iterdir() if p.is_file()}
    code = main(["demo", "--out", str(out), "--no-sample"])
    after = {p.name: digest(p) for p in DATA.iterdir() if p.is_file()}
    return code, out, before, after


def test_demo_succeeds_and_leaves_inputs_untouched(demo_run):
    code, out, before, after = demo_run
    assert code == 0
    assert before == after
    assert sorted(p.name for p in out.iterdir()) == ["fit.png", "fitted.csv", "results.json", "study.toml", "windows.csv"]
    assert not [p for p in out.parent.iterdir() if p.name.startswith(".")]


def test_results_schema(demo_run):
    _, out, _, _ = demo_run
    doc = json.loads((out / "results.json").read_text())
    for name in ("UA", "eta"):
        p = doc["parameters"][name]
        assert set(p) >= {"estimate", "stderr", "ci95", "units", "fixed"}
        assert len(p["ci95"]) == 2 and p["fixed"] is False
    assert doc["noise"]["T"]["estimated"] is True and doc["noise"]["T"]["sigma"] > 0
    assert set(doc["fit"]) >= {"n_obs", "sse", "loglik", "aic", "bic", "converged", "message"}
    run = doc["run"]
    assert set(run) >= {"seed", "dataset", "config_sha256", "data_files", "graybox_version", "started_utc", "wall_s"}
    assert run["dataset"] == "storage_vessel"
    assert run["data_files"][0]["sha256"] == digest(DATA / "vessel_log.csv")
    assert doc["fit"]["converged"] is True


def test_intervals_contain_the_truth(demo_run):
    _, out, _, _ = demo_run
    doc = json.loads((out / "results.json").read_text())
    truth = json.loads((DATA / "truth.json").read_text())["parameters"]
    for name, value in truth.items():
        lo, hi = doc["parameters"][name]["ci95"]
        assert lo <= value <= hi, (name, value, lo, hi)
    # the estimated noise level matches the generator's sensor noise (0.08 K) within 5%
    assert doc["noise"]["T"]["sigma"] == pytest.approx(0.08, rel=0.05)
