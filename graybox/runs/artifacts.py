"""Files of a run folder besides results.json: fitted-vs-measured table and overlay plot."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd


@dataclass
class OutputTrace:
    """One measured output of one experiment, at its compared observations."""

    experiment: str
    output: str
    units: str
    t: np.ndarray  # seconds from the record start
    start_utc: pd.Timestamp
    measured: np.ndarray
    fitted: np.ndarray
    bands: dict[str, tuple[np.ndarray, np.ndarray]] = field(default_factory=dict)  # label -> (lo, hi)

    @property
    def residual(self) -> np.ndarray:
        """Measured minus fitted, model units, shape of ``t``."""
        return self.measured - self.fitted

    def utc(self) -> pd.DatetimeIndex:
        """The trace's times as UTC timestamps (the record's start plus ``t`` seconds)."""
        return pd.Timestamp(self.start_utc) + pd.to_timedelta(self.t, unit="s")


def fitted_table(traces: list[OutputTrace]) -> pd.DataFrame:
    """The fitted traces as one long table: experiment, output, units, UTC and elapsed time (s),
    measured, fitted and residual values, and each band's ``LABEL_lo`` / ``LABEL_hi`` columns
    (prediction or credible bands, when sampled); one row per sample."""
    frames = []
    for tr in traces:
        df = pd.DataFrame({
            "experiment": tr.experiment,
            "output": tr.output,
            "units": tr.units,
            "time_utc": tr.utc().strftime("%Y-%m-%dT%H:%M:%SZ"),
            "time_s": tr.t,
            "measured": tr.measured,
            "fitted": tr.fitted,
            "residual": tr.residual,
        })
        for label, (lo, hi) in tr.bands.items():
            df[f"{label}_lo"] = lo
            df[f"{label}_hi"] = hi
        frames.append(df)
    return pd.concat(frames, ignore_index=True)


def write_fitted_csv(path: Path, traces: list[OutputTrace]) -> None:
    """The fitted table (:func:`fitted_table`) written as CSV, floats to 10 significant digits."""
    fitted_table(traces).to_csv(path, index=False, float_format="%.10g")


BAND_STYLE = {
    "credible95": ("#2b6f77", 0.35, "95% credible band (model)"),
    "prediction95": ("#9fc9cf", 0.35, "95% prediction band (with noise)"),
}


def _broken_at_gaps(t: np.ndarray, y: np.ndarray, factor: float = 10.0) -> tuple[np.ndarray, np.ndarray]:
    """Insert NaN where the spacing exceeds ``factor`` times the median, so lines do not
    bridge gaps between segments."""
    if t.size < 3:
        return t, y
    dt = np.diff(t)
    cut = np.flatnonzero(dt > factor * np.median(dt)) + 1
    return np.insert(t.astype(float), cut, np.nan), np.insert(y.astype(float), cut, np.nan)


def plot_overlay(path: Path, traces: list[OutputTrace], title: str) -> None:
    """Measured dots and fitted line per output, residuals underneath."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    n = len(traces)
    fig, axes = plt.subplots(2 * n, 1, figsize=(11, 3.6 * n + 0.6), sharex=False,
                             gridspec_kw={"height_ratios": [3, 1] * n}, squeeze=False)
    for i, tr in enumerate(traces):
        ax, axr = axes[2 * i, 0], axes[2 * i + 1, 0]
        hours = tr.t / 3600.0
        for label in ("prediction95", "credible95"):
            if label in tr.bands:
                color, alpha, text = BAND_STYLE[label]
                lo, hi = tr.bands[label]
                ax.fill_between(hours, lo, hi, color=color, alpha=alpha, lw=0, label=text, step=None)
        ax.plot(hours, tr.measured, ".", ms=2.5, color="#4a4a4a", label="measured")
        ax.plot(*_broken_at_gaps(hours, tr.fitted), "-", lw=1.2, color="#c0392b", label="model")
        ax.set_ylabel(f"{tr.output} [{tr.units}]" if tr.units else tr.output)
        ax.set_title(f"{tr.experiment}: {tr.output}", fontsize=10, loc="left")
        ax.legend(loc="best", fontsize=8, frameon=False)
        for label in ("prediction95", "credible95"):  # bands about the model: visible at residual scale
            if label in tr.bands:
                color, alpha, _ = BAND_STYLE[label]
                lo, hi = tr.bands[label]
                axr.fill_between(*_broken_at_gaps(hours, lo - tr.fitted), _broken_at_gaps(hours, hi - tr.fitted)[1],
                                 color=color, alpha=alpha + 0.2, lw=0)
        axr.plot(hours, tr.residual, ".", ms=2, color="#2c3e50")
        axr.axhline(0.0, color="#c0392b", lw=0.8)
        axr.set_ylabel("residual")
        axr.set_xlabel(f"hours from {pd.Timestamp(tr.start_utc).strftime('%Y-%m-%d %H:%M UTC')}")
    fig.suptitle(title, fontsize=11)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
