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
