"""A readable plain-text summary of a least-squares fit."""

from __future__ import annotations


def _fmt(v: float) -> str:
    if v != v:  # NaN
        return "n/a"
    return f"{v:.6g}"


def fit_summary(res) -> str:
    """A least-squares result (:class:`~graybox.estimate.result.FitResult`) as text: status
    line, the parameter table (estimate, standard error, 95% interval, units, notes), noise
    levels and groups, SSE, log-likelihood and information criteria, the noise-level
    iteration, strong correlations (|r| > 0.95) and warnings."""
    lines = []
    status = "converged" if res.converged else "NOT CONVERGED"
    lines.append(f"least squares: {status} ({res.message}); {res.n_obs} observations, {res.n_free} free values, "
                 f"{res.nfev} evaluations")
    head = f"{'parameter':<22} {'estimate':>13} {'std. error':>12} {'95% interval':>29}  {'units':<10} note"
    lines += ["", head, "-" * len(head)]
    for name, p in res.parameters.items():
        if p.fixed:
            note = "fixed"
            interval = ""
            se = ""
        else:
            note = f"at {p.at_bound} bound, one-sided" if p.at_bound else ""
            rel = abs(p.stderr / p.estimate) if p.estimate else float("inf")
            if not p.at_bound and rel > 0.5:
                note = "poorly determined (std. error > 50%)"
            if not p.determined:
                note = "NOT DETERMINED by the data (no std. error)"
            if p.clipped:
                side = "both bounds" if p.clipped == "both" else f"the {p.clipped} bound"
                note = "; ".join(filter(None, [note, f"interval clipped at {side}"]))
            interval = f"[{_fmt(p.ci95[0])}, {_fmt(p.ci95[1])}]"
            se = _fmt(p.stderr)
        lines.append(f"{name:<22} {_fmt(p.estimate):>13} {se:>12} {interval:>29}  {p.units:<10} {note}")
    groups = getattr(res, "noise_groups", {}) or {}
    lines += ["", f"{'output':<22} {'sigma':>13} {'sigma is':>12} {'observations':>12}"
                  + ("  noise group" if groups else "")]
    for o, s in res.sigmas.items():
        how = "estimated" if res.sigma_estimated[o] else "given"
        group = next((g for g, members in groups.items() if o in members), None)
        shared = f"group '{group}'" if group else ""
        lines.append(f"{o:<22} {_fmt(s):>13} {how:>12} {res.n_obs_per_output[o]:>12}  {shared}".rstrip())
    for g, members in groups.items():
        n_g = sum(res.n_obs_per_output[m] for m in members)
        lines.append(f"noise group '{g}': one sigma shared by {', '.join(members)} "
                     f"(pooled: sum of their SSE over {n_g} observations)")
    lines += ["", f"SSE {_fmt(res.sse)}   log-likelihood {_fmt(res.loglik)}   AIC {_fmt(res.aic)}   "
                  f"BIC {_fmt(res.bic)}   Jacobian rank {res.rank}/{res.n_free}, condition {_fmt(res.condition)}"]
    rw = getattr(res, "reweighting", None)
    if rw:
        lines.append(f"noise levels: {rw['passes']} reweighting pass(es), {rw['newton_steps']} Newton step(s) on the "
                     f"concentrated likelihood; the next step would move no value by more than "
                     f"{_fmt(rw['step_in_std_errors'])} standard errors (converged below "
                     f"{_fmt(rw['criterion_std_errors'])})")
    strong = []
    names = res.names
    for i in range(len(names)):
        for j in range(i + 1, len(names)):
            c = res.correlation[i, j]
            if c == c and abs(c) > 0.95:
                strong.append(f"{names[i]} ~ {names[j]}: {c:+.3f}")
    if strong:
        lines.append("strong correlations (|r| > 0.95): " + "; ".join(strong))
    for w in res.warnings:
        lines.append(f"warning: {w}")
    return "\n".join(lines)
