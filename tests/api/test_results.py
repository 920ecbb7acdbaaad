"""Results that show themselves: the text, the document and the tables of a fit and of its
posterior are those of the run folder the command line writes.

References: `graybox fit` on the demo study (its printed text, results.json and
samples.npz: the documented contract of README's "The run folder" and DEVELOPERS.md's
results.json keys); HTML escaping is checked against Python's html.escape rules (the five
characters & < > " ' never appear raw in text)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

import graybox
from graybox.cli import main
from graybox.errors import GrayboxError

ROOT = Path(__file__).resolve().parents[2]
CFG = ROOT / "configs" / "storage_vessel.toml"
STEPS = 300  # a short chain: these tests are about the objects, not convergence


def keys(doc, prefix=""):
    """Every key path of a nested dict (lists of dicts by their first item)."""
    out = set()
    for k, v in doc.items():
        out.add(prefix + k)
        if isinstance(v, dict):
            out |= keys(v, prefix + k + ".")
    return out


def run_cli(out: Path, *options: str) -> tuple[str, dict]:
    import contextlib
    import io

    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        assert main(["fit", str(CFG), "--out", str(out), *options]) == 0
    return buf.getvalue(), json.loads((out / "results.json").read_text())


@pytest.fixture(scope="module")
def cli(tmp_path_factory):
    """`graybox fit` with sampling (a short chain), and without."""
    folder = tmp_path_factory.mktemp("cli")
    text, doc = run_cli(folder / "run", "--max-steps", str(STEPS))
    _, least_squares = run_cli(folder / "ls", "--no-sample")
    return text, doc, least_squares


@pytest.fixture(scope="module")
def api():
    study = graybox.load_study(CFG, sampler_options={"max_steps": STEPS})
    fitted = graybox.fit(study)
    return fitted, fitted.sample()


def test_summaries_are_the_printed_text(cli, api):
    text, _, _ = cli
    fitted, posterior = api
    assert fitted.summary() in text and posterior.summary().split("\n", 1)[1] in text
    assert repr(fitted).startswith(fitted.summary()) and repr(posterior) == posterior.summary()


def test_to_dict_has_the_keys_of_results_json(cli, api):
    """Every key of results.json but the writing stage's time, which only writing adds."""
    _, doc, least_squares = cli
    fitted, posterior = api
    assert keys(posterior.to_dict()) == keys(doc) - {"run.stages.writing_s"}
    assert keys(fitted.to_dict()) == keys(least_squares) - {"run.stages.writing_s"}
    same = posterior.to_dict()
    for name, p in doc["parameters"].items():
        assert same["parameters"][name]["estimate"] == p["estimate"]
        assert same["parameters"][name]["posterior"]["ci95"] == p["posterior"]["ci95"]
    assert same["sampler"]["steps"] == doc["sampler"]["steps"]
    assert fitted.to_dict()["fit"] == least_squares["fit"]


def test_to_frame_holds_the_document_values(api):
    fitted, posterior = api
    doc = posterior.to_dict()
    frame = posterior.to_frame()
    assert list(frame.index) == list(doc["parameters"])
    for name, p in doc["parameters"].items():
        row = frame.loc[name]
        assert (row.estimate, row.stderr, row.ci95_lo, row.ci95_hi) == (p["estimate"], p["stderr"], *p["ci95"])
        assert (row.posterior_ci95_lo, row.posterior_ci95_hi) == tuple(p["posterior"]["ci95"])
        assert row.posterior_median == p["posterior"]["median"]
    assert "posterior_median" not in fitted.to_frame().columns
    assert fitted.to_frame()[["estimate", "stderr"]].equals(frame[["estimate", "stderr"]])


def test_draws_are_the_kept_chain_with_names(tmp_path, api):
    _, posterior = api
    assert graybox.write_run(tmp_path / "run", posterior) == tmp_path / "run"
    saved = np.load(tmp_path / "run" / "samples.npz")
    burn, thin = int(saved["burn_in"]), int(saved["thin"])
    kept = saved["chain"][:, burn::thin, :].reshape(-1, saved["chain"].shape[2])
    values, names = posterior.draws_array()
    assert names == list(saved["names"]) and np.array_equal(values, kept)
    frame = posterior.draws()
    assert list(frame.columns) == names and np.array_equal(frame.to_numpy(), kept)
    free, free_names = posterior.draws_array(include_noise=False)
    assert free_names == names[:int(saved["n_free"])] and np.array_equal(free, kept[:, :int(saved["n_free"])])
    written = json.loads((tmp_path / "run" / "results.json").read_text())
    assert keys(written) >= keys(posterior.to_dict())


def test_html_escapes_every_text(tmp_path):
    study = graybox.Study.from_file(CFG, overrides={"study": {"name": "<b>tank</b> & \"co\" 'x'"}})
    fitted = graybox.fit(study)
    page = fitted._repr_html_()
    assert "<b>tank" not in page and "&lt;b&gt;tank&lt;/b&gt; &amp; &quot;co&quot; &#x27;x&#x27;" in page
    for raw in ("<b>", "& \"", "'x'"):
        assert raw not in page
    assert page.count("<tr>") == 1 + len(fitted.parameters)
    assert "&lt;b&gt;" in graybox.check(study)._repr_html_()


def test_sample_keywords_are_checked_like_the_study_keys(api):
    fitted, _ = api
    with pytest.raises(GrayboxError, match="must be even") as err:
        fitted.sample(walkers=33)
    assert "sample() keyword walkers" in str(err.value)


def test_a_notebook_user_sees_that_the_data_layer_warned():
    """An output with a 2 h hole (a gap over the default 15 min limit, graybox's documented
    default in graybox/data/config.py): the repr and the HTML of the fit say so, although a
    notebook user sees no data report.  Invented first-order lag, y = K u (1 - exp(-t/tau))."""
    import numpy as np
    import pandas as pd

    t = np.arange(0.0, 6 * 3600.0, 60.0)
    u = np.where(t >= 1800.0, 2.0, 1.0)
    y = 2.0 * u - 2.0 * (u - 1.0) * np.exp(-np.clip(t - 1800.0, 0, None) / 600.0)  # K = 2, tau = 600 s
    y = y + np.random.default_rng(1).normal(0.0, 0.01, t.size)
    keep = ~((t >= 7200.0) & (t < 14400.0))
    frame = pd.DataFrame({"time": t[keep], "u": u[keep], "y": y[keep]})
    study = graybox.Study.from_values(
        model={"states": {"x": {"units": "", "rate": "(K*u - x)/tau", "initial": "measured"}},
               "inputs": {"u": ""}, "outputs": {"y": {"expr": "x"}}},
        parameters={"K": {"guess": 1.5, "bounds": [0.1, 10.0]}, "tau": {"guess": 300.0, "bounds": [1.0, 1e4], "units": "s"}},
        data={"files": [frame], "time_column": "time", "time_format": "elapsed", "time_units": "s",
              "tags": {"u": "u", "y": "y"}},
        sampling={"enabled": False})
    fitted = graybox.fit(study)
    assert any("no usable observation for 2.02 h" in w for w in fitted.data_warnings), fitted.data_warnings
    assert repr(fitted).startswith(fitted.summary())
    assert repr(fitted).endswith(f"data: {len(fitted.data_warnings)} warning(s) from loading the data: "
                                 "data_summary() shows them")
    assert "no usable observation for 2.02 h" in fitted._repr_html_()
    assert fitted.parameters["K"].estimate == pytest.approx(2.0, rel=0.01)
