"""Many jobs in parallel on Dask: a batch file lists job files and variants of them.

Batch file (TOML); paths are relative to the batch file::

    [batch]
    workers = 2                      # local cluster size (optional; --workers wins)

    [[jobs]]
    file = "north_carolina/job.toml" # a job as it stands

    [[jobs]]
    file = "north_carolina/job.toml" # a variant of the same job
    name = "nc_1979"                 # becomes [job] name; outputs go to <its output dir>/nc_1979
    set = { "cases.count" = "SID79", "job.period" = "1979-84", "sampling.draws" = 500 }

``set`` replaces single keys of the job file, written ``"table.key"``. A variant
with a ``name`` writes into a sub-folder of the job's output folder named after
it (unless ``set`` gives ``output.dir``), so variants never share a lock or a
``latest`` link. Two entries that would still share an output folder are
refused before anything runs.

Each entry runs :func:`smootharea.runner.run_job` in a Dask worker process; one
failing entry (bad input, crash, lost worker) never stops the others.
"""
from __future__ import annotations

import copy
import logging
import time
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .cli import EXIT_INPUT, EXIT_OK, EXIT_OUTPUT
from .job import KNOWN_TABLES, Job, JobFileError, parse_job

DEFAULT_WORKERS = 2
ENTRY_KEYS = {"file", "name", "set"}


class BatchFileError(Exception):
    """The batch file itself is unreadable or inconsistent."""


@dataclass(frozen=True)
class BatchEntry:
    """One job of a batch: a job file plus optional name and key overrides."""

    label: str
    file: Path
    name: str | None = None
    overrides: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class Batch:
    file: Path
    entries: tuple[BatchEntry, ...]
    workers: int = DEFAULT_WORKERS


def load_batch(path: str | Path) -> Batch:
    """Read and check a batch file; every problem is reported at once."""
    path = Path(path).resolve()
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except OSError as error:
        raise BatchFileError(f"{path}: cannot read: {error}") from error
    except tomllib.TOMLDecodeError as error:
        raise BatchFileError(f"{path}: not valid TOML: {error}") from error
    problems = [f"unknown table [{key}]; a batch file has [batch] and [[jobs]]"
                for key in raw if key not in ("batch", "jobs")]
    workers = raw.get("batch", {}).get("workers", DEFAULT_WORKERS)
    if not isinstance(workers, int) or isinstance(workers, bool) or workers < 1:
        problems.append(f"[batch] workers must be a whole number of at least 1, not {workers!r}")
    jobs = raw.get("jobs", [])
    if not isinstance(jobs, list) or not jobs:
        problems.append("list at least one job as [[jobs]] with a 'file' key")
        jobs = []
    entries = []
    for number, item in enumerate(jobs, start=1):
        entry, entry_problems = _entry(item, number, path.parent)
        problems += entry_problems
        if entry is not None:
            entries.append(entry)
    labels = [e.label for e in entries]
    problems += [f"two [[jobs]] entries are both called {label!r}; give one a 'name'"
                 for label in sorted({l for l in labels if labels.count(l) > 1})]
    if problems:
        raise BatchFileError("\n".join(f"{path}: {p}" for p in problems))
    return Batch(file=path, entries=tuple(entries), workers=workers)


def _entry(item: Any, number: int, base_dir: Path) -> tuple[BatchEntry | None, list[str]]:
    where = f"[[jobs]] entry {number}"
    if not isinstance(item, dict):
        return None, [f"{where} must be a table"]
    problems = [f"{where}: unknown key '{k}' (known: file, name, set)" for k in item if k not in ENTRY_KEYS]
    file = item.get("file")
    if not isinstance(file, str) or not file:
        return None, problems + [f"{where} needs a 'file' key naming a job file"]
    name = item.get("name")
    if name is not None and (not isinstance(name, str) or not name.strip() or "/" in name):
        problems.append(f"{where}: name must be a non-empty string without '/', not {name!r}")
    overrides = item.get("set", {})
    if not isinstance(overrides, dict):
        problems.append(f"{where}: 'set' must be a table of \"table.key\" = value")
        overrides = {}
    for key in overrides:
        table, _, leaf = key.partition(".")
        if not leaf or table not in KNOWN_TABLES:
            problems.append(f"{where}: set key {key!r} must be \"table.key\" with a known table "
                            f"({', '.join(sorted(KNOWN_TABLES))})")
    job_file = Path(file) if Path(file).is_absolute() else (base_dir / file).resolve()
    label = name or job_file.parent.name + "/" + job_file.stem
    return BatchEntry(label=label, file=job_file, name=name, overrides=dict(overrides)), problems


def entry_job(entry: BatchEntry) -> Job:
    """The job of one entry: its file with the entry's name and overrides applied."""
    try:
        raw = tomllib.loads(entry.file.read_text(encoding="utf-8"))
    except OSError as error:
        raise JobFileError(f"{entry.file}: cannot read the job file: {error}") from error
    except tomllib.TOMLDecodeError as error:
        raise JobFileError(f"{entry.file}: not valid TOML: {error}") from error
    raw = copy.deepcopy(raw)
    if entry.name:
        raw.setdefault("job", {})["name"] = entry.name
        if "output.dir" not in entry.overrides:
            base = Path(raw.get("output", {}).get("dir", "output"))
            base = base if base.is_absolute() else entry.file.parent / base
            raw.setdefault("output", {})["dir"] = str((base / entry.name).resolve())
    for key, value in entry.overrides.items():
        table, _, leaf = key.partition(".")
        raw.setdefault(table, {})[leaf] = value
    return parse_job(raw, base_dir=entry.file.parent, file=entry.file)


def run_entry(entry: BatchEntry) -> dict[str, Any]:
    """Run one entry (in a Dask worker); always returns a summary, never raises."""
    from .runner import run_job
    started = time.perf_counter()
    try:
        job = entry_job(entry)
    except JobFileError as error:
        return failed_summary(entry, EXIT_INPUT, "job_file_error", str(error), started)
    try:
        outcome = run_job(job, progress=False)
    except BaseException as error:  # noqa: BLE001 - report it; the other entries go on
        return failed_summary(entry, EXIT_OUTPUT, "failed", f"{type(error).__name__}: {error}", started)
    return {"entry": entry.label, **outcome.summary()}


def failed_summary(entry: BatchEntry, code: int, status: str, message: str,
                   started: float) -> dict[str, Any]:
    return {"entry": entry.label, "job": entry.name, "exit_code": code, "status": status,
            "verdict": None, "run_id": None, "run_dir": None, "areas_flagged": None,
            "minutes": round((time.perf_counter() - started) / 60, 2), "recorded": False,
            "message": message}


def shared_output_problems(batch: Batch) -> dict[str, str]:
    """Entries that would write into the same output folder as an earlier entry."""
    first_user: dict[Path, str] = {}
    problems = {}
    for entry in batch.entries:
        try:
            out_dir = entry_job(entry).output_dir
        except JobFileError:
            continue  # reported when the entry runs
        if out_dir in first_user:
            problems[entry.label] = (f"writes into {out_dir}, the output folder of entry "
                                     f"{first_user[out_dir]!r}; give it a 'name' or set output.dir")
        else:
            first_user[out_dir] = entry.label
    return problems


def run_batch(batch: Batch, scheduler: str | None = None, workers: int | None = None) -> list[dict[str, Any]]:
    """Run every entry on Dask (a local cluster unless ``scheduler`` is given); summaries in batch order."""
    from distributed import Client, LocalCluster, as_completed

    results: dict[str, dict[str, Any]] = {}
    clash = shared_output_problems(batch)
    for entry in batch.entries:
        if entry.label in clash:
            results[entry.label] = failed_summary(entry, EXIT_INPUT, "output_clash",
                                                  clash[entry.label], time.perf_counter())
    runnable = [e for e in batch.entries if e.label not in results]
    cluster = None
    if scheduler is None:
        cluster = LocalCluster(n_workers=workers or batch.workers, threads_per_worker=1,
                               processes=True, dashboard_address=None,
                               silence_logs=logging.ERROR)
    try:
        with Client(scheduler or cluster) as client:
            futures = {client.submit(run_entry, entry, key=f"smootharea-{entry.label}-{time.time_ns()}",
                                     pure=False): entry for entry in runnable}
            for future in as_completed(futures):
                entry = futures[future]
                try:
                    results[entry.label] = future.result()
                except Exception as error:  # noqa: BLE001 - a lost worker fails one entry only
                    results[entry.label] = failed_summary(
                        entry, EXIT_OUTPUT, "worker_failed", f"{type(error).__name__}: {error}",
                        time.perf_counter())
                    results[entry.label]["minutes"] = None
    finally:
        if cluster is not None:
            cluster.close()
    return [results[e.label] for e in batch.entries]


def batch_exit_code(results: list[dict[str, Any]]) -> int:
    """0 when every entry succeeded, otherwise the highest entry exit code."""
    return max((int(r["exit_code"]) for r in results), default=EXIT_OK)


def format_batch_summary(results: list[dict[str, Any]]) -> str:
    ok = sum(1 for r in results if r["exit_code"] == EXIT_OK)
    lines = [f"batch: {ok} of {len(results)} job(s) succeeded"]
    width = max([len("entry")] + [len(r["entry"]) for r in results])
    lines.append(f"  {'entry':<{width}}  exit  {'status':<14} minutes  run folder / message")
    for r in results:
        minutes = "-" if r.get("minutes") is None else f"{r['minutes']:.1f}"
        where = r.get("run_dir") or ""
        message = (r.get("message") or "").replace("\n", " | ")
        detail = where if r["exit_code"] == EXIT_OK else f"{where} {message}".strip()
        lines.append(f"  {r['entry']:<{width}}  {r['exit_code']:>4}  {r['status']:<14} {minutes:>7}  {detail}")
    return "\n".join(lines)
