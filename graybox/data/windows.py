"""Informative windows: rank candidate time windows by how much they would inform the free
parameters, from the inputs alone.

For a window ``w`` the score is

    log det( D F_w D + ridge * I ),   F_w = sum over valid observations i in w of s_i s_i^T / sigma_o^2

where ``s_i`` is the sensitivity row (d output / d parameter at the guesses) of observation
``i`` of output ``o`` and ``sigma_o`` that output's noise level (1 when not given).  The
sensitivities come from the model simulated on the record's inputs at the guesses, never
from how well a fit matches.  ``D`` scales every parameter by the whole record's
information, ``D = diag(F_record)^(-1/2)``, so that parameters of different units weigh
alike (the ranking of windows does not depend on D except through the ridge), and the tiny
ridge (``1e-9`` by default) keeps the determinant of a window that leaves a parameter
undetermined finite: such a window scores about ``log(1e-9) = -20.7`` per missing direction.

Windows overlap by design (``step`` < ``window``); the best ones are chosen greedily, each
overlapping none chosen before.  Each is described by its input moves: the largest rise and
the largest fall of each input inside the window, named when at least 5 % of that input's
range over the record, biggest first.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timedelta
from pathlib import Path
from typing import Callable, Mapping

import numpy as np

from graybox.data.record import Record
from graybox.errors import DataError

DEFAULT_RIDGE = 1e-9
MOVE_SHARE = 0.05
DEFAULT_TOP = 5  # the best five (as the [informative] table's documented default)
SHORT_RECORD_WINDOWS = 2.0  # a record shorter than this many default windows gets windows of half its span

SensitivityFn = Callable[[Record], Mapping[str, np.ndarray]]


@dataclass(frozen=True)
class InputMove:
    """A step of one input inside a window: from ``before`` to ``after`` at ``at_utc``."""

    input: str
    before: float
    after: float
    at_utc: datetime
    units: str

    def text(self) -> str:
        """The move as one line of text."""
        u = f" {self.units}" if self.units else ""
        return f"{self.input} {self.before:.4g} -> {self.after:.4g}{u} at {self.at_utc:%Y-%m-%d %H:%M}Z"


@dataclass(frozen=True)
class WindowScore:
    """One ranked window: where it lies, its score, its observations and input moves."""

    rank: int
    start_utc: datetime
    end_utc: datetime
    t_start: float  # seconds in the record's time
    t_end: float
    log_det: float
    n_obs: int
    moves: tuple[InputMove, ...]

    def describe(self) -> str:
        """The window as one line of a data report."""
        moves = "; ".join(m.text() for m in self.moves) if self.moves else "no input move (steady)"
        return (f"#{self.rank} {self.start_utc:%Y-%m-%d %H:%M}Z .. {self.end_utc:%Y-%m-%d %H:%M}Z  "
                f"log det {self.log_det:.2f}  ({self.n_obs} observations)  moves: {moves}")

    def to_dict(self) -> dict:
        """The window as a results.json entry."""
        return {"rank": self.rank, "start_utc": self.start_utc.isoformat(), "end_utc": self.end_utc.isoformat(),
                "t_start_s": self.t_start, "t_end_s": self.t_end, "log_det": self.log_det, "n_obs": self.n_obs,
                "moves": [m.text() for m in self.moves]}


def information_rows(record: Record, sens: Mapping[str, np.ndarray],
                     noise: Mapping[str, float] | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Times (sorted) and weighted sensitivity rows ``s_i / sigma`` of every valid observation."""
    noise = dict(noise or {})
    times, rows = [], []
    p = None
    for name, series in record.outputs.items():
        if name not in sens:
            raise DataError(f"the sensitivity function gave nothing for output '{name}'")
        s = np.asarray(sens[name], dtype=float)
        if s.ndim != 2 or s.shape[0] != series.t.size:
            raise DataError(f"sensitivities of '{name}' have shape {s.shape}; expected ({series.t.size}, n_params)")
        if p is None:
            p = s.shape[1]
        elif s.shape[1] != p:
            raise DataError(f"sensitivities of '{name}' have {s.shape[1]} parameter columns, others {p}")
        sigma = float(noise.get(name, 1.0))
        if not sigma > 0:
            raise DataError(f"the noise level of '{name}' must be positive, got {sigma}")
        ok = series.mask & np.all(np.isfinite(s), axis=1)
        times.append(series.t[ok])
        rows.append(s[ok] / sigma)
    t = np.concatenate(times)
    x = np.concatenate(rows) if rows else np.zeros((0, 0))
    order = np.argsort(t, kind="stable")
    return t[order], x[order]


def log_det_information(x: np.ndarray, scale: np.ndarray, ridge: float = DEFAULT_RIDGE) -> float:
    """log det of the scaled information of rows ``x`` plus the ridge."""
    xs = x * scale
    f = xs.T @ xs + ridge * np.eye(x.shape[1])
    sign, val = np.linalg.slogdet(f)
    return float(val) if sign > 0 else float("-inf")


def _moves(record: Record, lo: float, hi: float) -> tuple[InputMove, ...]:
    out = []
    for name, series in record.inputs.items():
        full = float(np.ptp(series.values)) if series.values.size else 0.0
        if full == 0.0:
            continue
        inside = (series.t > lo) & (series.t <= hi)
        if not inside.any():
            continue
        v = np.concatenate([series.at([lo]), series.values[inside]])
        tt = np.concatenate([[lo], series.t[inside]])
        d = np.diff(v)
        for k in {int(np.argmax(d)), int(np.argmin(d))}:  # the largest rise and the largest fall
            if abs(d[k]) < MOVE_SHARE * full:
                continue
            at = record.start_utc + timedelta(seconds=float(tt[k + 1]))
            out.append((abs(d[k]) / full, InputMove(name, float(v[k]), float(v[k + 1]), at, series.units)))
    out.sort(key=lambda m: -m[0])
    return tuple(m for _, m in out)


def rank_windows(record: Record, sensitivity_fn: SensitivityFn, *, window: float, step: float | None = None,
                 top: int = 5, noise: Mapping[str, float] | None = None,
                 ridge: float = DEFAULT_RIDGE) -> list[WindowScore]:
    """The ``top`` non-overlapping windows of length ``window`` seconds (candidates every
    ``step`` seconds, default window/4), best first."""
    if not window > 0:
        raise DataError(f"the window length must be positive, got {window}")
    step = float(step) if step else window / 4.0
    if not step > 0:
        raise DataError(f"the window step must be positive, got {step}")
    t, x = information_rows(record, sensitivity_fn(record), noise)
    if t.size == 0:
        raise DataError(f"record '{record.name}' has no valid observation to rank windows by")
    diag = np.einsum("ij,ij->j", x, x)
    scale = np.where(diag > 0, 1.0 / np.sqrt(np.where(diag > 0, diag, 1.0)), 1.0)
    lo, hi = record.time_span()
    if hi - lo <= window:
        starts = np.array([lo])
    else:
        starts = np.arange(lo, hi - window + 1e-9 * max(1.0, abs(hi)), step)
    scored = []
    for a in starts:
        b = a + window
        i0, i1 = np.searchsorted(t, a, side="left"), np.searchsorted(t, b, side="left")
        if i1 <= i0:
            continue
        scored.append((log_det_information(x[i0:i1], scale, ridge), float(a), float(b), int(i1 - i0)))
    scored.sort(key=lambda s: -s[0])
    chosen: list[tuple[float, float, float, int]] = []
    for s in scored:
        if all(s[2] <= c[1] or s[1] >= c[2] for c in chosen):
            chosen.append(s)
        if len(chosen) == top:
            break
    return [WindowScore(i + 1, record.start_utc + timedelta(seconds=a), record.start_utc + timedelta(seconds=b),
                        a, b, ld, n, _moves(record, a, b)) for i, (ld, a, b, n) in enumerate(chosen)]


@dataclass(frozen=True)
class WindowPlan:
    """How a record's candidate windows are laid out and ranked."""

    window: float  # seconds
    step: float  # seconds between candidate starts
    top: int
    noise: Mapping[str, float] | None = None  # output -> noise level weighting it (None: 1 for each)


def window_plan(search, record: Record) -> WindowPlan:
    """The one rule for the informative-window settings of a record, used by both
    `graybox check` and `graybox fit`: the experiment's ``[informative]`` table (``search``,
    a ``graybox.data.spec.SearchSpec``) if it has one, with that table's documented
    defaults for the keys it leaves out; without one, windows of the table's default length
    (1 day), or of half the record when it is shorter than two of them (a short record still
    has windows to compare), a quarter window apart, the best ``DEFAULT_TOP``, every output
    weighted alike."""
    if search is not None:
        return WindowPlan(float(search.window), float(search.step), int(search.top), dict(search.noise) or None)
    from graybox.data.config import INFORMATIVE_DEFAULTS, default_duration

    full = float(default_duration("window", INFORMATIVE_DEFAULTS))
    lo, hi = record.time_span()
    span = hi - lo
    window = full if span >= SHORT_RECORD_WINDOWS * full or span <= 0 else span / SHORT_RECORD_WINDOWS
    return WindowPlan(window, window / 4.0, DEFAULT_TOP, None)


def rank_record(record: Record, sensitivity_fn: SensitivityFn, search=None) -> list[WindowScore]:
    """:func:`rank_windows` of ``record`` laid out by :func:`window_plan`."""
    plan = window_plan(search, record)
    return rank_windows(record, sensitivity_fn, window=plan.window, step=plan.step, top=plan.top, noise=plan.noise)


def windows_to_frame(scores: list[WindowScore]):
    """A table of the ranked windows (rank, start/end UTC, seconds, log det, observations,
    input moves), ready for ``to_csv``."""
    import pandas as pd

    return pd.DataFrame([{
        "rank": w.rank, "start_utc": w.start_utc.isoformat(), "end_utc": w.end_utc.isoformat(),
        "t_start_s": w.t_start, "t_end_s": w.t_end, "log_det": w.log_det, "n_obs": w.n_obs,
        "moves": "; ".join(m.text() for m in w.moves),
    } for w in scores], columns=["rank", "start_utc", "end_utc", "t_start_s", "t_end_s", "log_det", "n_obs", "moves"])


def write_windows(scores: list[WindowScore], folder: Path, name: str = "windows.csv") -> Path:
    """Write the ranked windows as CSV into a run folder; returns the file's path."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / name
    windows_to_frame(scores).to_csv(path, index=False)
    return path
