"""The job file: one TOML file describing one estimation job.

This module only reads and checks the *file*; the data it points at is read
and validated in :mod:`smootharea.load`. Paths are resolved relative to the
job file.
"""
from __future__ import annotations

import tomllib
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

from .problems import ProblemLog

KNOWN_TABLES = {
    "job", "areas", "cases", "population", "expected", "reference_rates",
    "neighbours", "model", "sampling", "report", "output",
}


@dataclass(frozen=True)
class AreasSource:
    path: Path
    id: str
    layer: str | None = None
    name: str | None = None


@dataclass(frozen=True)
class CountSource:
    """Where a count column comes from; ``path`` None means the areas layer."""

    count: str
    id: str
    path: Path | None = None
    strata: tuple[str, ...] = ()
    person_time: bool = False


@dataclass(frozen=True)
class ReferenceRates:
    path: Path
    strata: tuple[str, ...]
    rate: str


@dataclass(frozen=True)
class NeighbourRules:
    rule: str = "queen"
    add_links: Path | None = None
    remove_links: Path | None = None


@dataclass(frozen=True)
class ModelChoice:
    recipe: str = "bym2"
    covariates: tuple[str, ...] = ()


@dataclass(frozen=True)
class Sampling:
    chains: int = 4
    # At least 500 draws, extended until converged (smootharea.sampling); 300 warm-up steps,
    # nutpie's own default: on North Carolina, the demo and the 3,024-cell grid, 300 gave the
    # same ESS and R-hat per 1,000 draws as 1,000 did.
    draws: int = 500
    warmup: int = 300
    seed: int = 20261201
    cores: int | None = None
    max_draws: int | None = None  # draws per chain may grow up to this until converged


@dataclass(frozen=True)
class ReportOptions:
    thresholds: tuple[float, ...] = (1.0,)
    interval: float = 0.95
    suppress_below: int = 5


@dataclass(frozen=True)
class Description:
    """Free text carried onto maps and reports."""

    name: str
    title: str = ""
    period: str = ""
    source: str = ""


@dataclass(frozen=True)
class Job:
    """A parsed job file. Immutable; use :func:`dataclasses.replace` to vary it."""

    file: Path | None
    description: Description
    areas: AreasSource
    cases: CountSource
    population: CountSource | None
    expected_column: str | None
    reference_rates: ReferenceRates | None
    neighbours: NeighbourRules
    model: ModelChoice
    sampling: Sampling
    report: ReportOptions
    output_dir: Path
    store_url: str | None = None
    extra: dict[str, Any] = field(default_factory=dict, compare=False)

    @property
    def base_dir(self) -> Path:
        return self.file.parent if self.file else Path.cwd()

    def with_output_dir(self, output_dir: Path) -> "Job":
        return replace(self, output_dir=Path(output_dir))


class JobFileError(Exception):
    """The job file itself is unreadable or inconsistent."""


def load_job(path: str | Path) -> Job:
    """Read a job file, resolving paths relative to it.

    Raises :class:`JobFileError` listing every problem found in the file.
    """
    path = Path(path).resolve()
    if not path.is_file():
        raise JobFileError(f"{path}: job file not found")
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as error:
        raise JobFileError(f"{path}: not valid TOML: {error}") from error
    return parse_job(raw, base_dir=path.parent, file=path)


def parse_job(raw: dict[str, Any], base_dir: Path, file: Path | None = None) -> Job:
    """Turn the TOML tables into a :class:`Job`, collecting every problem."""
    log = ProblemLog()
    where = str(file) if file else "job"
    for table in raw:
        if table not in KNOWN_TABLES:
            log.add(where, f"unknown table [{table}]; known tables are "
                    + ", ".join(sorted(KNOWN_TABLES)))

    def resolve(value: str | None) -> Path | None:
        if value is None:
            return None
        candidate = Path(value)
        return candidate if candidate.is_absolute() else (base_dir / candidate).resolve()

    def required(table: str, key: str) -> Any:
        value = raw.get(table, {}).get(key)
        if value is None:
            log.add(where, f"[{table}] needs a '{key}' key")
        return value

    areas_raw = raw.get("areas", {})
    areas_id = required("areas", "id") or "area_id"
    areas = AreasSource(path=resolve(required("areas", "path")) or Path("."),
                        id=str(areas_id), layer=areas_raw.get("layer"),
                        name=areas_raw.get("name"))

    def count_source(table: str) -> CountSource | None:
        if table not in raw:
            return None
        section = raw[table]
        return CountSource(
            count=str(required(table, "count") or ""),
            id=str(section.get("id", areas.id)),
            path=resolve(section.get("path")),
            strata=tuple(section.get("strata", ())),
            person_time=bool(section.get("person_time", False)),
        )

    if "cases" not in raw:
        log.add(where, "[cases] is required (at least its 'count' key)")
    cases = count_source("cases") or CountSource(count="", id=areas.id)
    population = count_source("population")
    expected_column = raw.get("expected", {}).get("column")
    if population is not None and expected_column is not None:
        log.add(where, "[population] and [expected] are mutually exclusive: "
                "give population counts or expected counts, not both")
    if population is None and expected_column is None:
        log.add(where, "give either [population] (with 'count') or [expected] (with 'column')")

    reference_rates = None
    if "reference_rates" in raw:
        section = raw["reference_rates"]
        reference_rates = ReferenceRates(
            path=resolve(required("reference_rates", "path")) or Path("."),
            strata=tuple(section.get("strata", ())),
            rate=str(required("reference_rates", "rate") or ""),
        )
        if population is None:
            log.add(where, "[reference_rates] needs [population] to apply the rates to")

    neighbours_raw = raw.get("neighbours", {})
    rule = neighbours_raw.get("rule", "queen")
    if rule not in ("queen", "rook"):
        log.add(where, f"[neighbours] rule must be \"queen\" or \"rook\", not {rule!r}")
    neighbours = NeighbourRules(rule=rule,
                                add_links=resolve(neighbours_raw.get("add_links")),
                                remove_links=resolve(neighbours_raw.get("remove_links")))

    model_raw = raw.get("model", {})
    model = ModelChoice(recipe=str(model_raw.get("recipe", "bym2")),
                        covariates=tuple(model_raw.get("covariates", ())))

    sampling = _sampling(raw.get("sampling", {}), where, log)
    report = _report(raw.get("report", {}), where, log)

    output_raw = raw.get("output", {})
    output_dir = resolve(output_raw.get("dir", "output"))
    job_raw = raw.get("job", {})
    default_name = file.stem if file else "job"
    description = Description(name=str(job_raw.get("name", default_name)),
                              title=str(job_raw.get("title", "")),
                              period=str(job_raw.get("period", "")),
                              source=str(job_raw.get("source", "")))
    if log.problems:
        raise JobFileError("\n".join(str(p) for p in log.problems))
    return Job(file=file, description=description, areas=areas, cases=cases,
               population=population, expected_column=expected_column,
               reference_rates=reference_rates, neighbours=neighbours, model=model,
               sampling=sampling, report=report, output_dir=output_dir,
               store_url=output_raw.get("store"), extra=dict(raw))


def _positive_int(section: dict, key: str, default: int, where: str, table: str,
                  log: ProblemLog, minimum: int = 1) -> int:
    value = section.get(key, default)
    if not isinstance(value, int) or isinstance(value, bool) or value < minimum:
        log.add(where, f"[{table}] {key} must be a whole number of at least {minimum}, not {value!r}")
        return default
    return value


def _sampling(section: dict, where: str, log: ProblemLog) -> Sampling:
    defaults = Sampling()
    cores = section.get("cores")
    max_draws = section.get("max_draws")
    draws = section.get("draws", defaults.draws)
    if max_draws is not None and (not isinstance(max_draws, int) or isinstance(max_draws, bool)
                                  or (isinstance(draws, int) and max_draws < draws)):
        log.add(where, f"[sampling] max_draws must be a whole number of at least draws, not {max_draws!r}")
        max_draws = None
    return Sampling(
        chains=_positive_int(section, "chains", defaults.chains, where, "sampling", log),
        draws=_positive_int(section, "draws", defaults.draws, where, "sampling", log),
        warmup=_positive_int(section, "warmup", defaults.warmup, where, "sampling", log),
        seed=_positive_int(section, "seed", defaults.seed, where, "sampling", log, minimum=0),
        cores=int(cores) if cores is not None else None,
        max_draws=max_draws,
    )


def _report(section: dict, where: str, log: ProblemLog) -> ReportOptions:
    thresholds = section.get("thresholds", [1.0])
    if (not isinstance(thresholds, list) or not thresholds
            or not all(isinstance(t, (int, float)) and t > 0 for t in thresholds)):
        log.add(where, f"[report] thresholds must be a non-empty list of positive numbers, not {thresholds!r}")
        thresholds = [1.0]
    interval = section.get("interval", 0.95)
    if not isinstance(interval, (int, float)) or not 0 < interval < 1:
        log.add(where, f"[report] interval must lie strictly between 0 and 1, not {interval!r}")
        interval = 0.95
    suppress_below = _positive_int(section, "suppress_below", 5, where, "report", log, minimum=0)
    return ReportOptions(thresholds=tuple(float(t) for t in thresholds),
                         interval=float(interval), suppress_below=suppress_below)


def threshold_label(threshold: float) -> str:
    """Column suffix for a threshold: 1.0 -> '1', 1.5 -> '1.5'."""
    return f"{threshold:g}"
