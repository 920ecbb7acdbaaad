"""NIST StRD nonlinear-regression problems: reading the .dat files, writing graybox studies,
scoring the estimates.

Source: NIST Information Technology Laboratory, Statistical Reference Datasets (StRD),
nonlinear regression problems (files in ``tests/reference/nist_strd/``, public domain).

Each file holds a header (model, two certified starting points, certified parameter values
and standard deviations, certified residual sum of squares) and the data.  The model
formulas are written here as graybox expressions, transcribed from each header (brackets
become parentheses, ``arctan`` becomes ``atan``); the header's own text is kept in
``NistProblem.model_text`` so a reader can compare the two.

The score is the log relative error, LRE = -log10(|estimate - certified| / |certified|),
capped at the number of certified significant digits (11 for these files): the measure of
McCullough, B. D. (1999), "Assessing the reliability of statistical software: Part II",
The American Statistician 53(2), 149-159, and of NIST's own assessments.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

REFERENCE_DIR = Path(__file__).resolve().parents[1] / "reference" / "nist_strd"
CERTIFIED_DIGITS = 11  # NIST reports 11 significant digits for these problems

# graybox expressions, transcribed from each file's "Model:" section.
MODELS: dict[str, str] = {
    "Misra1a": "b1*(1 - exp(-b2*x))",
    "Chwirut2": "exp(-b1*x)/(b2 + b3*x)",
    "Chwirut1": "exp(-b1*x)/(b2 + b3*x)",
    "Lanczos3": "b1*exp(-b2*x) + b3*exp(-b4*x) + b5*exp(-b6*x)",
    "Gauss1": "b1*exp(-b2*x) + b3*exp(-(x - b4)**2/b5**2) + b6*exp(-(x - b7)**2/b8**2)",
    "Gauss2": "b1*exp(-b2*x) + b3*exp(-(x - b4)**2/b5**2) + b6*exp(-(x - b7)**2/b8**2)",
    "DanWood": "b1*x**b2",
    "Misra1b": "b1*(1 - (1 + b2*x/2)**(-2))",
    "Kirby2": "(b1 + b2*x + b3*x**2)/(1 + b4*x + b5*x**2)",
    "Hahn1": "(b1 + b2*x + b3*x**2 + b4*x**3)/(1 + b5*x + b6*x**2 + b7*x**3)",
    "Nelson": "b1 - b2*x1*exp(-b3*x2)",  # response log(y)
    "MGH17": "b1 + b2*exp(-x*b4) + b3*exp(-x*b5)",
    "Lanczos1": "b1*exp(-b2*x) + b3*exp(-b4*x) + b5*exp(-b6*x)",
    "Lanczos2": "b1*exp(-b2*x) + b3*exp(-b4*x) + b5*exp(-b6*x)",
    "Gauss3": "b1*exp(-b2*x) + b3*exp(-(x - b4)**2/b5**2) + b6*exp(-(x - b7)**2/b8**2)",
    "Misra1c": "b1*(1 - (1 + 2*b2*x)**(-0.5))",
    "Misra1d": "b1*b2*x*((1 + b2*x)**(-1))",
    "Roszman1": "b1 - b2*x - atan(b3/(x - b4))/pi",
    "ENSO": ("b1 + b2*cos(2*pi*x/12) + b3*sin(2*pi*x/12) + b5*cos(2*pi*x/b4) + b6*sin(2*pi*x/b4)"
             " + b8*cos(2*pi*x/b7) + b9*sin(2*pi*x/b7)"),
    "MGH09": "b1*(x**2 + x*b2)/(x**2 + x*b3 + b4)",
    "Thurber": "(b1 + b2*x + b3*x**2 + b4*x**3)/(1 + b5*x + b6*x**2 + b7*x**3)",
    "BoxBOD": "b1*(1 - exp(-b2*x))",
    "Rat42": "b1/(1 + exp(b2 - b3*x))",
    "MGH10": "b1*exp(b2/(x + b3))",
    "Eckerle4": "(b1/b2)*exp(-0.5*((x - b3)/b2)**2)",
    "Rat43": "b1/((1 + exp(b2 - b3*x))**(1/b4))",
    "Bennett5": "b1*(b2 + x)**(-1/b3)",
}

# Listed by level of difficulty (lower, average, higher), as in the issue.
ALL_NAMES: tuple[str, ...] = tuple(MODELS)

# Responses NIST fits after a transformation of the data column (as published in the header).
LOG_RESPONSE = {"Nelson"}

_NUMBER = r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?"


@dataclass(frozen=True)
class NistProblem:
    """One StRD problem as published."""

    name: str
    difficulty: str  # "lower", "average", "higher"
    model_text: str  # the header's own model lines
    expr: str  # the graybox expression of the model
    parameters: tuple[str, ...]
    starts: tuple[tuple[float, ...], tuple[float, ...]]
    certified: tuple[float, ...]
    certified_sd: tuple[float, ...]
    certified_sse: float
    certified_residual_sd: float
    dof: int
    predictors: tuple[str, ...]  # column names of the predictors in the file (x or x1, x2)
    y: np.ndarray  # the response as NIST fits it (log(y) for Nelson)
    X: dict[str, np.ndarray]  # predictor columns

    @property
    def n(self) -> int:
        return int(self.y.size)

    @property
    def response(self) -> str:
        """The name of the fitted response column: ``y``, or ``log_y`` for a log response."""
        return "log_y" if self.name in LOG_RESPONSE else "y"


def available() -> list[str]:
    """The StRD problems whose .dat file is present, in NIST order."""
    return [n for n in ALL_NAMES if (REFERENCE_DIR / f"{n}.dat").exists()]


def missing() -> list[str]:
    """The StRD problems whose .dat file is not present."""
    return [n for n in ALL_NAMES if not (REFERENCE_DIR / f"{n}.dat").exists()]


def _line_range(lines: list[str], label: str) -> tuple[int, int]:
    """The 1-based inclusive line range the header gives for ``label`` (e.g. "Data")."""
    for line in lines[:15]:
        m = re.search(label + r"\s*\(lines\s+(\d+)\s+to\s+(\d+)\)", line)
        if m:
            return int(m.group(1)), int(m.group(2))
    raise ValueError(f"no '{label} (lines a to b)' entry in the header")


def _difficulty(lines: list[str]) -> str:
    for line in lines[:60]:
        m = re.search(r"(Lower|Average|Higher) Level of Difficulty", line)
        if m:
            return m.group(1).lower()
    raise ValueError("no level of difficulty in the header")


def _model_text(lines: list[str]) -> str:
    start = next(i for i, line in enumerate(lines) if line.startswith("Model:"))
    body = []
    for line in lines[start + 2:start + 10]:
        if "Starting" in line:
            break
        if line.strip():
            body.append(line.strip())
    return " ".join(body)


def _certified_value(lines: list[str], label: str) -> float:
    for line in lines[:60]:
        if line.strip().startswith(label):
            return float(re.findall(_NUMBER, line.split(":", 1)[1])[0])
    raise ValueError(f"no '{label}' line in the header")


def _parameter_rows(lines: list[str], first: int, last: int) -> list[tuple[str, list[float]]]:
    rows = []
    for line in lines[first - 1:last]:
        m = re.match(r"\s*(b\d+)\s*=\s*(.*)$", line)
        if m:
            rows.append((m.group(1), [float(v) for v in re.findall(_NUMBER, m.group(2))]))
    return rows


def _data_columns(lines: list[str], first: int, last: int) -> tuple[list[str], np.ndarray]:
    head = lines[first - 2]
    names = head.split(":", 1)[1].split()
    rows = [[float(v) for v in line.split()] for line in lines[first - 1:last] if line.strip()]
    table = np.array(rows, dtype=float)
    if table.shape[1] != len(names):
        raise ValueError(f"data header {names} does not match {table.shape[1]} columns")
    return names, table


def load(name: str) -> NistProblem:
    """Parse ``tests/reference/nist_strd/<name>.dat``."""
    path = REFERENCE_DIR / f"{name}.dat"
    lines = path.read_text().splitlines()
    first_p, last_p = _line_range(lines, "Starting Values")
    rows = _parameter_rows(lines, first_p, last_p)
    if any(len(v) != 4 for _, v in rows):
        raise ValueError(f"{name}: each parameter line must hold start 1, start 2, value, standard deviation")
    first_d, last_d = _line_range(lines, "Data")
    cols, table = _data_columns(lines, first_d, last_d)
    if cols[0] != "y":
        raise ValueError(f"{name}: the first data column must be the response y, got {cols[0]}")
    y = table[:, 0]
    if name in LOG_RESPONSE:
        y = np.log(y)
    n_obs = int(_certified_value(lines, "Number of Observations"))
    if y.size != n_obs:
        raise ValueError(f"{name}: {y.size} data rows, the header says {n_obs}")
    return NistProblem(
        name=name,
        difficulty=_difficulty(lines),
        model_text=_model_text(lines),
        expr=MODELS[name],
        parameters=tuple(p for p, _ in rows),
        starts=(tuple(v[0] for _, v in rows), tuple(v[1] for _, v in rows)),
        certified=tuple(v[2] for _, v in rows),
        certified_sd=tuple(v[3] for _, v in rows),
        certified_sse=_certified_value(lines, "Residual Sum of Squares"),
        certified_residual_sd=_certified_value(lines, "Residual Standard Deviation"),
        dof=int(_certified_value(lines, "Degrees of Freedom")),
        predictors=tuple(cols[1:]),
        y=y,
        X={c: table[:, k + 1] for k, c in enumerate(cols[1:])},
    )


# -- scoring -------------------------------------------------------------------------------------
def lre(estimate: float, certified: float, digits: int = CERTIFIED_DIGITS) -> float:
    """Log relative error, capped at ``digits``; 0 for a non-finite estimate or one wrong
    in its first digit (McCullough 1999)."""
    if not np.isfinite(estimate):
        return 0.0
    if estimate == certified:
        return float(digits)
    if certified == 0.0:
        value = -math.log10(abs(estimate))  # log absolute error
    else:
        value = -math.log10(abs(estimate - certified) / abs(certified))
    return float(min(max(value, 0.0), digits))


# -- writing a graybox study -------------------------------------------------------------------
def _toml_float(v: float) -> str:
    """A TOML float that reads back to exactly ``v``."""
    text = repr(float(v))
    return text if any(c in text for c in ".en") else text + ".0"


def write_csv(problem: NistProblem, path: Path) -> None:
    """The data as a static table: predictor columns, then the response, ``repr`` floats."""
    cols = list(problem.predictors) + [problem.response]
    values = [problem.X[c] for c in problem.predictors] + [problem.y]
    with open(path, "w", newline="") as fh:
        fh.write(",".join(cols) + "\n")
        for row in zip(*values):
            fh.write(",".join(repr(float(v)) for v in row) + "\n")


def study_toml(problem: NistProblem, start: int, csv_name: str) -> str:
    """A graybox study file: static regression, no bounds, guesses = NIST start ``start``
    (1 or 2), sigma estimated, multi-start off."""
    lines = [
        "[study]",
        f'name = "{problem.name} start {start}"',
        f'dataset = "NIST StRD {problem.name}"',
        "",
        "[model.inputs]",
        *[f'{c} = ""' for c in problem.predictors],
        "",
        "[model.outputs]",
        f'{problem.response} = {{ expr = "{problem.expr}" }}',
        "",
    ]
    for p, g in zip(problem.parameters, problem.starts[start - 1]):
        lines += [f"[parameters.{p}]", f"guess = {_toml_float(g)}", ""]
    lines += [
        "[estimate]",
        "multistart = 0",
        "",
        "[data]",
        f'files = ["{csv_name}"]',
        "",
        "[data.tags]",
        *[f'{c} = "{c}"' for c in list(problem.predictors) + [problem.response]],
        "",
    ]
    return "\n".join(lines)


def write_study(problem: NistProblem, start: int, folder: Path) -> Path:
    """Write ``<name>.csv`` (once) and ``<name>_start<k>.toml`` into ``folder``; returns the study path."""
    folder = Path(folder)
    csv_name = f"{problem.name}.csv"
    if not (folder / csv_name).exists():
        write_csv(problem, folder / csv_name)
    path = folder / f"{problem.name}_start{start}.toml"
    path.write_text(study_toml(problem, start, csv_name))
    return path


@dataclass(frozen=True)
class Score:
    """LREs of one fit against the certified values."""

    problem: str
    start: int
    estimates: dict[str, float]
    stderrs: dict[str, float]
    lre_estimates: dict[str, float]
    lre_stderrs: dict[str, float]
    sse: float
    lre_sse: float
    converged: bool
    wall_s: float

    @property
    def min_estimate(self) -> float:
        return min(self.lre_estimates.values())

    @property
    def min_stderr(self) -> float:
        return min(self.lre_stderrs.values())


def fit_through_config(problem: NistProblem, start: int, folder: Path):
    """Fit ``problem`` from ``start`` through the study-file path: returns (study, prepared, result)."""
    from graybox.study import load_study
    from graybox.estimate.fit import fit
    from graybox.workflow import prepare

    study = load_study(write_study(problem, start, folder), sample=False)  # least squares only
    prepared = prepare(study)
    return study, prepared, fit(prepared.problem, study.fit)


def score(problem: NistProblem, start: int, result) -> Score:
    """The LRE of every estimate, standard error and of the SSE."""
    est = {p: result.parameters[p].estimate for p in problem.parameters}
    se = {p: result.parameters[p].stderr for p in problem.parameters}
    return Score(
        problem=problem.name,
        start=start,
        estimates=est,
        stderrs=se,
        lre_estimates={p: lre(est[p], c) for p, c in zip(problem.parameters, problem.certified)},
        lre_stderrs={p: lre(se[p], c) for p, c in zip(problem.parameters, problem.certified_sd)},
        sse=result.sse,
        lre_sse=lre(result.sse, problem.certified_sse),
        converged=result.converged,
        wall_s=result.wall_s,
    )


def required(problem: NistProblem, start: int) -> bool:
    """The issue's marks apply to every lower-difficulty problem from both starts and every
    average-difficulty problem from start 2."""
    return problem.difficulty == "lower" or (problem.difficulty == "average" and start == 2)
