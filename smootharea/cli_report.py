"""``smootharea report OUTDIR``: redraw maps, plots and report.html from a finished run's files.

No sampling: everything comes from ``results.gpkg``, ``model.json`` and ``posterior.nc``.
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

SUPPORTED_FORMATS = ("png", "svg", "pdf")


def register(commands) -> None:
    """Add the ``report`` subcommand to ``commands`` (argparse subparsers)."""
    from .maps import DEFAULT_PALETTE, DIVERGING_PALETTES
    report = commands.add_parser(
        "report", help="redraw maps, plots and report.html of a finished run (no sampling)")
    report.add_argument("outdir", type=Path,
                        help="a finished run's folder (holding model.json), or a job's output "
                             "folder whose 'latest' link points at one")
    report.add_argument("--threshold", type=float, action="append", default=None,
                        help="relative-risk threshold for exceedance maps and the flagged table; "
                             "repeat for several (default: the job's thresholds)")
    report.add_argument("--palette", choices=sorted(DIVERGING_PALETTES), default=DEFAULT_PALETTE,
                        help=f"diverging palette for ratio maps (default {DEFAULT_PALETTE})")
    report.add_argument("--formats", default="png,svg",
                        help="comma-separated figure formats written to OUTDIR/maps "
                             "(png, svg, pdf; default png,svg; 'none' for the report only)")
    report.add_argument("--dpi", type=int, default=300, help="resolution of PNG files (default 300)")
    report.set_defaults(handler=command_report)


def parse_formats(text: str) -> tuple[str, ...]:
    if text.strip().lower() == "none":
        return ()
    formats = tuple(f.strip().lower() for f in text.split(",") if f.strip())
    unknown = [f for f in formats if f not in SUPPORTED_FORMATS]
    if unknown:
        raise ValueError(f"unknown format(s) {', '.join(unknown)}; choose from "
                         f"{', '.join(SUPPORTED_FORMATS)}")
    return formats


def resolve_run_dir(outdir: Path) -> Path:
    """The run folder itself, or the one a job output folder's ``latest`` link points at."""
    if (outdir / "model.json").is_file():
        return outdir
    latest = outdir / "latest"
    if (latest / "model.json").is_file():
        return latest.resolve()
    raise FileNotFoundError(f"{outdir}: no model.json here (nor under {latest})")


def command_report(arguments: argparse.Namespace) -> int:
    from .cli import EXIT_INPUT, EXIT_OK, EXIT_OUTPUT
    try:
        formats = parse_formats(arguments.formats)
        run_dir = resolve_run_dir(arguments.outdir)
    except (ValueError, FileNotFoundError) as error:
        print(f"smootharea report: {error}", file=sys.stderr)
        return EXIT_INPUT
    missing = [name for name in ("results.gpkg", "model.json") if not (run_dir / name).is_file()]
    if missing:
        print(f"smootharea report: {run_dir} is not a finished run folder "
              f"(missing {', '.join(missing)})", file=sys.stderr)
        return EXIT_INPUT
    from .report import write_report
    started = time.perf_counter()
    try:
        path = write_report(run_dir, thresholds=arguments.threshold, palette=arguments.palette,
                            formats=formats, dpi=arguments.dpi)
    except OSError as error:
        print(f"smootharea report: could not write the report: {error}", file=sys.stderr)
        return EXIT_OUTPUT
    print(f"smootharea report: {path} ({time.perf_counter() - started:.1f} s)", file=sys.stderr)
    print(path)
    return EXIT_OK
