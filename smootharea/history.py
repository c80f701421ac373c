"""Run history: a database of every run, and the run records on disk it is built from.

Each run folder (``<output dir>/runs/<run id>``) holds a complete record of its
run in ``run.json`` plus the published ``areas.csv``. The history store is a
SQL database (SQLAlchemy Core; SQLite beside the outputs by default,
PostgreSQL by URL) holding the same records so that many runs and many jobs can
be listed and compared. The folders are the primary record: if the database is
down when a run ends, nothing is lost, and :func:`sync_run_directories` records
the missing runs later.

Disclosure: the store keeps only the *published* per-area table (small counts
and count-revealing columns already masked by :mod:`smootharea.disclosure`), so
nothing exported from it can reveal a small count. True counts stay in the
run folder's internal ``posterior.nc``.

The schema is created and migrated by :func:`migrate` (a ``schema_version``
table and ordered steps in :data:`MIGRATIONS`), hand-written because two small
steps do not justify Alembic's configuration files.
"""
from __future__ import annotations

import json
import math
import os
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable

import pandas as pd
import sqlalchemy as sa
from sqlalchemy.engine import Connection, Engine
from sqlalchemy.exc import SQLAlchemyError

from .job import Job, threshold_label
from .outputs import write_text_atomically

STORE_URL_VARIABLE = "SMOOTHAREA_STORE_URL"
DEFAULT_STORE_FILE = "history.sqlite"
RUNS_DIR = "runs"
LATEST_LINK = "latest"
RUN_RECORD = "run.json"
AREAS_CSV = "areas.csv"
EXCEEDANCE_PREFIX = "p_above_"

# Statuses a run can end in (``running`` only ever appears in run.json while a run is live).
STATUS_RUNNING = "running"
STATUS_CONVERGED = "converged"
STATUS_NOT_CONVERGED = "not_converged"
STATUS_INPUT_ERROR = "input_error"
STATUS_FAILED = "failed"
STATUS_OUTPUT_FAILED = "output_failed"
STATUS_INTERRUPTED = "interrupted"


class StoreError(Exception):
    """The history store could not be reached, migrated, read or written."""


# --------------------------------------------------------------------------- schema

METADATA = sa.MetaData()
AREA_NUMBER_COLUMNS = ("expected", "smr", "smr_lower", "smr_upper", "rr_mean", "rr_median",
                       "rr_lower", "rr_upper", "rr_sd", "rank_median")


def _run_columns() -> list[sa.Column]:
    """Columns of ``runs`` as created by migration 1."""
    return [
        sa.Column("run_id", sa.String(64), primary_key=True),
        sa.Column("job", sa.String(200), nullable=False, index=True),
        sa.Column("status", sa.String(32), nullable=False),
        sa.Column("exit_code", sa.Integer),
        sa.Column("converged", sa.Boolean),
        sa.Column("verdict", sa.Text),
        sa.Column("started_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("ended_at", sa.DateTime(timezone=True)),
        sa.Column("seconds", sa.Float),
        sa.Column("areas_flagged", sa.Integer),
        sa.Column("seed", sa.BigInteger),
        sa.Column("recipe", sa.JSON),
        sa.Column("priors", sa.JSON),
        sa.Column("sampling", sa.JSON),
        sa.Column("diagnostics", sa.JSON),
        sa.Column("input_hashes", sa.JSON),
        sa.Column("package_versions", sa.JSON),
        sa.Column("thresholds", sa.JSON),
        sa.Column("suppress_below", sa.Integer),
        sa.Column("run_dir", sa.Text),
        sa.Column("message", sa.Text),
        sa.Column("recorded_at", sa.DateTime(timezone=True)),
    ]


def _area_result_columns() -> list[sa.Column]:
    return [
        sa.Column("run_id", sa.String(64), sa.ForeignKey("runs.run_id", ondelete="CASCADE"),
                  primary_key=True),
        sa.Column("area_id", sa.String(200), primary_key=True),
        sa.Column("observed", sa.Integer),  # NULL where suppressed
        *[sa.Column(name, sa.Float) for name in AREA_NUMBER_COLUMNS],
        sa.Column("rank_lower", sa.Integer),
        sa.Column("rank_upper", sa.Integer),
        sa.Column("signal", sa.String(16)),
        sa.Column("suppressed", sa.Boolean),
    ]


def _area_exceedance_columns() -> list[sa.Column]:
    return [
        sa.Column("run_id", sa.String(64), sa.ForeignKey("runs.run_id", ondelete="CASCADE"),
                  primary_key=True),
        sa.Column("area_id", sa.String(200), primary_key=True),
        sa.Column("threshold", sa.Float, primary_key=True),
        sa.Column("probability", sa.Float),
    ]


# The tables as they stand after the last migration (used for every query).
RUNS = sa.Table("runs", METADATA, *_run_columns(),
                sa.Column("host", sa.String(255)), sa.Column("pid", sa.Integer))
AREA_RESULTS = sa.Table("area_results", METADATA, *_area_result_columns())
AREA_EXCEEDANCE = sa.Table("area_exceedance", METADATA, *_area_exceedance_columns())
SCHEMA_VERSION = sa.Table(
    "schema_version", METADATA,
    sa.Column("version", sa.Integer, primary_key=True),
    sa.Column("applied_at", sa.DateTime(timezone=True), nullable=False),
)


def _migration_1_initial_tables(connection: Connection) -> None:
    """Runs, per-area published results and per-threshold exceedance probabilities."""
    metadata = sa.MetaData()
    sa.Table("runs", metadata, *_run_columns())
    sa.Table("area_results", metadata, *_area_result_columns())
    sa.Table("area_exceedance", metadata, *_area_exceedance_columns())
    metadata.create_all(connection)


def _migration_2_run_host_and_pid(connection: Connection) -> None:
    """Where each run ran (host, pid), to tell interrupted runs apart; index for listing."""
    connection.execute(sa.text("ALTER TABLE runs ADD COLUMN host VARCHAR(255)"))
    connection.execute(sa.text("ALTER TABLE runs ADD COLUMN pid INTEGER"))
    connection.execute(sa.text("CREATE INDEX ix_runs_job_started ON runs (job, started_at)"))


MIGRATIONS: tuple[tuple[int, Callable[[Connection], None]], ...] = (
    (1, _migration_1_initial_tables),
    (2, _migration_2_run_host_and_pid),
)
LATEST_SCHEMA_VERSION = MIGRATIONS[-1][0]


# --------------------------------------------------------------------------- store

def default_store_url(out_dir: str | Path) -> str:
    return f"sqlite:///{Path(out_dir).resolve() / DEFAULT_STORE_FILE}"


def resolve_store_url(job: Job | None, out_dir: str | Path, explicit: str | None = None) -> str:
    """Which store a run uses: explicit argument, else the job's ``[output] store``,
    else ``$SMOOTHAREA_STORE_URL``, else SQLite beside the outputs."""
    for candidate in (explicit, job.store_url if job else None, os.environ.get(STORE_URL_VARIABLE)):
        if candidate:
            return str(candidate)
    return default_store_url(out_dir)


def safe_url(url: str) -> str:
    """The URL with any password hidden, for logs and messages."""
    try:
        return sa.make_url(url).render_as_string(hide_password=True)
    except Exception:  # an unparsable URL is shown as a placeholder, never verbatim
        return "<unparsable store URL>"


def utc_datetime(value: Any) -> datetime | None:
    """ISO text or datetime -> aware UTC datetime (SQLite hands back naive ones)."""
    if value is None or value == "":
        return None
    moment = value if isinstance(value, datetime) else datetime.fromisoformat(str(value))
    return moment.replace(tzinfo=timezone.utc) if moment.tzinfo is None else moment.astimezone(timezone.utc)


class HistoryStore:
    """The run-history database behind one URL; open with :func:`open_store`."""

    def __init__(self, url: str, engine: Engine):
        self.url = url
        self.engine = engine

    def __repr__(self) -> str:
        return f"HistoryStore({safe_url(self.url)})"

    def dispose(self) -> None:
        self.engine.dispose()

    # -- schema ------------------------------------------------------------
    def schema_version(self) -> int:
        with self._connect() as connection:
            return current_schema_version(connection)

    # -- writing -----------------------------------------------------------
    def record_run(self, record: dict[str, Any], areas: pd.DataFrame | None = None) -> bool:
        """Store one run and its published per-area table; False if it was already stored."""
        run_id = record["run_id"]
        with self._begin() as connection:
            exists = connection.execute(
                sa.select(RUNS.c.run_id).where(RUNS.c.run_id == run_id)).first()
            if exists:
                return False
            connection.execute(RUNS.insert().values(**run_row(record)))
            if areas is not None and len(areas):
                results, exceedance = area_rows(run_id, areas)
                connection.execute(AREA_RESULTS.insert(), results)
                if exceedance:
                    connection.execute(AREA_EXCEEDANCE.insert(), exceedance)
        return True

    # -- reading -----------------------------------------------------------
    def recorded_run_ids(self, job: str) -> set[str]:
        with self._connect() as connection:
            rows = connection.execute(sa.select(RUNS.c.run_id).where(RUNS.c.job == job))
            return {row.run_id for row in rows}

    def list_runs(self, job: str, limit: int | None = None) -> pd.DataFrame:
        """Runs of ``job``, newest first."""
        query = (sa.select(RUNS).where(RUNS.c.job == job)
                 .order_by(RUNS.c.started_at.desc(), RUNS.c.run_id.desc()))
        if limit:
            query = query.limit(limit)
        with self._connect() as connection:
            rows = [dict(row._mapping) for row in connection.execute(query)]
        table = pd.DataFrame(rows, columns=[c.name for c in RUNS.columns])
        for column in ("started_at", "ended_at", "recorded_at"):
            table[column] = [utc_datetime(v) for v in table[column]]
        return table

    def get_run(self, run_id: str) -> dict[str, Any] | None:
        with self._connect() as connection:
            row = connection.execute(sa.select(RUNS).where(RUNS.c.run_id == run_id)).first()
        return dict(row._mapping) if row else None

    def converged_runs(self, job: str) -> list[str]:
        """Run ids of the converged runs of ``job``, newest first."""
        query = (sa.select(RUNS.c.run_id).where(RUNS.c.job == job, RUNS.c.converged.is_(True))
                 .order_by(RUNS.c.started_at.desc(), RUNS.c.run_id.desc()))
        with self._connect() as connection:
            return [row.run_id for row in connection.execute(query)]

    def area_results(self, run_id: str) -> pd.DataFrame:
        """The published per-area table of one run, laid out like ``areas.csv``."""
        with self._connect() as connection:
            results = pd.DataFrame(
                [dict(r._mapping) for r in connection.execute(
                    sa.select(AREA_RESULTS).where(AREA_RESULTS.c.run_id == run_id))],
                columns=[c.name for c in AREA_RESULTS.columns])
            exceedance = pd.DataFrame(
                [dict(r._mapping) for r in connection.execute(
                    sa.select(AREA_EXCEEDANCE).where(AREA_EXCEEDANCE.c.run_id == run_id))],
                columns=[c.name for c in AREA_EXCEEDANCE.columns])
        return wide_area_table(results, exceedance)

    # -- plumbing ----------------------------------------------------------
    def _connect(self):
        return _guarded(self.url, self.engine.connect)

    def _begin(self):
        return _guarded(self.url, self.engine.begin)


class _guarded:
    """Context manager turning database errors into :class:`StoreError` with a safe URL."""

    def __init__(self, url: str, open_connection: Callable):
        self.url = url
        self.open_connection = open_connection
        self.context = None

    def __enter__(self) -> Connection:
        try:
            self.context = self.open_connection()
            return self.context.__enter__()
        except SQLAlchemyError as error:
            raise StoreError(f"history store {safe_url(self.url)}: {first_line(error)}") from error

    def __exit__(self, kind, error, traceback) -> bool:
        try:
            self.context.__exit__(kind, error, traceback)
        except SQLAlchemyError as closing_error:
            raise StoreError(f"history store {safe_url(self.url)}: {first_line(closing_error)}") \
                from closing_error
        if isinstance(error, SQLAlchemyError):
            raise StoreError(f"history store {safe_url(self.url)}: {first_line(error)}") from error
        return False


def first_line(error: BaseException) -> str:
    text = str(getattr(error, "orig", None) or error).strip()
    return text.splitlines()[0] if text else type(error).__name__


def create_store_engine(url: str) -> Engine:
    """An engine without a connection pool (runs are short; Dask workers fork)."""
    parsed = sa.make_url(url)
    connect_args: dict[str, Any] = {}
    if parsed.get_backend_name() == "sqlite":
        connect_args["timeout"] = 30
        if parsed.database and parsed.database != ":memory:":
            Path(parsed.database).parent.mkdir(parents=True, exist_ok=True)
    elif parsed.get_backend_name() == "postgresql":
        connect_args["connect_timeout"] = 10
    return sa.create_engine(url, poolclass=sa.pool.NullPool, connect_args=connect_args)


def open_store(url: str) -> HistoryStore:
    """Connect to the store at ``url`` and bring its schema up to date."""
    try:
        engine = create_store_engine(url)
    except (SQLAlchemyError, ValueError, ImportError, OSError) as error:
        raise StoreError(f"history store {safe_url(url)}: {first_line(error)}") from error
    store = HistoryStore(url, engine)
    migrate(store)
    return store


def current_schema_version(connection: Connection) -> int:
    if not sa.inspect(connection).has_table("schema_version"):
        return 0
    value = connection.execute(sa.select(sa.func.max(SCHEMA_VERSION.c.version))).scalar()
    return int(value or 0)


def migrate(store: HistoryStore) -> int:
    """Apply every migration step the store has not had yet, in order; return the version."""
    with store._begin() as connection:
        if connection.dialect.name == "postgresql":
            # Several workers may open a new store at once; one migrates, the others wait.
            connection.execute(sa.text("SELECT pg_advisory_xact_lock(7310542)"))
        SCHEMA_VERSION.create(connection, checkfirst=True)
        version = current_schema_version(connection)
        if version > LATEST_SCHEMA_VERSION:
            raise StoreError(f"history store {safe_url(store.url)} has schema version {version}, "
                             f"newer than this smootharea understands ({LATEST_SCHEMA_VERSION})")
        for number, step in MIGRATIONS:
            if number > version:
                step(connection)
                connection.execute(SCHEMA_VERSION.insert().values(
                    version=number, applied_at=datetime.now(timezone.utc)))
                version = number
    return version


# --------------------------------------------------------------------------- rows

RUN_RECORD_FIELDS = ("run_id", "job", "status", "exit_code", "converged", "verdict", "started_at",
                     "ended_at", "seconds", "areas_flagged", "seed", "recipe", "priors",
                     "sampling", "diagnostics", "input_hashes", "package_versions", "thresholds",
                     "suppress_below", "run_dir", "message", "host", "pid")


def run_row(record: dict[str, Any]) -> dict[str, Any]:
    """The ``runs`` row for a run record (the content of run.json)."""
    row = {key: record.get(key) for key in RUN_RECORD_FIELDS}
    row["started_at"] = utc_datetime(row["started_at"])
    row["ended_at"] = utc_datetime(row["ended_at"])
    row["recorded_at"] = datetime.now(timezone.utc)
    row["run_dir"] = str(row["run_dir"]) if row["run_dir"] is not None else None
    return row


def _number(value: Any) -> float | None:
    if value is None or value is pd.NA:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def _whole(value: Any) -> int | None:
    number = _number(value)
    return None if number is None else int(round(number))


def exceedance_columns(table: pd.DataFrame) -> dict[str, float]:
    """``p_above_<t>`` column name -> threshold t."""
    return {c: float(c[len(EXCEEDANCE_PREFIX):]) for c in table.columns
            if c.startswith(EXCEEDANCE_PREFIX)}


def area_rows(run_id: str, areas: pd.DataFrame) -> tuple[list[dict], list[dict]]:
    """Rows for ``area_results`` and ``area_exceedance`` from a published table."""
    thresholds = exceedance_columns(areas)
    results, exceedance = [], []
    for row in areas.to_dict("records"):
        area_id = str(row["area_id"])
        suppressed = row.get("suppressed")
        results.append({
            "run_id": run_id, "area_id": area_id,
            "observed": _whole(row.get("observed")),
            **{name: _number(row.get(name)) for name in AREA_NUMBER_COLUMNS},
            "rank_lower": _whole(row.get("rank_lower")),
            "rank_upper": _whole(row.get("rank_upper")),
            "signal": None if pd.isna(row.get("signal")) else str(row.get("signal")),
            "suppressed": None if suppressed is None or pd.isna(suppressed) else bool(suppressed),
        })
        exceedance += [{"run_id": run_id, "area_id": area_id, "threshold": threshold,
                        "probability": _number(row[column])}
                       for column, threshold in thresholds.items()]
    return results, exceedance


def wide_area_table(results: pd.DataFrame, exceedance: pd.DataFrame) -> pd.DataFrame:
    """Stored rows back into the ``areas.csv`` layout (one p_above_<t> column per threshold)."""
    table = results.drop(columns="run_id").copy()
    table["observed"] = table["observed"].astype("Int64")
    suppressed = table.pop("suppressed")
    if len(exceedance):
        wide = exceedance.pivot(index="area_id", columns="threshold", values="probability")
        wide.columns = [f"{EXCEEDANCE_PREFIX}{threshold_label(t)}" for t in wide.columns]
        table = table.merge(wide, left_on="area_id", right_index=True, how="left")
    table["suppressed"] = suppressed.astype("boolean")
    return table.sort_values("area_id", kind="stable").reset_index(drop=True)


# --------------------------------------------------------------------------- run folders

def runs_root(out_dir: str | Path) -> Path:
    return Path(out_dir) / RUNS_DIR


def run_directories(out_dir: str | Path) -> list[Path]:
    """Every run folder under ``<out_dir>/runs``, oldest first (run ids sort by time)."""
    root = runs_root(out_dir)
    if not root.is_dir():
        return []
    return sorted(p for p in root.iterdir() if p.is_dir() and not p.name.startswith("."))


def read_run_record(run_dir: str | Path) -> dict[str, Any] | None:
    path = Path(run_dir) / RUN_RECORD
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError):
        return None


def json_ready(value: Any) -> Any:
    """Plain JSON values: numpy scalars to Python, NaN/inf to None, paths to text."""
    if isinstance(value, dict):
        return {str(k): json_ready(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_ready(v) for v in value]
    if hasattr(value, "item") and not isinstance(value, (str, bytes)):
        value = value.item()  # numpy scalar
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, (Path, datetime)):
        return str(value)
    return value


def write_run_record(run_dir: str | Path, record: dict[str, Any]) -> None:
    """Write run.json atomically (temporary sibling, fsync, rename)."""
    text = json.dumps(json_ready(record), indent=2, allow_nan=False) + "\n"
    write_text_atomically(Path(run_dir) / RUN_RECORD, text)


def published_areas_of(run_dir: str | Path) -> pd.DataFrame | None:
    """The run's published areas.csv, or None if the run did not get that far."""
    path = Path(run_dir) / AREAS_CSV
    if not path.is_file():
        return None
    return pd.read_csv(path, dtype={"area_id": str})


def interrupted_record(run_dir: Path, job: str, record: dict[str, Any] | None) -> dict[str, Any]:
    """Close the record of a run that stopped without finishing (killed, crashed, power cut)."""
    record = dict(record or {"run_id": run_dir.name, "job": job,
                             "started_at": _started_from_run_id(run_dir.name),
                             "run_dir": str(run_dir)})
    record.update(status=STATUS_INTERRUPTED, exit_code=None, converged=None,
                  verdict=None, message="the run stopped before finishing (killed, crashed "
                  "or the machine stopped); its folder is incomplete and was not published")
    return record


def _started_from_run_id(run_id: str) -> str:
    try:
        return datetime.strptime(run_id[:16], "%Y%m%dT%H%M%SZ").replace(
            tzinfo=timezone.utc).isoformat()
    except ValueError:
        return datetime.now(timezone.utc).isoformat(timespec="seconds")


def sync_run_directories(store: HistoryStore, out_dir: str | Path, job: str,
                         live_runs_possible: bool = False) -> list[str]:
    """Record in ``store`` every run folder of ``job`` it does not have yet.

    A folder whose run.json still says ``running`` belongs to a run that was
    killed, unless ``live_runs_possible`` (someone else holds the job's lock),
    in which case it is left alone. Returns the run ids recorded.
    """
    known = store.recorded_run_ids(job)
    recorded = []
    for run_dir in run_directories(out_dir):
        if run_dir.name in known:
            continue
        record = read_run_record(run_dir)
        if record is not None and record.get("job", job) != job:
            continue
        areas = published_areas_of(run_dir)
        if record is None or record.get("status") == STATUS_RUNNING:
            if live_runs_possible:
                continue
            record, areas = interrupted_record(run_dir, job, record), None
            try:
                write_run_record(run_dir, record)
            except OSError:
                pass  # the store still gets the record; the folder stays as the killed run left it
        if store.record_run(record, areas):
            recorded.append(record["run_id"])
    return recorded
