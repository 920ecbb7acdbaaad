"""The NIST StRD nonlinear-regression LRE table, for the README's validation section.

Fits every StRD problem present in ``tests/reference/nist_strd/`` from both certified
starts through graybox's study-file path (``load_study`` -> ``prepare`` -> ``fit``; static
regression, no bounds, sigma estimated, multi-start off) and prints a Markdown table of log
relative errors (LRE; McCullough 1999, capped at the 11 certified digits): the smallest LRE
over the estimates, over the standard errors, and the LRE of the residual sum of squares.
Every row is printed, failures included.

Marks (from the issue): estimates >= 6, standard errors >= 4, SSE >= 6; required for the
lower-difficulty problems from both starts and the average-difficulty problems from start 2.

Usage::

    python benchmarks/nist_lre_table.py [--out benchmarks/results/nist_lre.md] [--detail]

``--detail`` adds one line per parameter below the table.
"""

from __future__ import annotations

import argparse
import platform
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from tests.estimate import nist  # noqa: E402

ESTIMATE_MARK, STDERR_MARK, SSE_MARK = 6.0, 4.0, 6.0


def meets(sc: nist.Score) -> bool:
    """Whether a problem-start meets all three marks."""
    return sc.min_estimate >= ESTIMATE_MARK and sc.min_stderr >= STDERR_MARK and sc.lre_sse >= SSE_MARK


def run_all(folder: Path) -> list[tuple[nist.NistProblem, nist.Score]]:
    """Fit every available problem from both starts; a fit that raises scores 0 everywhere."""
    rows = []
    for name in nist.available():
        problem = nist.load(name)
        for start in (1, 2):
            t0 = time.perf_counter()
            try:
                _, _, result = nist.fit_through_config(problem, start, folder)
                sc = nist.score(problem, start, result)
            except Exception as exc:  # a failed fit is a row of the table, not a crash
                print(f"{name} start {start}: {type(exc).__name__}: {exc}", file=sys.stderr)
                zero = {p: 0.0 for p in problem.parameters}
                nan = {p: float("nan") for p in problem.parameters}
                sc = nist.Score(name, start, nan, nan, zero, zero, float("nan"), 0.0, False,
                                time.perf_counter() - t0)
            rows.append((problem, sc))
    return rows


def markdown(rows: list[tuple[nist.NistProblem, nist.Score]], detail: bool = False) -> str:
    """The table (and a summary line) as Markdown."""
    head = ("| problem | difficulty | start | required | min LRE estimates | min LRE std. errors | LRE SSE "
            "| meets marks | converged | wall (s) |")
    lines = [head, "|" + "---|" * (head.count("|") - 1)]
    for problem, sc in rows:
        req = nist.required(problem, sc.start)
        lines.append(f"| {problem.name} | {problem.difficulty} | {sc.start} | {'yes' if req else 'no'} "
                     f"| {sc.min_estimate:.1f} | {sc.min_stderr:.1f} | {sc.lre_sse:.1f} "
                     f"| {'yes' if meets(sc) else '**no**'} | {'yes' if sc.converged else 'no'} "
                     f"| {sc.wall_s:.2f} |")
    required = [(p, s) for p, s in rows if nist.required(p, s.start)]
    lines += [
        "",
        f"Marks: LRE >= {ESTIMATE_MARK:g} on every estimate, >= {STDERR_MARK:g} on every standard error, "
        f">= {SSE_MARK:g} on the SSE.",
        f"Required problem-starts meeting the marks: {sum(meets(s) for _, s in required)} of {len(required)}; "
        f"all problem-starts: {sum(meets(s) for _, s in rows)} of {len(rows)}.",
    ]
    if any(p.name == "Lanczos1" and not meets(s) for p, s in rows):
        lines.append("Lanczos1 (certified SSE 1.43e-25): its data rounded to binary64 move the exact least-squares "
                     "SSE by 9e-4 relative (LRE 3.1, computed in 40-digit arithmetic by "
                     "tests/estimate/test_nist_strd.py), so a fit to the binary64 data cannot be expected to reach LRE 4 on the SSE or "
                     "on s = sqrt(SSE/(n-p)), which scales every standard error.")
    missing = nist.missing()
    if missing:
        lines.append(f"Not run (no .dat file in tests/reference/nist_strd/): {', '.join(missing)}.")
    if detail:
        lines += ["", "Per parameter (estimate LRE / standard-error LRE):", ""]
        for problem, sc in rows:
            cells = ", ".join(f"{p} {sc.lre_estimates[p]:.1f}/{sc.lre_stderrs[p]:.1f}" for p in problem.parameters)
            lines.append(f"- {problem.name} start {sc.start}: {cells}")
    return "\n".join(lines)


def code_version() -> str:
    """The git commit of the code measured (and whether the tree had local changes), if known."""
    import subprocess

    try:
        commit = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=ROOT, capture_output=True, text=True,
                                check=True).stdout.strip()
        dirty = subprocess.run(["git", "status", "--porcelain", "--", "graybox"], cwd=ROOT, capture_output=True,
                               text=True, check=True).stdout.strip()
    except (OSError, subprocess.CalledProcessError):
        return "unknown commit"
    return f"commit {commit}" + (" with local changes to graybox/" if dirty else "")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--out", type=Path, help="also write the table to this Markdown file")
    ap.add_argument("--detail", action="store_true", help="per-parameter LREs below the table")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="graybox-nist-") as tmp:
        t0 = time.perf_counter()
        rows = run_all(Path(tmp))
        wall = time.perf_counter() - t0
    text = markdown(rows, args.detail)
    footer = (f"\nSource: NIST ITL Statistical Reference Datasets, nonlinear regression, certified values; "
              f"LRE as in McCullough (1999). All {len(rows)} fits in {wall:.1f} s "
              f"(graybox {code_version()}; Python {platform.python_version()}, {platform.machine()}).")
    text += "\n" + footer
    print(text)
    if args.out:
        args.out.parent.mkdir(parents=True, exist_ok=True)
        args.out.write_text(text + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
