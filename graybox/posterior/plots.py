"""Corner and trace plots of a posterior chain (corner: Foreman-Mackey, JOSS 1 (2016) 24)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

MAX_TRACE_WALKERS = 32


def corner_plot(result, path: Path) -> Path:
    """Pairwise marginals of the post-burn-in thinned draws, the least-squares optimum marked."""
    import matplotlib

    matplotlib.use("Agg")
    import corner
    import matplotlib.pyplot as plt

    flat = result.flat()
    truths = list(result.fit_x) + [None] * (flat.shape[1] - result.n_free)
    fig = corner.corner(flat, labels=result.names, quantiles=[0.025, 0.5, 0.975], show_titles=True,
                        title_fmt=".4g", truths=truths, truth_color="#c0392b",
                        title_kwargs={"fontsize": 8}, label_kwargs={"fontsize": 8})
    status = "converged" if result.converged else "NOT CONVERGED"
    fig.suptitle(f"posterior ({status}); red: least-squares optimum", fontsize=9)
    fig.savefig(path, dpi=100)
    plt.close(fig)
    return path


def trace_plot(result, path: Path) -> Path:
    """Every quantity's walkers against step, the burn-in shaded."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    n_dim = result.chain.shape[2]
    fig, axes = plt.subplots(n_dim + 1, 1, figsize=(10, 1.8 * (n_dim + 1)), sharex=True, squeeze=False)
    steps = np.arange(result.n_steps)
    walkers = range(min(result.n_walkers, MAX_TRACE_WALKERS))
    for d in range(n_dim):
        ax = axes[d, 0]
        for w in walkers:
            ax.plot(steps, result.chain[w, :, d], lw=0.4, alpha=0.5)
        ax.axvspan(0, result.burn_in, color="#dddddd", alpha=0.6, lw=0)
        ax.set_ylabel(result.names[d], fontsize=8)
    ax = axes[n_dim, 0]
    for w in walkers:
        ax.plot(steps, result.log_prob[w], lw=0.4, alpha=0.5)
    ax.axvspan(0, result.burn_in, color="#dddddd", alpha=0.6, lw=0)
    ax.set_ylabel("log posterior", fontsize=8)
    ax.set_xlabel("step (grey: burn-in)")
    status = "converged" if result.converged else "NOT CONVERGED"
    fig.suptitle(f"traces: {result.n_walkers} walkers x {result.n_steps} steps ({status})", fontsize=9)
    fig.tight_layout()
    fig.savefig(path, dpi=100)
    plt.close(fig)
    return path
