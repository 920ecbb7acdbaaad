"""Helpers for the data-layer tests: write scenario files into a temp folder and load them."""

from __future__ import annotations

from pathlib import Path

from graybox.data import SymbolInfo, check_experiment, load_experiment

VESSEL = {
    "T": SymbolInfo("T", "output", "K"),
    "Q": SymbolInfo("Q", "input", "W"),
    "F": SymbolInfo("F", "input", "kg/s"),
}


def write(folder: Path, name: str, text: str, encoding: str = "utf-8") -> Path:
    path = folder / name
    path.write_bytes(text.encode(encoding))
    return path


def load(folder: Path, table: dict, symbols=None, name: str = "main"):
    return load_experiment(table, name, symbols=symbols or VESSEL, base_dir=folder,
                           where=f"{folder / 'cfg.toml'} [data]")


def check(folder: Path, table: dict, symbols=None, **kw):
    return check_experiment(table, "main", symbols=symbols or VESSEL, base_dir=folder,
                            where=f"{folder / 'cfg.toml'} [data]", **kw)


DRAINED_TANK_STUDY = """
[study]
name = "{name}"
seed = {seed}

[model]
name = "{model}"

[model.states.h]
units = "m"
rate = "(q - c*sqrt(h))/A"
initial = "measured"

[model.inputs]
q = "m**3/s"

[model.constants]
A = {{ value = {area}, units = "m**2" }}

[parameters.c]
guess = 0.01
bounds = [1e-5, 1.0]
units = "m**2.5/s"

[model.outputs.level]
expr = "h"

[data]
files = ["{csv}"]
time_column = "time"
{data_extra}

[data.tags.q]
tag = "{q_tag}"
units = "m**3/h"
{q_extra}

[data.tags.level]
tag = "{level_tag}"
units = "m"

[noise.level]
sigma = "estimate"
"""


def drained_tank_study(*, name: str, model: str, seed: int, area: float, csv: str, q_tag: str, level_tag: str,
                       data_extra: str = "", q_extra: str = "") -> str:
    """Study-file text of an invented tank drained through an outlet, A dh/dt = q - c sqrt(h)
    (c to be estimated), fed by the CSV ``csv`` with a time column and the two tags."""
    return DRAINED_TANK_STUDY.format(name=name, model=model, seed=seed, area=area, csv=csv, q_tag=q_tag,
                                     level_tag=level_tag, data_extra=data_extra, q_extra=q_extra)
