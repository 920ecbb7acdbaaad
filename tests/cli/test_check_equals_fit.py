"""`graybox check` refuses what `graybox fit` refuses: a catalogue of bad study files, each run
through both commands, must give exit code 2 and the same first `error:` line (the study is
validated once, in graybox.study.load_study, before any data is read).

Each expected fragment is the error graybox's own rules call for (priors: the kinds and keys
documented in graybox/posterior/priors.py; sampler and estimate limits: graybox/posterior/config.py
and graybox/config.py; TOML syntax: the TOML 1.0 specification, checked by Python's tomllib).
A wrong study that either command accepted, or refused with another message, fails the test.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from graybox.cli import main

ROOT = Path(__file__).resolve().parents[2]
DEMO_CFG = ROOT / "configs" / "storage_vessel.toml"
DEMO_CSV = ROOT / "datasets" / "storage_vessel" / "vessel_log.csv"

UA = '[parameters.UA]\nguess = 10.0\nbounds = [0.5, 500.0]\nunits = "W/K"'
ETA = "[parameters.eta]\nguess = 0.8\nbounds = [0.3, 1.1]"
SAMPLING = "[sampling]\n"
NOISE = '[noise.T]\nsigma = "estimate"'
RATE = 'rate = "(eta*Q + F*cp*(T_in - T) - UA*(T - T_room)) / (M*cp)"'


def _deep(n: int) -> str:
    return "[" * n + "]" * n


# name -> (old text, new text, fragment of the first error line, extra command-line options)
CASES = {
    # issue 13: the fit needs finite bounds for the default uniform prior when it samples
    "uniform prior without bounds": (UA, '[parameters.UA]\nguess = 10.0\nunits = "W/K"', "are not both finite", ()),
    "uniform prior with one bound": (UA, '[parameters.UA]\nguess = 10.0\nlower = 0.5\nunits = "W/K"',
                                     "are not both finite", ()),
    "unknown prior kind": (ETA, ETA + '\nprior = { kind = "gamma", shape = 2 }', "'gamma' is not a valid choice", ()),
    "unknown prior kind, sampling off": (ETA, ETA + '\nprior = { kind = "gamma" }', "'gamma' is not a valid choice",
                                         ("--no-sample",)),
    "prior on a fixed parameter": (ETA, ETA + '\nfixed = true\nprior = { kind = "normal", mean = 0.8, sd = 0.1 }',
                                   "is fixed, so it cannot have a prior", ()),
    "prior centred outside the bounds": (ETA, ETA + '\nprior = { kind = "normal", mean = 5.0, sd = 0.1 }',
                                         "outside its bounds", ()),
    "prior with zero sd": (ETA, ETA + '\nprior = { kind = "normal", mean = 0.8, sd = 0 }', "sd must be positive", ()),
    "prior missing a key": (ETA, ETA + '\nprior = { kind = "lognormal", median = 0.8 }', "missing required key", ()),
    "odd walker count": (SAMPLING, SAMPLING + "walkers = 33\n", "must be even", ()),
    "walkers in the millions": (SAMPLING, SAMPLING + "walkers = 2000000\n", "must be at most 10,000", ()),
    "walkers on the command line": (SAMPLING, SAMPLING, "must be at most 10,000", ("--walkers", "3000000")),
    "no steps": (SAMPLING, SAMPLING + "max_steps = 0\n", "must be at least 1", ()),
    "chain too large": (SAMPLING, SAMPLING + "walkers = 10000\nmax_steps = 100000\n", "would not fit in memory", ()),
    "unknown sampling key": (SAMPLING, SAMPLING + "walker = 32\n", "unknown key", ()),
    "R-hat bound below one": (SAMPLING, SAMPLING + "rhat_max = 0.99\n", "must be above 1", ()),
    "unknown proposal": (SAMPLING, SAMPLING + 'moves = "walk"\n', "'walk' is not a valid choice", ()),
    "multistart in the millions": ("[data]", "[estimate]\nmultistart = 5000000\n\n[data]", "must be at most 10,000", ()),
    "multistart without bounds": (UA, '[parameters.UA]\nguess = 10.0\nunits = "W/K"\n\n[estimate]\nmultistart = 4',
                                  "multi-start needs finite bounds", ("--no-sample",)),
    "too few evaluations": ("[data]", "[estimate]\nmax_evaluations = 5\n\n[data]", "must be at least 10", ()),
    "unknown integrator": ("[data]", '[estimate]\nintegrator = "euler"\n\n[data]', "'euler' is not a valid choice", ()),
    "AR(1) phi of one": (NOISE, NOISE + '\nkind = "ar1"\nphi = 1.0', "phi must be in [0, 1)", ()),
    "noise option of another kind": (NOISE, NOISE + "\ndof = 4", "does not apply", ()),
    "bad noise time constant": (NOISE, NOISE + '\nkind = "ar1"\nerror_time_constant = "ten minutes"',
                                "is not a duration", ()),
    "unknown noise kind": (NOISE, NOISE + '\nkind = "laplace"', "'laplace' is not a valid choice", ()),
    "seed beyond 64 bits": ("seed = 20261202", "seed = 99999999999999999999999", "must fit in 64 bits", ()),
    "unknown top-level table": ("[data]", "[fitting]\nx = 1\n\n[data]", "unknown key", ()),
    "TOML syntax error": (RATE, RATE + "\n" + RATE, "TOML syntax error", ()),
    "arrays nested thousands deep": ("[data]", f"[study2]\nx = {_deep(3000)}\n\n[data]", "nested more than 32", ()),
    "inline tables nested thousands deep": ("[data]", "[study2]\nx = " + "{a = " * 3000 + "1" + "}" * 3000
                                            + "\n\n[data]", "nested more than 32", ()),
    "misspelt model symbol": (RATE, RATE.replace("T_room", "T_rom"), "'T_rom' is not defined", ()),
    # issue 13 section 3: free values no output depends on, and noise groups (graybox/config.py)
    "unused free parameter": (UA, UA + "\n\n[parameters.spare]\nguess = 1.0\nbounds = [0.1, 10.0]",
                              "parameter 'spare' is free, but no measured output depends on it", ()),
    "estimated initial state no output sees": (
        "initial_bounds = [0.0, 100.0]",
        'initial_bounds = [0.0, 100.0]\n\n[model.states.spare]\nunits = "K"\nrate = "-spare*UA/(M*cp)"\n'
        'initial = "estimate"\n\n[model.outputs.T]\nexpr = "T"',
        "the initial value of state 'spare' is to be estimated", ()),
    "noise group of one output": (NOISE, NOISE + '\n\n[noise.groups]\nalone = ["T"]', "names 1 output(s)", ()),
    "noise group naming an unknown output": (NOISE, NOISE + '\n\n[noise.groups]\npair = ["T", "T_vessel"]',
                                             "'T_vessel' is not a measured output", ()),
    "noise group that is not a list": (NOISE, NOISE + '\n\n[noise.groups]\npair = "T"',
                                       "a noise group is a list of output names", ()),
}


def write_case(tmp_path: Path, old: str, new: str) -> Path:
    text = DEMO_CFG.read_text().replace("../datasets/storage_vessel/vessel_log.csv", DEMO_CSV.as_posix())
    assert old in text, old
    path = tmp_path / "study.toml"
    path.write_text(text.replace(old, new, 1))
    return path


def first_error_line(err: str) -> str:
    lines = [line for line in err.splitlines() if line.startswith("error: ")]
    assert lines, err
    return lines[0]


@pytest.mark.parametrize("case", sorted(CASES))
def test_check_refuses_what_fit_refuses(case, tmp_path, capsys):
    old, new, fragment, options = CASES[case]
    study = write_case(tmp_path, old, new)
    before = study.read_bytes()
    code_check = main(["check", str(study), *options])
    err_check = capsys.readouterr().err
    out = tmp_path / "run"
    code_fit = main(["fit", str(study), "--out", str(out), *options])
    err_fit = capsys.readouterr().err
    assert code_check == 2, err_check
    assert code_fit == 2, err_fit
    assert "Traceback" not in err_check + err_fit
    assert first_error_line(err_check) == first_error_line(err_fit)
    assert fragment in err_check, err_check
    assert not out.exists() and not [p for p in tmp_path.iterdir() if p.name.startswith(".run")]
    assert study.read_bytes() == before  # inputs are never modified


def test_no_sample_lets_a_uniform_prior_without_bounds_pass_the_study_checks(tmp_path):
    """With sampling off, the finite-bounds rule of the default uniform prior does not apply
    (least squares needs no prior): the study loads, and check says sampling is off."""
    from graybox.study import load_study
    from graybox.posterior.priors import KIND_FLAT

    study = write_case(tmp_path, UA, '[parameters.UA]\nguess = 10.0\nunits = "W/K"')
    loaded = load_study(study, sample=False)
    assert not loaded.sampler.enabled and loaded.priors["UA"].kind == KIND_FLAT
    assert load_study(study, sample=False, sampler_options={"walkers": 64}).sampler.walkers == 64


def test_check_says_whether_it_checked_for_sampling(tmp_path, capsys):
    """check names the sampling decision it judged the study under (issue 13)."""
    from graybox.workflow import sampling_text
    from graybox.study import load_study

    study = write_case(tmp_path, SAMPLING, SAMPLING)
    assert sampling_text(load_study(study), None).startswith("sampling: on (the study's [sampling] enabled")
    assert sampling_text(load_study(study, sample=False), False).startswith("sampling: off (--no-sample)")
