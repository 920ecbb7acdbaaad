"""Held-out validation: the last quarter of the demo record is predicted with the parameters
fitted on the first three quarters, without refitting.

Reference: the demo generator's sensor noise (0.08 K, datasets/storage_vessel/generate.py):
with the right model structure the held-out RMSE equals the noise level, and the bias is
far below it."""

import json

import pytest

from graybox.workflow import demo_paths, fit_study


def test_holdout_is_predicted_at_the_noise_level(tmp_path):
    cfg, _ = demo_paths()
    doc = fit_study(cfg, tmp_path / "run", echo=lambda _m: None, sample=False, overrides={"data": {"holdout": 0.25}})
    val = doc["validation"]["main:validation"]["T"]
    assert val["n_obs"] > 900
    assert val["rmse"] == pytest.approx(0.08, rel=0.08)
    assert abs(val["bias"]) < 0.01
    assert (tmp_path / "run" / "validation.csv").is_file()
    saved = json.loads((tmp_path / "run" / "results.json").read_text())
    assert saved["validation"] == doc["validation"]
    # the fit used only the first part
    assert doc["fit"]["n_obs"] < 3400
