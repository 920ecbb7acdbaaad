"""Bad input through the command line: each gives exit code 2, one located `error:` message,
no traceback, and no run folder (finished or half-written) left behind."""

import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from graybox.cli import main

ROOT = Path(__file__).resolve().parents[2]
DEMO_CFG = ROOT / "configs" / "storage_vessel.toml"
DEMO_CSV = ROOT / "datasets" / "storage_vessel" / "vessel_log.csv"


@pytest.fixture
def study(tmp_path):
    """A copy of the demo study pointing at a copy of its data, to be edited per case."""
    shutil.copy(DEMO_CSV, tmp_path / "vessel_log.csv")
    text = DEMO_CFG.read_text().replace("../datasets/storage_vessel/vessel_log.csv", "vessel_log.csv")
    path = tmp_path / "study.toml"
    path.write_text(text)
    return path


def run_fit(path, tmp_path, capsys):
    out = tmp_path / "run"
    code = main(["fit", str(path), "--out", str(out), "--no-sample"])
    err = capsys.readouterr().err
    leftovers = [p.name for p in tmp_path.iterdir() if p.name.startswith(".run")]
    return code, err, out, leftovers


def edit(path, old, new, count=1):
    text = path.read_text()
    assert old in text, old
    path.write_text(text.replace(old, new, count))


RATE = 'rate = "(eta*Q + F*cp*(T_in - T) - UA*(T - T_room)) / (M*cp)"'

CASES = {
    "misspelt symbol": (RATE, RATE.replace("T_room", "T_rom"), "'T_rom' is not defined"),
    "state with no equation": (RATE, "", "has no rate equation"),
    "state with two equations": (RATE, RATE + "\n" + RATE, "TOML syntax error"),
    "circular derived quantities": ("[model.constants]", '[model.derived]\na = "b*2"\nb = "a/2"\n\n[model.constants]',
                                    "circle"),
    "attribute access": (RATE, RATE.replace("eta*Q", "eta.real*Q"), "attribute access is not allowed"),
    "import": (RATE, RATE.replace("eta*Q", "__import__('os')*Q"), "underscore"),
    "lambda": (RATE, RATE.replace("eta*Q", "(lambda: eta)()*Q"), "listed math functions"),
    "unknown function": (RATE, RATE.replace("eta*Q", "sigmoid(eta)*Q"), "unknown function 'sigmoid'"),
    "dimensionally inconsistent": ('Q = "W"', 'Q = "kW"', "factor 1000"),
    "guess outside bounds": ("guess = 10.0", "guess = 1000.0", "outside its bounds"),
    "unknown key": ("[parameters.eta]\nguess", "[parameters.eta]\ngues = 1\nguess", "did you mean 'guess'"),
    "missing data column": ('tag = "TT303_mains_temp"', 'tag = "TT303_mains_tmp"', "TT303_mains_temp"),
    "nan at the initial guess": (RATE, RATE.replace("eta*Q", "log(eta - 2)*Q"), "initial guess (UA = 10, eta = 0.8, T0[main:1] = 54.966"),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_bad_study(case, study, tmp_path, capsys):
    old, new, fragment = CASES[case]
    edit(study, old, new)
    code, err, out, leftovers = run_fit(study, tmp_path, capsys)
    assert code == 2, err
    assert err.startswith("error: ")
    assert fragment in err
    assert "Traceback" not in err
    assert not out.exists() and leftovers == []


def test_non_numeric_data_names_the_line(study, tmp_path, capsys):
    csv = tmp_path / "vessel_log.csv"
    lines = csv.read_text().splitlines()
    cells = lines[100].split(",")
    cells[3] = "12,5kW" if False else "twelve"
    lines[100] = ",".join(cells)
    csv.write_text("\n".join(lines) + "\n")
    before = csv.read_bytes()
    code, err, out, leftovers = run_fit(study, tmp_path, capsys)
    assert code == 2 and "line 101" in err and "twelve" in err, err
    assert not out.exists() and leftovers == []
    assert csv.read_bytes() == before  # inputs are never modified


def test_existing_run_folder_is_refused(study, tmp_path, capsys):
    (tmp_path / "run").mkdir()
    code, err, _, _ = run_fit(study, tmp_path, capsys)
    assert code == 2 and "already exists" in err and "--force" in err


def test_missing_study_file(tmp_path, capsys):
    code = main(["fit", str(tmp_path / "nope.toml"), "--out", str(tmp_path / "run")])
    assert code == 2 and "config file not found" in capsys.readouterr().err


def test_console_script_exit_codes(tmp_path):
    """The installed entry point: a user error is exit 2 with no traceback."""
    proc = subprocess.run([sys.executable, "-m", "graybox.cli", "fit", str(tmp_path / "x.toml"), "--out",
                           str(tmp_path / "r")], capture_output=True, text=True)
    assert proc.returncode == 2 and proc.stderr.startswith("error:") and "Traceback" not in proc.stderr
    proc = subprocess.run([sys.executable, "-m", "graybox.cli", "frobnicate"], capture_output=True, text=True)
    assert proc.returncode == 2 and "error:" in proc.stderr
