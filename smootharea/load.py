"""Read and validate a job's inputs into the one :class:`StudyData` every later step trusts.

Reading (files -> DataFrames: :func:`read_areas`, :func:`read_table`) is kept
apart from checking (DataFrames -> StudyData: :func:`validate_tables`), so
data already in memory goes through exactly the same checks as data read from
files. Every problem is collected in one pass and raised together as an
:class:`~smootharea.problems.InputError`, before any model is built.
"""
from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely

from .expected import (StandardisedExpected, external_standardisation,
                       internal_standardisation)
from .job import CountSource, Job
from .problems import ProblemLog
from .provenance import file_sha256
from .study import StudyData

AREA_ID = "area_id"
AREA_NAME = "area_name"
SHAPEFILE_SIDECARS = (".dbf", ".shx", ".prj", ".cpg")
TABLE_SUFFIXES = {".csv": ",", ".txt": ",", ".tsv": "\t"}
PARQUET_SUFFIXES = (".parquet", ".pq")


@dataclass(frozen=True)
class CountTable:
    """A table of counts already in memory, with where it came from.

    ``frame`` None means the file could not be read (a problem already logged).
    ``from_areas`` marks columns of the areas layer itself (no separate file).
    """

    frame: pd.DataFrame | None
    source: str
    id: str
    count: str
    strata: tuple[str, ...] = ()
    person_time: bool = False
    from_areas: bool = False


@dataclass(frozen=True)
class RateTable:
    """A reference rate table keyed by ``strata``; ``frame`` None if unreadable."""

    frame: pd.DataFrame | None
    source: str
    strata: tuple[str, ...]
    rate: str


# --------------------------------------------------------------------------- reading

def load_study(job: Job) -> StudyData:
    """Read every input named by ``job``, validate it and return the study.

    Raises :class:`~smootharea.problems.InputError` listing every problem found.
    """
    log = ProblemLog()
    hashes = hash_inputs(job, log)
    areas = read_areas(job.areas.path, job.areas.layer, log)
    cases = _count_table(job.cases, areas, job.areas.path, log)
    population = (_count_table(job.population, areas, job.areas.path, log)
                  if job.population is not None else None)
    rates = None
    if job.reference_rates is not None:
        source = job.reference_rates
        rates = RateTable(read_table(source.path, log), str(source.path),
                          source.strata, source.rate)
    return validate_tables(areas, areas_source=str(job.areas.path), area_id=job.areas.id,
                           name_column=job.areas.name, cases=cases, population=population,
                           expected_column=job.expected_column, reference_rates=rates,
                           covariates=job.model.covariates, input_hashes=hashes, log=log)


def read_areas(path: Path, layer: str | None, log: ProblemLog) -> gpd.GeoDataFrame | None:
    """Read the areas layer (GeoPackage, GeoJSON, Shapefile) with pyogrio; None if unreadable."""
    path = Path(path)
    if not path.exists():
        log.add(str(path), "areas file not found")
        return None
    try:
        areas = gpd.read_file(path, layer=layer, engine="pyogrio")
    except Exception as error:  # pyogrio raises several types; all mean "cannot read"
        log.add(str(path), f"cannot read the areas layer{_layer_note(layer)}: {error}")
        return None
    if not isinstance(areas, gpd.GeoDataFrame) or areas._geometry_column_name not in areas:
        log.add(str(path), f"the areas layer{_layer_note(layer)} has no geometry column")
        return None
    return areas


def read_table(path: Path, log: ProblemLog) -> pd.DataFrame | None:
    """Read a CSV (all columns as text, checked later) or Parquet table; None if unreadable."""
    path = Path(path)
    if not path.is_file():
        log.add(str(path), "file not found")
        return None
    suffix = path.suffix.lower()
    try:
        if suffix in TABLE_SUFFIXES:
            # Read as text so ids keep their spelling and bad numbers can be named.
            return pd.read_csv(path, dtype=str, sep=TABLE_SUFFIXES[suffix])
        if suffix in PARQUET_SUFFIXES:
            return pd.read_parquet(path)
    except Exception as error:  # parser and arrow errors alike mean "cannot read"
        log.add(str(path), f"cannot read the table: {error}")
        return None
    log.add(str(path), f"unknown table format '{suffix}': use .csv, .tsv or .parquet")
    return None


def hash_inputs(job: Job, log: ProblemLog) -> dict[str, str]:
    """SHA-256 of every input file that exists, keyed by path.

    Shapefile sidecars (.dbf, .shx, .prj, .cpg) are included. A missing link
    file is logged here because nothing else in loading reads it; other missing
    files are logged by the readers.
    """
    files: list[Path] = [Path(job.areas.path)]
    if Path(job.areas.path).suffix.lower() == ".shp":
        files += [Path(job.areas.path).with_suffix(s) for s in SHAPEFILE_SIDECARS]
    for source in (job.cases, job.population):
        if source is not None and source.path is not None:
            files.append(Path(source.path))
    if job.reference_rates is not None:
        files.append(Path(job.reference_rates.path))
    for link_file in (job.neighbours.add_links, job.neighbours.remove_links):
        if link_file is not None:
            if not Path(link_file).is_file():
                log.add(str(link_file), "neighbour link file not found")
            files.append(Path(link_file))
    return {str(f): file_sha256(f) for f in dict.fromkeys(files) if f.is_file()}


def _count_table(source: CountSource, areas: gpd.GeoDataFrame | None, areas_path: Path,
                 log: ProblemLog) -> CountTable:
    if source.path is None:
        frame = None if areas is None else pd.DataFrame(areas.drop(columns=areas.geometry.name))
        return CountTable(frame, str(areas_path), source.id, source.count, source.strata,
                          source.person_time, from_areas=True)
    return CountTable(read_table(source.path, log), str(source.path), source.id, source.count,
                      source.strata, source.person_time)


def _layer_note(layer: str | None) -> str:
    return f" '{layer}'" if layer else ""


# --------------------------------------------------------------------------- validation

def validate_tables(areas: gpd.GeoDataFrame | None, *, areas_source: str, area_id: str,
                    cases: CountTable, name_column: str | None = None, population: CountTable | None = None,
                    expected_column: str | None = None,
                    reference_rates: RateTable | None = None,
                    covariates: Sequence[str] = (),
                    input_hashes: dict[str, str] | None = None,
                    log: ProblemLog | None = None) -> StudyData:
    """Check tables already in memory and assemble the :class:`StudyData`.

    Give either ``population`` (E from crude rates, internal strata rates or
    ``reference_rates``) or ``expected_column`` (found in the cases table, else
    the areas layer). ``areas`` None means the layer could not be read.
    Raises :class:`~smootharea.problems.InputError` with every problem found.
    """
    log = log if log is not None else ProblemLog()
    if population is None and expected_column is None:
        log.add(cases.source, "give population counts or an expected-count column")
    area_frame = check_areas(areas, areas_source, area_id, log, name_column)
    cases_long = check_count_table(cases, "cases", log)
    population_long = (check_count_table(population, "population", log)
                       if population is not None else None)
    rates_long = check_rate_table(reference_rates, log) if reference_rates is not None else None

    area_ids = None if area_frame is None else list(area_frame[AREA_ID])
    check_same_areas(area_ids, areas_source, [(cases, cases_long), (population, population_long)], log)
    strata_ok = check_strata(cases, cases_long, population, population_long,
                             reference_rates, rates_long, expected_column, log)
    covariate_frame = read_covariates(covariates, areas, areas_source, area_id, area_frame, cases, log)
    supplied = (read_expected_column(expected_column, areas, areas_source, area_id, cases, log)
                if expected_column is not None else None)

    flagged = {p.area_id for p in log.problems if p.area_id is not None}
    result = None
    if population_long is not None and cases_long is not None and strata_ok:
        check_cases_against_population(cases, cases_long, population, population_long,
                                       reference_rates is None, flagged, log)
        result = compute_expected(cases, cases_long, population, population_long,
                                  reference_rates, rates_long, log)
        flagged = {p.area_id for p in log.problems if p.area_id is not None}
        if result is not None:
            _check_expected_positive(result.expected, population.source, population.count,
                                     flagged, log, computed=True)
    log.raise_if_any()

    # No problems means every table was read and, without supplied E, E was computed.
    assert area_frame is not None and cases_long is not None
    index = pd.Index(area_ids, name=AREA_ID)
    observed = cases_long.groupby(AREA_ID)["value"].sum().reindex(index)
    if supplied is not None:
        expected = supplied.reindex(index)
        standardisation = f"supplied expected counts (column {expected_column})"
        persons, rates_table = None, None
    else:
        assert population_long is not None and result is not None
        expected = result.expected.reindex(index)
        persons = population_long.groupby(AREA_ID)["value"].sum().reindex(index).to_numpy(float)
        rates_table = result.rates
        standardisation = describe_standardisation(population, reference_rates, rates_table)
    return StudyData(
        area_ids=tuple(area_ids),
        areas=area_frame.reset_index(drop=True),
        observed=observed.to_numpy().astype(np.int64),
        expected=expected.to_numpy(dtype=np.float64),
        population=persons,
        covariates=covariate_frame.set_axis(index, axis=0),
        standardisation=standardisation,
        input_hashes=dict(input_hashes or {}),
        warnings=tuple(log.warnings),
        strata_rates=rates_table,
    )


def describe_standardisation(population: CountTable, reference_rates: RateTable | None,
                             rates: pd.DataFrame) -> str:
    """One human line saying how E was obtained, for reports."""
    if reference_rates is not None:
        over = f" over strata {', '.join(reference_rates.strata)}" if reference_rates.strata else ""
        return f"external reference rates from {reference_rates.source}{over} ({len(rates)} strata)"
    if population.strata:
        return (f"internal indirect standardisation over strata {', '.join(population.strata)}"
                f" ({len(rates)} strata)")
    exposure = "person-time" if population.person_time else "population"
    return f"crude: {exposure} times overall rate"


def normalise_ids(values: pd.Series) -> pd.Series:
    """Ids as stripped text so 101, 101.0, "101" and " 101 " all read "101"; missing -> None."""
    return pd.Series([_id_text(v) for v in values], index=values.index, dtype=object)


def _id_text(value: object) -> str | None:
    if value is None or value is pd.NA or value is pd.NaT:
        return None
    if isinstance(value, (bool, np.bool_)):
        return str(value)
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        if math.isnan(value):
            return None
        return str(int(value)) if float(value).is_integer() else repr(float(value))
    text = str(value).strip()
    return text or None


def to_numbers(raw: pd.Series) -> tuple[pd.Series, pd.Series]:
    """Parse a column as finite floats; also return the mask of values present but not numbers."""
    if pd.api.types.is_bool_dtype(raw) or pd.api.types.is_numeric_dtype(raw):
        numeric = raw.astype(float)
        present = raw.notna()
    else:
        text = raw.map(lambda v: (v.strip() or None) if isinstance(v, str) else v)
        numeric = pd.to_numeric(text, errors="coerce").astype(float)
        present = text.notna()
    numeric = numeric.where(np.isfinite(numeric))
    return numeric, present & numeric.isna()


def _columns_note(frame: pd.DataFrame) -> str:
    return "the columns are: " + ", ".join(str(c) for c in frame.columns)


def check_areas(areas: gpd.GeoDataFrame | None, source: str, id_column: str,
                log: ProblemLog, name_column: str | None = None) -> gpd.GeoDataFrame | None:
    """Ids present and unique, geometry non-empty (invalid shapes repaired), CRS present.

    Returns the layer reduced to ``area_id`` (str), ``area_name`` (when a name column is
    given) and geometry, in layer order.
    """
    if areas is None:
        return None
    if id_column not in areas.columns:
        log.add(source, f"id column not found in the areas layer; {_columns_note(areas)}", id_column)
        return None
    ids = normalise_ids(areas[id_column])
    for row in np.flatnonzero(ids.isna().to_numpy()):
        log.add(source, f"row {row + 1} of the areas layer has no area id", id_column)
    duplicated = ids[ids.duplicated(keep=False) & ids.notna()].unique()
    log.add_per_area(source, id_column, duplicated, "area id appears more than once in the areas layer")

    geometry = areas.geometry.reset_index(drop=True)
    ids = ids.reset_index(drop=True)
    empty = (geometry.isna() | geometry.is_empty).to_numpy()
    log.add_per_area(source, areas.geometry.name, ids[empty & ids.notna().to_numpy()],
                     "empty geometry: the area has no shape to map or find neighbours for")
    invalid = ~empty & ~geometry.is_valid.to_numpy()
    if invalid.any():
        geometry = geometry.copy()
        geometry[invalid] = shapely.make_valid(geometry[invalid].to_numpy(),
                                               method="structure", keep_collapsed=False)
        log.warn(f"{source}: repaired {int(invalid.sum())} invalid geometr"
                 f"{'y' if invalid.sum() == 1 else 'ies'} with shapely make_valid, areas "
                 + _id_list(ids[invalid]))
    if areas.crs is None:
        log.warn(f"{source}: the areas layer has no coordinate reference system (CRS); "
                 "neighbours are unaffected but maps carry no scale or projection")
    keep = ids.notna().to_numpy()
    columns = {AREA_ID: ids[keep].astype(str).to_numpy()}
    if name_column is not None:
        if name_column in areas.columns:
            names = areas[name_column].reset_index(drop=True)[keep]
            columns[AREA_NAME] = names.fillna("").astype(str).to_numpy()
        else:
            log.add(source, f"area name column not found in the areas layer; {_columns_note(areas)}",
                    name_column)
    return gpd.GeoDataFrame(columns, geometry=geometry[keep].to_numpy(), crs=areas.crs)


def _id_list(ids: Iterable[str], limit: int = 20) -> str:
    ids = [str(i) for i in ids]
    shown = ", ".join(ids[:limit])
    return shown + (f" (and {len(ids) - limit} more)" if len(ids) > limit else "")


def check_count_table(table: CountTable | None, what: str, log: ProblemLog) -> pd.DataFrame | None:
    """Columns present; ids and strata filled; counts numeric, whole, >= 0; no duplicate rows.

    Returns a long table ``area_id, *strata, value`` (value NaN where the count is
    bad, and rows without an id dropped), or None when the table's structure is broken.
    Person-time (``person_time``) may be fractional.
    """
    if table is None or table.frame is None:
        return None
    frame, source = table.frame, table.source
    missing = [c for c in (table.id, table.count, *table.strata) if c not in frame.columns]
    for column in missing:
        role = ("id" if column == table.id else "count" if column == table.count
                else "stratum")
        log.add(source, f"{what} {role} column not found; {_columns_note(frame)}", column)
    if missing:
        return None

    ids = normalise_ids(frame[table.id])
    for row in np.flatnonzero(ids.isna().to_numpy()):
        log.add(source, f"row {row + 1} of the {what} table has no area id", table.id)
    long = pd.DataFrame({AREA_ID: ids})
    for stratum in table.strata:
        long[stratum] = normalise_ids(frame[stratum])
        log.add_per_area(source, stratum, long.loc[long[stratum].isna() & ids.notna(), AREA_ID].unique(),
                         f"stratum value missing in the {what} table")
    values, not_numeric = to_numbers(frame[table.count])
    has_id = ids.notna()

    def report(mask: pd.Series, message: str) -> None:
        log.add_per_area(source, table.count, ids[mask & has_id].unique(), message)

    report(not_numeric, f"{what} count is not a number")
    report(frame[table.count].isna() | ((~not_numeric) & values.isna()), f"{what} count is missing")
    report(values < 0, f"{what} count is negative")
    if not (what == "population" and table.person_time):
        report(values.notna() & (values != np.round(values)),
               f"{what} count is not a whole number"
               + (" (set person_time = true in [population] if it is person-time)"
                  if what == "population" else ""))
    long["value"] = values.where(values >= 0)
    if not table.from_areas:  # the areas-layer check already reports duplicate ids there
        key = [AREA_ID, *table.strata]
        duplicated = long[long.duplicated(key, keep=False) & has_id][AREA_ID].unique()
        log.add_per_area(source, table.id, duplicated,
                         f"area appears in more than one row of the {what} table"
                         + (f" for the same {', '.join(table.strata)}" if table.strata else ""))
    return long[has_id].reset_index(drop=True)


def check_rate_table(table: RateTable, log: ProblemLog) -> pd.DataFrame | None:
    """Strata and rate columns present, one finite non-negative rate per stratum."""
    if table.frame is None:
        return None
    frame, source = table.frame, table.source
    missing = [c for c in (*table.strata, table.rate) if c not in frame.columns]
    for column in missing:
        role = "rate" if column == table.rate else "stratum"
        log.add(source, f"reference rate table has no {role} column; {_columns_note(frame)}", column)
    if missing:
        return None
    long = pd.DataFrame({s: normalise_ids(frame[s]) for s in table.strata}, index=frame.index)
    values, not_numeric = to_numbers(frame[table.rate])
    long["rate"] = values.where(values >= 0)
    for row in range(len(frame)):
        stratum = _stratum_text(table.strata, long.iloc[row])
        if not_numeric.iloc[row]:
            log.add(source, f"rate for {stratum} is not a number", table.rate)
        elif pd.isna(values.iloc[row]):
            log.add(source, f"rate for {stratum} is missing", table.rate)
        elif values.iloc[row] < 0:
            log.add(source, f"rate for {stratum} is negative", table.rate)
    for stratum in table.strata:
        if long[stratum].isna().any():
            log.add(source, "stratum value missing in the reference rate table", stratum)
    if table.strata:
        for _, row in long[long.duplicated(list(table.strata), keep="first")].iterrows():
            log.add(source, f"more than one rate for {_stratum_text(table.strata, row)}",
                    ", ".join(table.strata))
    elif len(long) != 1:
        log.add(source, f"with no strata the reference rate table must have exactly one row, "
                f"not {len(long)}", table.rate)
    return long


def _stratum_text(strata: Sequence[str], row: pd.Series | tuple) -> str:
    values = list(row[list(strata)]) if isinstance(row, pd.Series) else list(row)
    if not strata:
        return "the whole population"
    return "stratum " + ", ".join(f"{s}={v}" for s, v in zip(strata, values))


def check_same_areas(area_ids: list[str] | None, areas_source: str,
                     tables: list[tuple[CountTable | None, pd.DataFrame | None]],
                     log: ProblemLog) -> None:
    """Every table covers exactly the areas of the areas layer (or of each other)."""
    present = [(t, long) for t, long in tables
               if t is not None and long is not None and not t.from_areas]
    if area_ids is not None:
        reference, reference_name = set(area_ids), f"the areas layer {areas_source}"
        ordered = area_ids
    elif len(present) >= 2:
        first, first_long = present[0]
        ordered = list(dict.fromkeys(first_long[AREA_ID]))
        reference, reference_name = set(ordered), f"{first.source}"
        present = present[1:]
    else:
        return
    for table, long in present:
        ids = list(dict.fromkeys(long[AREA_ID]))
        extra = [i for i in ids if i not in reference]
        lacking = [i for i in ordered if i not in set(ids)]
        log.add_per_area(table.source, table.id, extra, f"area is not in {reference_name}")
        log.add_per_area(table.source, table.id, lacking,
                         f"area of {reference_name} has no row in this table")


def check_strata(cases: CountTable, cases_long: pd.DataFrame | None,
                 population: CountTable | None, population_long: pd.DataFrame | None,
                 rates: RateTable | None, rates_long: pd.DataFrame | None,
                 expected_column: str | None, log: ProblemLog) -> bool:
    """Strata agree between the tables that E is computed from; False if E cannot be computed."""
    if expected_column is not None or population is None:
        return True
    if rates is not None:
        absent = [s for s in rates.strata if s not in population.strata]
        for stratum in absent:
            log.add(population.source, f"the reference rates ({rates.source}) are split by "
                    f"'{stratum}' but [population] strata does not include it", stratum)
        if absent or population_long is None or rates_long is None:
            return False
        return _check_levels(population_long, rates_long, list(rates.strata),
                             have=f"population ({population.source})",
                             lack_source=rates.source, lack_column=rates.rate,
                             lack_message="no reference rate for", log=log)
    if set(cases.strata) != set(population.strata):
        log.add(population.source,
                f"cases ({cases.source}) are split by {_strata_names(cases.strata)} but population "
                f"by {_strata_names(population.strata)}; internal standardisation needs both "
                "split by the same strata (or give [reference_rates])",
                ", ".join(population.strata) or None)
        return False
    if not population.strata or cases_long is None or population_long is None:
        return cases_long is not None and population_long is not None
    strata = list(population.strata)
    cases_ok = _check_levels(cases_long, population_long, strata, have=f"cases ({cases.source})",
                             lack_source=population.source, lack_column=", ".join(strata),
                             lack_message="no population rows for", log=log)
    population_ok = _check_levels(population_long, cases_long, strata,
                                  have=f"population ({population.source})",
                                  lack_source=cases.source, lack_column=", ".join(strata),
                                  lack_message="no case rows (give 0 if there were none) for",
                                  log=log)
    return cases_ok and population_ok


def _strata_names(strata: Sequence[str]) -> str:
    return ", ".join(strata) if strata else "no strata"


def _check_levels(having: pd.DataFrame, lacking: pd.DataFrame, strata: list[str], *, have: str,
                  lack_source: str, lack_column: str, lack_message: str, log: ProblemLog) -> bool:
    """Every stratum level in ``having`` also appears in ``lacking``."""
    if not strata:
        return True
    having_levels = having[strata].dropna().drop_duplicates()
    lacking_levels = set(lacking[strata].dropna().itertuples(index=False, name=None))
    missing = [tuple(level) for level in having_levels.itertuples(index=False, name=None)
               if tuple(level) not in lacking_levels]
    for level in missing:
        log.add(lack_source, f"{lack_message} {_stratum_text(strata, level)}, which is in {have}",
                lack_column)
    return not missing


def read_covariates(names: Sequence[str], areas: gpd.GeoDataFrame | None, areas_source: str,
                    area_id: str, area_frame: gpd.GeoDataFrame | None, cases: CountTable,
                    log: ProblemLog) -> pd.DataFrame:
    """One float column per covariate, from the areas layer or else the cases table.

    Non-numeric and missing values are problems; in a long cases table the value
    must not vary between rows of one area.
    """
    covariates = pd.DataFrame(index=range(0 if area_frame is None else len(area_frame)))
    if area_frame is None:
        return covariates
    ids = list(area_frame[AREA_ID])
    for name in names:
        if name in areas.columns:
            source, column = areas_source, areas[name]
            layer_ids = normalise_ids(areas[area_id])
            values = pd.Series(column.to_numpy(), index=layer_ids.to_numpy())
            values = values[values.index.notna()]
            values = values[~values.index.duplicated()]
        elif not cases.from_areas and cases.frame is not None and name in cases.frame.columns:
            source = cases.source
            frame = pd.DataFrame({AREA_ID: normalise_ids(cases.frame[cases.id]),
                                  name: cases.frame[name]}).dropna(subset=[AREA_ID])
            varying = frame.groupby(AREA_ID)[name].nunique(dropna=False)
            log.add_per_area(source, name, varying[varying > 1].index,
                             "covariate differs between rows of the same area")
            values = frame.drop_duplicates(AREA_ID).set_index(AREA_ID)[name]
        else:
            where = areas_source if (cases.from_areas or cases.frame is None) else \
                f"{areas_source} or {cases.source}"
            log.add(areas_source, f"covariate not found in {where}; {_columns_note(areas)}", name)
            continue
        aligned = values.reindex(ids)
        numbers, not_numeric = to_numbers(aligned.reset_index(drop=True))
        numbers.index = ids
        not_numeric.index = ids
        log.add_per_area(source, name, [i for i in ids if not_numeric[i]],
                         "covariate is not a number")
        log.add_per_area(source, name, [i for i in ids if pd.isna(numbers[i]) and not not_numeric[i]],
                         "covariate value is missing")
        covariates[name] = numbers.to_numpy()
    return covariates


def read_expected_column(column: str, areas: gpd.GeoDataFrame | None, areas_source: str,
                         area_id: str, cases: CountTable, log: ProblemLog) -> pd.Series | None:
    """Supplied E per area (summed over rows), from the cases table or else the areas layer."""
    if not cases.from_areas and cases.frame is not None and column in cases.frame.columns:
        source, id_column, frame = cases.source, cases.id, cases.frame
    elif areas is not None and column in areas.columns:
        source, id_column, frame = areas_source, area_id, areas
    else:
        if areas is not None or cases.frame is not None:
            where = " or ".join(dict.fromkeys([cases.source, areas_source]))
            columns = areas.columns if areas is not None else cases.frame.columns
            log.add(areas_source, f"expected-count column not found in {where}; the columns are: "
                    + ", ".join(str(c) for c in columns), column)
        return None
    if id_column not in frame.columns:
        return None  # already reported as a missing id column
    ids = normalise_ids(frame[id_column])
    values, not_numeric = to_numbers(frame[column])
    values.index = ids.to_numpy()
    expected = values[ids.notna().to_numpy()].groupby(level=0, sort=False).sum(min_count=1)
    bad = not_numeric.to_numpy() | frame[column].isna().to_numpy()
    log.add_per_area(source, column, ids[bad & ids.notna().to_numpy()].unique(),
                     "expected count is missing or not a number")
    _check_expected_positive(expected[~expected.index.isin(ids[bad])], source, column,
                             set(), log, computed=False)
    return expected


def _check_expected_positive(expected: pd.Series, source: str, column: str, flagged: set,
                             log: ProblemLog, computed: bool) -> None:
    """E_i > 0 for every area: log(E) is the model's offset."""
    bad = [i for i, e in expected.items() if i not in flagged and not (e > 0)]
    why = ("computed expected count is not positive (is the population 0?); the log(E) offset "
           "needs E > 0 - merge the area with a neighbour or leave it out") if computed else \
        "expected count must be positive (the model uses log(E) as offset)"
    log.add_per_area(source, column, bad, why)


def check_cases_against_population(cases: CountTable, cases_long: pd.DataFrame,
                                   population: CountTable, population_long: pd.DataFrame,
                                   by_strata: bool, flagged: set, log: ProblemLog) -> None:
    """Population present where cases exist; cases not above population unless person-time.

    Compared within each stratum for internal standardisation, else per area total.
    """
    key = [AREA_ID, *population.strata] if by_strata and population.strata else [AREA_ID]
    observed = cases_long.groupby(key)["value"].sum(min_count=1).rename("cases")
    persons = population_long.groupby(key)["value"].sum(min_count=1).rename("population")
    joined = pd.concat([observed, persons], axis=1).reset_index()
    joined = joined[~joined[AREA_ID].isin(flagged) & joined["cases"].notna()]
    no_population = joined["population"].isna() | (joined["population"] <= 0)
    log.add_per_area(population.source, population.count,
                     joined.loc[no_population & (joined["cases"] > 0), AREA_ID].unique(),
                     "population is missing or 0 where there are cases"
                     + (" (in at least one stratum)" if len(key) > 1 else ""))
    if not population.person_time:
        above = ~no_population & (joined["cases"] > joined["population"])
        log.add_per_area(cases.source, cases.count, joined.loc[above, AREA_ID].unique(),
                         f"more cases than population ({population.source}, column "
                         f"'{population.count}'); if the population is person-time set "
                         "person_time = true in [population]")


def compute_expected(cases: CountTable, cases_long: pd.DataFrame, population: CountTable,
                     population_long: pd.DataFrame, rates: RateTable | None,
                     rates_long: pd.DataFrame | None, log: ProblemLog) -> StandardisedExpected | None:
    """E per area by reference rates, internal stratum rates or the crude rate."""
    observed = cases_long.assign(value=cases_long["value"].fillna(0.0))
    persons = population_long.assign(value=population_long["value"].fillna(0.0))
    if rates is not None:
        strata = list(rates.strata)
        # Bad or repeated rate rows are already logged; keep the computation well defined.
        usable = rates_long.dropna(subset=strata).drop_duplicates(strata)
        return external_standardisation(persons, usable, strata, id=AREA_ID,
                                        population_count="value", rate="rate")
    if observed["value"].sum() <= 0:
        log.add(cases.source, "there are no cases at all, so every expected count from the "
                "study's own rates would be 0", cases.count)
        return None
    return internal_standardisation(observed, persons, list(population.strata), id=AREA_ID,
                                    cases_count="value", population_count="value")
