"""Running a job safely, night after night.

Layout of a job's output folder::

    <output dir>/
        .smootharea.lock      flock held by the run in progress (see locking.py)
        history.sqlite        default history store (unless a URL is configured)
        runs/<run id>/        one folder per run: outputs, run.json, run.log
        latest -> runs/<id>   symlink to the last *converged* run, swapped atomically

A run writes only into its own new folder; ``latest`` moves (by creating a
temporary symlink and renaming it over the old one) only after every output
of a converged run is on disk. So a run that fails at any point -- bad input,
sampler error, SIGKILL, full disk -- leaves ``latest`` and every earlier run
exactly as they were. An approximate run (``--quick``) gets its own run folder
with status ``approximate`` and never moves ``latest``: it is a preview, and
``latest`` is what gets published. Each run's ``run.json`` is written before anything else
(status ``running``) and completed at the end; the history store is written
last, and if it is unreachable the run folder still holds the full record for
``smootharea history JOB --sync``.
"""
from __future__ import annotations

import importlib
import logging
import os
import secrets
import socket
import sys
import time
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Iterator, TextIO

from .cli import EXIT_INPUT, EXIT_LOCKED, EXIT_NOT_CONVERGED, EXIT_OK, EXIT_OUTPUT
from .history import (LATEST_LINK, STATUS_CONVERGED, STATUS_FAILED, STATUS_INPUT_ERROR,
                      STATUS_INTERRUPTED, STATUS_NOT_CONVERGED, STATUS_OUTPUT_FAILED,
                      STATUS_RUNNING, StoreError, open_store, published_areas_of,
                      resolve_store_url, runs_root, safe_url, sync_run_directories,
                      write_run_record)
from .job import Job
from .locking import LockHeld, acquire_job_lock
from .provenance import file_sha256, package_versions

RUN_LOG = "run.log"
STATUS_APPROXIMATE = "approximate"  # a --quick run: exit 0, outputs written, latest not moved
log = logging.getLogger("smootharea.run")


@dataclass
class RunOutcome:
    """What one run did, for the command line, a scheduler or a batch.

    Unpacks like the old ``(result, paths)`` pair: ``result, paths = run_job(job)``.
    """

    exit_code: int
    status: str
    message: str
    job: str
    run_id: str | None = None
    run_dir: Path | None = None
    result: Any = None  # FitResult when the model was fitted
    paths: dict[str, Path] = field(default_factory=dict)
    record: dict[str, Any] = field(default_factory=dict)
    recorded: bool = False
    minutes: float = 0.0

    @property
    def ok(self) -> bool:
        return self.exit_code == EXIT_OK

    def __iter__(self) -> Iterator[Any]:
        return iter((self.result, self.paths))

    def summary(self) -> dict[str, Any]:
        """A small picklable summary (for batches and logs)."""
        return {"job": self.job, "exit_code": self.exit_code, "status": self.status,
                "verdict": self.record.get("verdict"), "run_id": self.run_id,
                "run_dir": str(self.run_dir) if self.run_dir else None,
                "minutes": round(self.minutes, 2), "areas_flagged": self.record.get("areas_flagged"),
                "recorded": self.recorded, "message": self.message}


# --------------------------------------------------------------------------- steps
# Thin wrappers so the heavy model stack is imported only when a run needs it
# (and so tests can replace one step).

def prepare_inputs(job: Job):
    from .pipeline import prepare
    return prepare(job)


def fit_model(job: Job, prepared, progress: bool | None, quick: bool = False):
    from .pipeline import fit
    return fit(job, progress=progress, prepared=prepared, quick=quick)


def write_run_outputs(result, run_dir: Path) -> dict[str, Path]:
    from .outputs import write_outputs
    return write_outputs(result, run_dir)


def write_report_if_available(run_dir: Path) -> None:
    """Hook: the report module (owned elsewhere) writes its report into the run folder.

    A report failure is a warning, not a failed run: the estimates are already on disk.
    """
    try:
        report = importlib.import_module("smootharea.report")
    except ModuleNotFoundError as error:
        if error.name == "smootharea.report":
            log.info("no report module installed; skipping the report")
            return
        log.warning("the report module could not be loaded (%s); no report written", error)
        return
    except Exception as error:  # noqa: BLE001 - a broken report module must not fail the run
        log.warning("the report module could not be loaded (%s: %s); no report written",
                    type(error).__name__, error)
        return
    try:
        report.write_report(run_dir)
        log.info("report written")
    except Exception as error:  # noqa: BLE001 - any report failure must not fail the run
        log.warning("the report could not be written (%s: %s); the estimates are unaffected",
                    type(error).__name__, error)


# --------------------------------------------------------------------------- run folders

def new_run_id(now: datetime | None = None) -> str:
    """UTC timestamp plus a short random part, e.g. ``20261201T021500Z-3fa9c1``; sorts by time."""
    now = now or datetime.now(timezone.utc)
    return f"{now:%Y%m%dT%H%M%SZ}-{secrets.token_hex(3)}"


def create_run_dir(out_dir: Path, run_id: str) -> Path:
    run_dir = runs_root(out_dir) / run_id
    run_dir.mkdir(parents=True, exist_ok=False)
    return run_dir


def point_latest(out_dir: Path, run_dir: Path) -> Path:
    """Make ``<out_dir>/latest`` point at ``run_dir`` in one atomic rename."""
    link = out_dir / LATEST_LINK
    temporary = out_dir / f".{LATEST_LINK}.{run_dir.name}.tmp"
    if temporary.is_symlink() or temporary.exists():
        temporary.unlink()
    os.symlink(os.path.relpath(run_dir, out_dir), temporary)
    os.replace(temporary, link)
    _fsync_directory(out_dir)
    return link


def _fsync_directory(path: Path) -> None:
    descriptor = os.open(path, os.O_RDONLY)
    try:
        os.fsync(descriptor)
    finally:
        os.close(descriptor)


def input_file_hashes(job: Job) -> dict[str, str]:
    """SHA-256 of each input file that exists (used when loading failed)."""
    paths = [job.areas.path, job.cases.path,
             job.population.path if job.population else None,
             job.reference_rates.path if job.reference_rates else None,
             job.neighbours.add_links, job.neighbours.remove_links]
    hashes = {}
    for path in paths:
        if path is not None and Path(path).is_file():
            try:
                hashes[str(path)] = file_sha256(path)
            except OSError:
                hashes[str(path)] = "unreadable"
    return hashes


def recipe_description(job: Job) -> tuple[Any, Any]:
    """(recipe dict, prior lines) for the record, or the bare recipe name if it will not load."""
    try:
        from .recipes import load_recipe
        recipe = load_recipe(job.model.recipe, base_dir=job.base_dir)
        return recipe.to_dict(), recipe.describe_priors()
    except Exception:  # noqa: BLE001 - the fit step reports recipe problems properly
        return {"name": job.model.recipe}, None


def initial_record(job: Job, run_id: str, run_dir: Path, started: datetime) -> dict[str, Any]:
    recipe, priors = recipe_description(job)
    return {
        "run_id": run_id, "job": job.description.name, "job_file": job.file,
        "title": job.description.title, "period": job.description.period,
        "status": STATUS_RUNNING, "exit_code": None, "converged": None, "verdict": None,
        "started_at": started.isoformat(timespec="seconds"), "ended_at": None, "seconds": None,
        "host": socket.gethostname(), "pid": os.getpid(), "run_dir": run_dir,
        "seed": job.sampling.seed,
        "sampling": {"chains": job.sampling.chains, "draws": job.sampling.draws,
                     "warmup": job.sampling.warmup},
        "recipe": recipe, "priors": priors, "thresholds": list(job.report.thresholds),
        "suppress_below": job.report.suppress_below,
        "input_hashes": input_file_hashes(job), "package_versions": package_versions(),
        "diagnostics": None, "areas_flagged": None, "message": None,
    }


# --------------------------------------------------------------------------- logging

@contextmanager
def run_logging(run_dir: Path, stream: TextIO | None) -> Iterator[None]:
    """Send smootharea's (and the sampler's) log records to run.log and to ``stream``."""
    file_handler = logging.FileHandler(run_dir / RUN_LOG, encoding="utf-8")
    file_handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)-7s %(name)s: %(message)s"))
    handlers: list[logging.Handler] = [file_handler]
    if stream is not None:
        stream_handler = logging.StreamHandler(stream)
        stream_handler.setFormatter(logging.Formatter("smootharea: %(message)s"))
        handlers.append(stream_handler)
    package = logging.getLogger("smootharea")
    previous_level = package.level
    package.setLevel(logging.INFO)
    attached = [(package, h) for h in handlers] + [(logging.getLogger("pymc"), file_handler)]
    for logger, handler in attached:
        logger.addHandler(handler)
    try:
        yield
    finally:
        for logger, handler in attached:
            logger.removeHandler(handler)
        package.setLevel(previous_level)
        file_handler.close()


# --------------------------------------------------------------------------- the run

def run_job(job: Job, out_dir: str | Path | None = None, progress: bool | None = None, *,
            store_url: str | None = None, log_stream: TextIO | None = None,
            echo: bool = True, quick: bool = False) -> RunOutcome:
    """Fit ``job`` into a new run folder under ``out_dir`` (default: the job's output dir).

    Never raises for a failed run: the outcome's ``exit_code`` says what happened
    (0 converged, or an approximate run; 1 input problem; 2 not converged, outputs
    written but ``latest`` not moved; 3 output, store or sampler failure; 4 another
    run holds the lock). ``quick``: the approximate preview of :mod:`smootharea.quick`
    instead of the sampler; status ``approximate``, exit 0, ``latest`` not moved.
    The log goes to ``run.log`` in the run folder and, when ``echo``, to
    ``log_stream`` (default: standard error).
    """
    log_stream = (log_stream or sys.stderr) if echo else None
    out_root = Path(out_dir) if out_dir else job.output_dir
    started = datetime.now(timezone.utc)
    clock = time.perf_counter()
    name = job.description.name
    run_id = new_run_id(started)
    try:
        lock = acquire_job_lock(out_root, run_id)
    except LockHeld as error:
        return _early_exit(EXIT_LOCKED, "locked", f"{name}: not started: {error}", name, log_stream)
    except OSError as error:
        return _early_exit(EXIT_OUTPUT, STATUS_OUTPUT_FAILED,
                           f"{name}: cannot use output folder {out_root}: {error}", name, log_stream)
    with lock:
        try:
            run_dir = create_run_dir(out_root, run_id)
        except OSError as error:
            return _early_exit(EXIT_OUTPUT, STATUS_OUTPUT_FAILED,
                               f"{name}: cannot create a run folder in {out_root}: {error}",
                               name, log_stream)
        with run_logging(run_dir, log_stream):
            if lock.reclaimed_from_dead_run:
                holder = lock.previous_holder
                log.warning("the previous run (pid %s on %s, started %s) ended without releasing "
                            "the lock; lock reclaimed", holder.get("pid"), holder.get("host"),
                            holder.get("started"))
            outcome = RunOutcome(exit_code=EXIT_OUTPUT, status=STATUS_RUNNING, message="",
                                 job=name, run_id=run_id, run_dir=run_dir)
            outcome.record = initial_record(job, run_id, run_dir, started)
            try:
                write_run_record(run_dir, outcome.record)
                log.info("run %s of job %s started in %s", run_id, name, run_dir)
                estimate_and_publish(job, out_root, outcome, progress, quick)
            except Exception as error:  # noqa: BLE001 - e.g. run.json unwritable on a full disk
                log.exception("run failed")
                outcome.exit_code = EXIT_OUTPUT
                outcome.status = STATUS_OUTPUT_FAILED if isinstance(error, OSError) else STATUS_FAILED
                outcome.message = f"run failed: {type(error).__name__}: {error}"
            except BaseException as error:  # Ctrl-C, SystemExit: close the record, then stop
                outcome.status, outcome.message = STATUS_INTERRUPTED, f"interrupted: {error!r}"
                finish_record(outcome, started, clock)
                raise
            finish_record(outcome, started, clock)
            record_in_store(job, out_root, outcome, store_url)
            log_summary(outcome)
    return outcome


def _early_exit(code: int, status: str, message: str, job: str,
                stream: TextIO | None) -> RunOutcome:
    if stream is not None:
        print(f"smootharea: {message}", file=stream)
    return RunOutcome(exit_code=code, status=status, message=message, job=job)


def estimate_and_publish(job: Job, out_root: Path, outcome: RunOutcome,
                         progress: bool | None, quick: bool = False) -> None:
    """Load, fit, write into the run folder, then (if converged) move ``latest``.

    A quick (approximate) run stops after writing: it never moves ``latest``."""
    record, run_dir = outcome.record, outcome.run_dir
    try:
        log.info("reading and checking inputs")
        prepared = prepare_inputs(job)
    except Exception as error:  # noqa: BLE001 - anything raised while reading inputs is an input problem
        render = getattr(error, "render", None)
        outcome.exit_code, outcome.status = EXIT_INPUT, STATUS_INPUT_ERROR
        outcome.message = render() if callable(render) else f"{type(error).__name__}: {error}"
        log.error("input problem; nothing was fitted:\n%s", outcome.message)
        return
    record["input_hashes"] = dict(prepared.study.input_hashes) or record["input_hashes"]

    try:
        if quick:
            log.info("APPROXIMATE run (--quick): recipe %s by a Laplace approximation with the "
                     "hyperparameters on a grid; no sampler", job.model.recipe)
            result = fit_model(job, prepared, progress, quick=True)
        else:
            log.info("fitting recipe %s: %d chains, %d warm-up steps, then at least %d draws each "
                     "(more until converged), seed %d", job.model.recipe, job.sampling.chains,
                     job.sampling.warmup, job.sampling.draws, job.sampling.seed)
            result = fit_model(job, prepared, progress)
    except Exception as error:  # noqa: BLE001
        from .recipes import RecipeError
        if isinstance(error, RecipeError):
            outcome.exit_code, outcome.status = EXIT_INPUT, STATUS_INPUT_ERROR
        else:
            outcome.exit_code, outcome.status = EXIT_OUTPUT, STATUS_FAILED
        outcome.message = f"model fitting failed: {type(error).__name__}: {error}"
        log.error("%s", outcome.message, exc_info=not isinstance(error, RecipeError))
        return
    outcome.result = result
    verdict = result.verdict
    approximate = result.model_info.get("approximate") if quick else None
    if approximate:
        record["approximate"] = approximate
    record.update(converged=None if approximate else bool(verdict.converged),
                  verdict=f"APPROXIMATE ({approximate})" if approximate
                  else "converged" if verdict.converged
                  else "not converged: " + "; ".join(verdict.reasons),
                  diagnostics=verdict.to_dict(),
                  areas_flagged=int((result.areas["signal"] == "higher").sum()),
                  recipe=result.model_info.get("recipe", record["recipe"]),
                  priors=result.model_info.get("priors", record["priors"]),
                  package_versions=result.model_info.get("package_versions",
                                                         record["package_versions"]))
    log.info("%s: %s", "approximation" if approximate else "sampler verdict", record["verdict"])

    try:
        outcome.paths = write_run_outputs(result, run_dir)
    except Exception as error:  # noqa: BLE001 - full disk, permissions, a writer bug
        outcome.exit_code, outcome.status = EXIT_OUTPUT, STATUS_OUTPUT_FAILED
        outcome.message = (f"could not write the outputs ({type(error).__name__}: {error}); "
                           f"'{LATEST_LINK}' still shows the previous converged run")
        log.error("%s", outcome.message)
        return
    log.info("outputs written: %s", ", ".join(sorted(outcome.paths)))
    write_report_if_available(run_dir)

    if approximate:
        outcome.exit_code, outcome.status = EXIT_OK, STATUS_APPROXIMATE
        outcome.message = (f"APPROXIMATE preview ({approximate}); outputs in {run_dir}; "
                           f"'{LATEST_LINK}' not moved; rerun without --quick before publishing")
        return
    if not verdict.converged:
        outcome.exit_code, outcome.status = EXIT_NOT_CONVERGED, STATUS_NOT_CONVERGED
        outcome.message = (f"NOT CONVERGED ({'; '.join(verdict.reasons)}); outputs kept in "
                           f"{run_dir} but flagged; '{LATEST_LINK}' not moved; do not publish")
        return
    try:
        point_latest(out_root, run_dir)
    except OSError as error:
        outcome.exit_code, outcome.status = EXIT_OUTPUT, STATUS_OUTPUT_FAILED
        outcome.message = f"outputs complete in {run_dir} but '{LATEST_LINK}' could not be moved: {error}"
        log.error("%s", outcome.message)
        return
    outcome.exit_code, outcome.status = EXIT_OK, STATUS_CONVERGED
    outcome.message = f"converged; '{LATEST_LINK}' now shows {run_dir}"


def finish_record(outcome: RunOutcome, started: datetime, clock: float) -> None:
    """Complete run.json; a failure to write it turns the run into an output failure."""
    seconds = time.perf_counter() - clock
    outcome.minutes = seconds / 60
    outcome.record.update(status=outcome.status, exit_code=outcome.exit_code,
                          message=outcome.message, seconds=round(seconds, 3),
                          ended_at=datetime.now(timezone.utc).isoformat(timespec="seconds"))
    try:
        write_run_record(outcome.run_dir, outcome.record)
    except OSError as error:
        log.error("could not complete %s: %s", outcome.run_dir / "run.json", error)
        if outcome.exit_code in (EXIT_OK, EXIT_NOT_CONVERGED):
            outcome.exit_code = EXIT_OUTPUT
            outcome.message += f"; run.json could not be completed ({error})"


def record_in_store(job: Job, out_root: Path, outcome: RunOutcome, store_url: str | None) -> None:
    """Write the run (and any earlier unrecorded runs) to the history store."""
    url = resolve_store_url(job, out_root, store_url)
    store = None
    try:
        store = open_store(url)
        areas = published_areas_of(outcome.run_dir) if outcome.paths else None
        store.record_run(outcome.record, areas)
        outcome.recorded = True
        earlier = sync_run_directories(store, out_root, outcome.job)
        if earlier:
            log.info("also recorded %d earlier unrecorded run(s): %s", len(earlier), ", ".join(earlier))
    except (StoreError, OSError, ValueError) as error:
        log.error("could not record the run in the history store %s: %s", safe_url(url), error)
        note = (f"not recorded in the history store ({error}); the run folder keeps the full "
                f"record: run 'smootharea history {job.file or 'JOB.toml'} --sync' when the store is back")
        if not outcome.recorded:
            outcome.message = f"{outcome.message}; {note}" if outcome.message else note
            outcome.exit_code = EXIT_OUTPUT
    finally:
        if store is not None:
            store.dispose()


def log_summary(outcome: RunOutcome) -> None:
    """One line a scheduler's mail or journal can show."""
    flagged = outcome.record.get("areas_flagged")
    parts = [f"{outcome.job}: exit {outcome.exit_code} ({outcome.status})",
             f"run {outcome.run_id}", f"{outcome.minutes:.1f} min"]
    if flagged is not None:
        parts.insert(1, f"{flagged} area(s) flagged higher")
    line = "; ".join(parts) + (f" -- {outcome.message}" if outcome.message else "")
    level = logging.INFO if outcome.exit_code == EXIT_OK else logging.WARNING
    log.log(level, "SUMMARY %s", line.replace("\n", " | "))
