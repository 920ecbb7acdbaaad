"""Run-time inf/inf, 0/0 and domain edges inside a rate while fitting, through the command line.

The data are the analytic decay x(t) = exp(-0.9 t) (true k = 0.9 1/s).  Each model equals
-k x where it can be evaluated, but is not finite somewhere:

* exp(1000 k)/exp(1000 k): inf/inf for k > 0.7098 (IEEE 754 double overflow at exp(709.78),
  common practice); its derivatives overflow already from k ~ 0.7046.  The old fit replaced
  the non-finite Jacobian by zeros and reported "converged" at k = 0.7046, a wrong answer;
* a factor 1 + 1e-3 sqrt(0.8 - k): NaN for k > 0.8.  The old fit stopped at k = 0.8,
  "converged", 11% from the truth;
* (u - 1)/(u - 1) with the input u = 1 for part of the record: 0/0 from the start.

Each must end in a located error (exit 2) or an honest NOT CONVERGED, never a traceback or a
converged wrong answer.  (The reference engine: the compiled core's handling of the same
constructs is tested in tests/model/test_expr_fuzz.py.)
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from graybox.cli import main

STUDY = """[model.states.x]
units = ""
rate = "{rate}"
initial = 1.0

[model.inputs]
u = ""

[model.constants]
per_s = {{ value = 1.0, units = "1/s" }}
s = {{ value = 1.0, units = "s" }}

[parameters.k]
guess = 0.3
bounds = [0.01, 5]
units = "1/s"

[data]
files = ["d.csv"]
time_column = "t"
time_format = "elapsed"
time_units = "s"
stuck_after = "off"

[data.tags]
x = "x"
u = "u"

[estimate]
engine = "reference"

[sampling]
enabled = false
"""


def study(tmp_path: Path, rate: str, u=None) -> Path:
    t = np.arange(0.0, 10.0, 0.5)
    u = np.full(t.size, 2.0) if u is None else u
    rows = "".join(f"{a!r},{b!r},{c!r}\n" for a, b, c in zip(t.tolist(), np.exp(-0.9 * t).tolist(), u.tolist()))
    (tmp_path / "d.csv").write_text("t,x,u\n" + rows)
    path = tmp_path / "study.toml"
    path.write_text(STUDY.format(rate=rate))
    return path


def run(path: Path, out: Path, capsys) -> tuple[int, str, str]:
    code = main(["fit", str(path), "--out", str(out)])
    cap = capsys.readouterr()
    return code, cap.out, cap.err


def test_inf_over_inf_in_a_rate_is_a_located_error(tmp_path, capsys):
    path = study(tmp_path, "-k*x*(exp(k*1000/per_s)/exp(k*1000/per_s))")
    code, out, err = run(path, tmp_path / "run", capsys)
    assert code == 2, out + err
    assert "Traceback" not in err
    assert "error: the derivatives of x with respect to k = 0.70" in err
    assert "not finite" in err and "the rate of state 'x'" in err and "hint:" in err
    assert not (tmp_path / "run").exists()


def test_a_domain_edge_is_not_converged(tmp_path, capsys):
    """NaN beyond k = 0.8: the best point the optimiser can reach is not stationary, and the
    fit says so (results.json fit.converged false) instead of a converged k = 0.8."""
    path = study(tmp_path, "-k*x*(1 + 1e-3*sqrt(0.8 - k*s))")
    code, out, err = run(path, tmp_path / "run", capsys)
    assert code == 0 and "Traceback" not in err
    doc = json.loads((tmp_path / "run" / "results.json").read_text())
    assert doc["parameters"]["k"]["estimate"] == pytest.approx(0.8, abs=1e-6)  # the edge, not the truth 0.9
    assert doc["fit"]["converged"] is False
    assert "least squares: NOT CONVERGED" in out and "cannot be evaluated" in out


def test_zero_over_zero_at_the_guess_is_a_located_error(tmp_path, capsys):
    u = np.where(np.arange(20) < 10, 2.0, 1.0)
    path = study(tmp_path, "-k*x*(u - 1)/(u - 1)", u)
    code, out, err = run(path, tmp_path / "run", capsys)
    assert code == 2 and "Traceback" not in err
    assert "error: the model gives NaN or overflow at the initial guess (k = 0.3)" in err


def test_the_same_rate_rewritten_recovers_the_truth(tmp_path, capsys):
    """The control: -k x itself reaches k = 0.9 (analytic data, noise-free)."""
    path = study(tmp_path, "-k*x")
    code, out, err = run(path, tmp_path / "run", capsys)
    assert code == 0, err
    doc = json.loads((tmp_path / "run" / "results.json").read_text())
    assert doc["parameters"]["k"]["estimate"] == pytest.approx(0.9, rel=1e-6)
    assert doc["fit"]["converged"] is True
