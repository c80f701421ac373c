"""The ``smootharea`` command line.

Exit codes, for schedulers: 0 success; 1 input problem; 2 sampler did not
converge (outputs written, flagged); 3 store or output failure; 4 another run
holds the lock.
"""
from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

EXIT_OK = 0
EXIT_INPUT = 1
EXIT_NOT_CONVERGED = 2
EXIT_OUTPUT = 3
EXIT_LOCKED = 4


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="smootharea",
        description="Bayesian small-area disease mapping: smoothed relative risks, "
                    "exceedance probabilities and ranks.")
    commands = parser.add_subparsers(dest="command", required=True)

    check = commands.add_parser("check", help="validate inputs, build the neighbour graph and "
                                "fit frequentist references, without sampling")
    check.add_argument("job", type=Path, help="job file (TOML)")
    check.add_argument("--json", action="store_true", help="print one JSON object")
    check.set_defaults(handler=command_check)

    run = commands.add_parser("run", help="fit the job's model and write all outputs")
    run.add_argument("job", type=Path, help="job file (TOML)")
    run.add_argument("--out", type=Path, default=None, help="output folder (default: [output] dir)")
    run.add_argument("--quiet", action="store_true", help="no progress bar")
    run.add_argument("--quick", action="store_true",
                     help="approximate preview in seconds (Laplace approximation, no sampler); "
                          "every output is labelled APPROXIMATE and 'latest' is not moved")
    run.set_defaults(handler=command_run)

    rank = commands.add_parser("rank", help="order areas by exceedance probability")
    rank.add_argument("outdir", type=Path, help="a finished run's output folder")
    rank.add_argument("--threshold", type=float, default=None,
                      help="relative-risk threshold (default: the job's first)")
    rank.add_argument("--top", type=int, default=None, help="show only the first N areas")
    rank.set_defaults(handler=command_rank)

    # Commands registered by the modules that own them (one line each).
    __import__("smootharea.cli_nightly", fromlist=["register"]).register(commands)
    __import__("smootharea.cli_report", fromlist=["register"]).register(commands)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    arguments = parser.parse_args(argv)
    return int(arguments.handler(arguments) or 0)


def load_job_or_report(path: Path):
    """Read the job file; on failure print why and return None."""
    from .job import JobFileError, load_job
    try:
        return load_job(path)
    except JobFileError as error:
        print(f"Problem with the job file:\n{error}", file=sys.stderr)
        return None


def command_check(arguments: argparse.Namespace) -> int:
    from .pipeline import check_summary, prepare
    from .problems import InputError
    from .textsummary import format_check_summary
    job = load_job_or_report(arguments.job)
    if job is None:
        return EXIT_INPUT
    started = time.perf_counter()
    try:
        prepared = prepare(job)
    except InputError as error:
        if arguments.json:
            print(json.dumps({"usable": False, "problems": [str(p) for p in error.problems]}, indent=2))
        print(error.render(), file=sys.stderr)
        return EXIT_INPUT
    summary = check_summary(prepared)
    summary["seconds"] = round(time.perf_counter() - started, 3)
    if arguments.json:
        from .outputs import clean_for_json
        print(json.dumps(clean_for_json(summary), indent=2))
    else:
        print(format_check_summary(summary))
    return EXIT_OK


def command_run(arguments: argparse.Namespace) -> int:
    """Delegates to :func:`smootharea.runner.run_job` (run folder, lock, history, run.log)."""
    from .runner import run_job
    job = load_job_or_report(arguments.job)
    if job is None:
        return EXIT_INPUT
    quick = bool(getattr(arguments, "quick", False))
    outcome = run_job(job, arguments.out, progress=False if arguments.quiet else None, quick=quick)
    if quick and outcome.status == "approximate":
        print(outcome.message)
    return outcome.exit_code


def command_rank(arguments: argparse.Namespace) -> int:
    from .ranking import ranking_from_run
    try:
        ranking = ranking_from_run(arguments.outdir, arguments.threshold)
    except FileNotFoundError as error:
        print(f"Not a finished run folder: {error}", file=sys.stderr)
        return EXIT_INPUT
    if arguments.top:
        ranking = ranking.head(arguments.top)
    print(ranking.to_string(index=False, float_format=lambda v: f"{v:.3f}"))
    return EXIT_OK


if __name__ == "__main__":
    sys.exit(main())
