"""Command line: parses arguments and calls the job functions in graybox.workflow (the
public API of graybox.api with a study file and printing).

Exit codes: 0 success; 2 user error (config, model, data, settings), printed as one
``error: ...`` message without a traceback; 1 internal failure (a bug: please report it).
"""

from __future__ import annotations

import argparse
import sys
import traceback

from graybox.versions import GRAYBOX_VERSION
from graybox.errors import EXIT_INTERNAL, EXIT_OK, EXIT_USER, GrayboxError


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # argparse's own usage errors are user errors too
        self.print_usage(sys.stderr)
        print(f"error: {message}", file=sys.stderr)
        raise SystemExit(EXIT_USER)


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of every command."""
    p = _Parser(prog="graybox", description="Gray-box parameter estimation for first-principles process models.")
    p.add_argument("--version", action="version", version=f"graybox {GRAYBOX_VERSION}")
    sub = p.add_subparsers(dest="command", required=True, parser_class=_Parser)

    f = sub.add_parser("fit", help="fit a study file's model to its data and write a run folder")
    f.add_argument("config", help="the study file (TOML)")
    f.add_argument("--out", required=True, help="the run folder to create (must not exist)")
    f.add_argument("--force", action="store_true", help="replace an existing run folder")
    _sampling_options(f)

    d = sub.add_parser("demo", help="run the whole job on the bundled demo data")
    d.add_argument("--out", default="demo-run", help="the run folder to create (default: demo-run)")
    d.add_argument("--force", action="store_true", help="replace an existing run folder")
    _sampling_options(d)

    c = sub.add_parser("check", help="check a study file and its data without fitting")
    c.add_argument("config", help="the study file (TOML)")
    _sampling_options(c)  # the same options as fit, so that check judges the same run

    b = sub.add_parser("batch", help="run many fits from a manifest (a CSV table of jobs)")
    b.add_argument("manifest", help="the manifest CSV: job, study, data, start, end, sample")
    b.add_argument("--out", required=True, help="folder for the job run folders and the summary tables")
    b.add_argument("--workers", type=int, default=2, help="jobs run at once on this machine (default 2)")
    b.add_argument("--timeout", type=float, default=1800.0, help="seconds each job may take (default 1800)")
    b.add_argument("--cluster", default=None, help="address of an existing Dask scheduler, e.g. tcp://host:8786")
    b.add_argument("--shared-storage", action="store_true",
                   help="the cluster's workers see the same files: send paths, not file contents")
    b.add_argument("--seed", type=int, default=0, help="base seed; each job's seed derives from it and its name")
    return p


def _sampling_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--no-sample", action="store_true", help="skip posterior sampling (least squares only)")
    p.add_argument("--walkers", type=int, default=None, help="number of walkers for posterior sampling")
    p.add_argument("--max-steps", type=int, default=None, help="step limit for posterior sampling")
    p.add_argument("--seed", type=int, default=None, help="seed for the run (overrides the study file)")


def _sampler_overrides(args) -> dict:
    return {k: v for k, v in (("walkers", args.walkers), ("max_steps", args.max_steps), ("seed", args.seed))
            if v is not None}


def run(argv: list[str] | None = None) -> int:
    """Parse ``argv`` and run its command; returns the exit code (errors propagate)."""
    args = build_parser().parse_args(argv)
    from graybox import workflow

    if args.command == "fit":
        workflow.fit_study(args.config, args.out, force=args.force, sample=False if args.no_sample else None,
                           sampler_options=_sampler_overrides(args))
        return EXIT_OK
    if args.command == "demo":
        workflow.run_demo(args.out, force=args.force, sample=False if args.no_sample else None,
                          sampler_options=_sampler_overrides(args))
        return EXIT_OK
    if args.command == "check":
        return workflow.check_study(args.config, sample=False if args.no_sample else None,
                                    sampler_options=_sampler_overrides(args))
    if args.command == "batch":
        from pathlib import Path

        from graybox.batch.runner import BatchSettings, run_batch

        if args.workers < 1 or args.timeout <= 0:
            from graybox.errors import BatchError

            raise BatchError("--workers must be at least 1 and --timeout positive")
        settings = BatchSettings(Path(args.out), args.workers, args.timeout, args.cluster, args.shared_storage, args.seed)
        df = run_batch(args.manifest, settings)
        return EXIT_OK if (df["status"] != "failed").all() and (df["status"] != "timeout").all() else EXIT_USER
    raise AssertionError(args.command)


def main(argv: list[str] | None = None) -> int:
    """The command line: run a command, print a user error as one ``error:`` line (exit 2)
    and a bug with its traceback (exit 1)."""
    try:
        code = run(argv)
    except GrayboxError as exc:
        print(f"error: {exc.render()}", file=sys.stderr)
        code = EXIT_USER
    except KeyboardInterrupt:
        print("interrupted; no run folder was finished", file=sys.stderr)
        code = 130
    except SystemExit as exc:
        code = int(exc.code or 0)
    except Exception:  # noqa: BLE001 - the last line of defence: a bug, reported as such
        traceback.print_exc()
        print("internal error: this is a bug in graybox, not in your input; please report it with the "
              "traceback above", file=sys.stderr)
        code = EXIT_INTERNAL
    return code


if __name__ == "__main__":
    sys.exit(main())
