"""Commands for nightly re-estimation: ``history``, ``changes`` and ``batch``.

Registered into the main parser by :func:`register`; exit codes are those of
:mod:`smootharea.cli`.
"""
from __future__ import annotations

import argparse
import sys
from pathlib import Path

from .cli import EXIT_INPUT, EXIT_OK, EXIT_OUTPUT, load_job_or_report


def register(commands) -> None:
    """Add the history, changes and batch subcommands to ``commands`` (argparse subparsers)."""
    history = commands.add_parser("history", help="list a job's runs from the history store")
    history.add_argument("job", type=Path, help="job file (TOML)")
    history.add_argument("--sync", action="store_true",
                         help="first record run folders missing from the store "
                              "(e.g. runs that ended while the database was down)")
    history.add_argument("--limit", type=int, default=30, help="show at most N runs (default 30)")
    history.add_argument("--out", type=Path, default=None,
                         help="output folder, if the runs used --out (default: [output] dir)")
    history.set_defaults(handler=command_history)

    changes = commands.add_parser("changes", help="areas whose results moved since the "
                                  "previous converged run")
    changes.add_argument("job", type=Path, help="job file (TOML)")
    changes.add_argument("--since", default=None, metavar="RUN",
                         help="compare with this run id (default: the converged run before)")
    changes.add_argument("--run", default=None, metavar="RUN",
                         help="the later run (default: the newest converged run)")
    changes.add_argument("--min-change", type=float, default=0.1,
                         help="smallest move of an exceedance probability to report (default 0.1)")
    changes.add_argument("--rank-shift", type=float, default=None, metavar="PLACES",
                         help="also report areas whose median rank moved by at least PLACES "
                              "(rank intervals that no longer overlap are always reported)")
    changes.add_argument("--signal-margin", type=float, default=0.05, metavar="P",
                         help="report a signal change only if its probability moved by at least P "
                              "(default 0.05, about two Monte Carlo errors; 0 reports every flip)")
    changes.add_argument("--csv", type=Path, default=None, metavar="PATH",
                         help="also write the changed areas to this CSV file")
    changes.add_argument("--out", type=Path, default=None,
                         help="output folder, if the runs used --out (default: [output] dir)")
    changes.set_defaults(handler=command_changes)

    batch = commands.add_parser("batch", help="run many jobs in parallel on Dask")
    batch.add_argument("batch", type=Path, help="batch file (TOML) listing jobs and variants")
    batch.add_argument("--scheduler", default=None, metavar="ADDRESS",
                       help="address of a running Dask scheduler (default: start a local cluster)")
    batch.add_argument("--workers", type=int, default=None,
                       help="worker processes of the local cluster (default: the batch file's, else 2)")
    batch.set_defaults(handler=command_batch)


def _open_store_for(job, out: Path | None):
    """(store, output dir); the store is None, with the reason printed, when it cannot be opened."""
    from .history import StoreError, open_store, resolve_store_url
    out_dir = out or job.output_dir
    try:
        return open_store(resolve_store_url(job, out_dir)), out_dir
    except StoreError as error:
        print(f"smootharea: {error}", file=sys.stderr)
        return None, out_dir


def format_history(runs) -> str:
    """The run list as a text table (runs: DataFrame from HistoryStore.list_runs)."""
    import pandas as pd
    if runs.empty:
        return "no runs recorded yet"
    table = pd.DataFrame({
        "run": runs["run_id"],
        "started (UTC)": [t.strftime("%Y-%m-%d %H:%M") if t is not None else "" for t in runs["started_at"]],
        "status": runs["status"],
        "verdict": [("converged" if c else "NOT converged") if c is not None and pd.notna(c) else "-"
                    for c in runs["converged"]],
        "flagged": [("-" if pd.isna(v) else str(int(v))) for v in runs["areas_flagged"]],
        "minutes": [("-" if pd.isna(v) else f"{v / 60:.1f}") for v in runs["seconds"]],
        "exit": [("-" if pd.isna(v) else str(int(v))) for v in runs["exit_code"]],
    })
    return table.to_string(index=False)


def command_history(arguments: argparse.Namespace) -> int:
    from .history import StoreError, sync_run_directories
    from .locking import LockHeld, acquire_job_lock
    job = load_job_or_report(arguments.job)
    if job is None:
        return EXIT_INPUT
    store, out_dir = _open_store_for(job, arguments.out)
    if store is None:
        return EXIT_OUTPUT
    try:
        if arguments.sync:
            try:
                with acquire_job_lock(out_dir):
                    recorded = sync_run_directories(store, out_dir, job.description.name)
            except LockHeld:  # a run is going on: leave its folder alone
                recorded = sync_run_directories(store, out_dir, job.description.name,
                                                live_runs_possible=True)
            print(f"recorded {len(recorded)} run(s) missing from the store"
                  + (": " + ", ".join(recorded) if recorded else ""))
        print(format_history(store.list_runs(job.description.name, limit=arguments.limit)))
    except (StoreError, OSError) as error:
        print(f"smootharea: {error}", file=sys.stderr)
        return EXIT_OUTPUT
    finally:
        store.dispose()
    return EXIT_OK


def command_changes(arguments: argparse.Namespace) -> int:
    from .changes import ChangeRules, NothingToCompare, changes_between, choose_runs, format_changes
    from .history import StoreError
    job = load_job_or_report(arguments.job)
    if job is None:
        return EXIT_INPUT
    if not 0 <= arguments.min_change < 1:
        print("smootharea: --min-change must lie in [0, 1)", file=sys.stderr)
        return EXIT_INPUT
    rules = ChangeRules(min_change=arguments.min_change, rank_shift=arguments.rank_shift,
                        signal_margin=arguments.signal_margin)
    store, _ = _open_store_for(job, arguments.out)
    if store is None:
        return EXIT_OUTPUT
    try:
        pair = choose_runs(store, job.description.name, since=arguments.since, current=arguments.run)
        table = changes_between(store, pair, rules)
    except NothingToCompare as error:
        print(f"smootharea: nothing to compare: {error}", file=sys.stderr)
        return EXIT_INPUT if (arguments.since or arguments.run) else EXIT_OK
    except StoreError as error:
        print(f"smootharea: {error}", file=sys.stderr)
        return EXIT_OUTPUT
    finally:
        store.dispose()
    print(format_changes(table, pair, rules))
    if arguments.csv:
        try:
            arguments.csv.parent.mkdir(parents=True, exist_ok=True)
            table.to_csv(arguments.csv, index=False)
        except OSError as error:
            print(f"smootharea: could not write {arguments.csv}: {error}", file=sys.stderr)
            return EXIT_OUTPUT
        print(f"written to {arguments.csv}")
    return EXIT_OK


def command_batch(arguments: argparse.Namespace) -> int:
    from .batch import BatchFileError, batch_exit_code, format_batch_summary, load_batch, run_batch
    try:
        batch = load_batch(arguments.batch)
    except BatchFileError as error:
        print(f"Problem with the batch file:\n{error}", file=sys.stderr)
        return EXIT_INPUT
    results = run_batch(batch, scheduler=arguments.scheduler, workers=arguments.workers)
    print(format_batch_summary(results))
    return batch_exit_code(results)
