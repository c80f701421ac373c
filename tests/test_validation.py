"""Input validation at the boundary: every problem names file, column and area.

All data here is invented: a strip of unit squares with a few counts, written to
tmp_path; each test breaks one thing and reads the message an analyst would get.
"""
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from shapely.geometry import Polygon

from conftest_loading import (bow_tie, make_job, square_strip, write_areas, write_csv,
                              write_simple_study)
from smootharea.load import load_study
from smootharea.provenance import file_sha256
from smootharea.problems import InputError, Problem


def problems_of(job) -> list[Problem]:
    with pytest.raises(InputError) as raised:
        load_study(job)
    return raised.value.problems


def find(problems: list[Problem], file: str, column: str | None, area: str | None,
         text: str) -> Problem:
    """The one problem naming this file, column and area whose message contains ``text``;
    also checks the rendered line carries all three so the analyst sees them."""
    matches = [p for p in problems if Path(p.file).name == file and p.column == column
               and p.area_id == area and text in p.message]
    assert len(matches) == 1, "\n".join(str(p) for p in problems)
    line = str(matches[0])
    assert file in line and (column is None or f"'{column}'" in line)
    assert area is None or f"area '{area}'" in line
    return matches[0]


# --------------------------------------------------------------------------- good inputs

def test_simple_study_loads_with_crude_expected(tmp_path):
    write_simple_study(tmp_path)
    study = load_study(make_job(tmp_path))
    assert study.area_ids == ("A", "B", "C")
    assert list(study.areas["area_id"]) == ["A", "B", "C"]
    assert study.observed.dtype == np.int64 and list(study.observed) == [3, 5, 2]
    assert study.expected.dtype == np.float64
    # Crude: 10 cases / 3300 people, times each population (common practice, METHODS.md 1(a)).
    assert study.expected == pytest.approx(np.array([1000, 1500, 800]) * 10 / 3300)
    assert study.standardisation == "crude: population times overall rate"
    assert study.warnings == ()
    for name in ("areas.gpkg", "cases.csv", "population.csv"):
        path = str(tmp_path / name)
        assert study.input_hashes[path] == file_sha256(tmp_path / name)


def test_numeric_and_text_ids_match_after_normalising(tmp_path):
    write_areas(tmp_path, square_strip([101, 102, 103]), name="areas.geojson")
    write_csv(tmp_path, "cases.csv", [{"code": " 101", "cases": 1}, {"code": "102 ", "cases": 2},
                                      {"code": "103", "cases": 0}])
    write_csv(tmp_path, "population.csv", [{"code": c, "persons": 100} for c in (101, 102, 103)])
    study = load_study(make_job(tmp_path, areas="areas.geojson"))
    assert study.area_ids == ("101", "102", "103")
    assert list(study.observed) == [1, 2, 0]


def test_internal_standardisation_over_two_strata(tmp_path):
    write_areas(tmp_path, square_strip(["A", "B"]))
    rows = [(a, s, g) for a in "AB" for s in "FM" for g in ("young", "old")]
    write_csv(tmp_path, "cases.csv", [{"code": a, "sex": s, "age": g, "cases": c}
                                      for (a, s, g), c in zip(rows, [1, 4, 0, 6, 2, 3, 1, 9])])
    write_csv(tmp_path, "population.csv", [{"code": a, "sex": s, "age": g, "persons": p}
                                           for (a, s, g), p in zip(rows, [900, 200, 850, 150,
                                                                          1200, 300, 1100, 250])])
    job = make_job(tmp_path,
                   cases={"path": "cases.csv", "count": "cases", "strata": ["sex", "age"]},
                   population={"path": "population.csv", "count": "persons",
                               "strata": ["sex", "age"]})
    study = load_study(job)
    assert list(study.observed) == [11, 15]
    assert study.population == pytest.approx([2100, 2850])
    # sum E = sum O exactly for an internal standard (METHODS.md section 1).
    assert study.expected.sum() == pytest.approx(26, abs=1e-9)
    assert study.standardisation == "internal indirect standardisation over strata sex, age (4 strata)"
    assert len(study.strata_rates) == 4


def test_external_reference_rates_from_parquet(tmp_path):
    write_areas(tmp_path, square_strip(["A", "B"]))
    write_csv(tmp_path, "cases.csv", [{"code": "A", "cases": 4}, {"code": "B", "cases": 9}])
    pd.DataFrame({"code": ["A", "A", "B", "B"], "age": ["young", "old"] * 2,
                  "persons": [2000, 500, 1000, 1500]}).to_parquet(tmp_path / "population.parquet")
    write_csv(tmp_path, "rates.csv", [{"age": "young", "per_person": 0.001},
                                      {"age": "old", "per_person": 0.01}])
    job = make_job(tmp_path, population={"path": "population.parquet", "count": "persons",
                                         "strata": ["age"]},
                   reference_rates={"path": "rates.csv", "strata": ["age"], "rate": "per_person"})
    study = load_study(job)
    # By hand: A = 0.001*2000 + 0.01*500 = 7; B = 0.001*1000 + 0.01*1500 = 16.
    assert study.expected == pytest.approx([7.0, 16.0])
    assert study.standardisation.startswith(f"external reference rates from {tmp_path / 'rates.csv'}")
    assert str(tmp_path / "rates.csv") in study.input_hashes


def test_counts_and_covariates_from_the_areas_layer(tmp_path):
    write_areas(tmp_path, square_strip(["A", "B", "C"], deaths=[2, 0, 5], births=[400, 300, 900],
                                       income=[1.5, 2.0, -0.5]))
    job = make_job(tmp_path, cases={"count": "deaths"}, population={"count": "births"},
                   model={"covariates": ["income"]})
    study = load_study(job)
    assert list(study.observed) == [2, 0, 5]
    assert list(study.covariates.index) == ["A", "B", "C"]
    assert study.covariates["income"].dtype == np.float64
    assert list(study.covariates["income"]) == [1.5, 2.0, -0.5]


def test_supplied_expected_and_covariate_from_the_cases_table(tmp_path):
    write_areas(tmp_path, square_strip(["A", "B"]))
    write_csv(tmp_path, "cases.csv", [{"code": "A", "cases": 3, "E": 2.5, "deprivation": 0.1},
                                      {"code": "B", "cases": 1, "E": 1.25, "deprivation": -0.3}])
    job = make_job(tmp_path, population=None, expected={"column": "E"},
                   model={"covariates": ["deprivation"]})
    study = load_study(job)
    assert study.expected == pytest.approx([2.5, 1.25])
    assert study.population is None
    assert study.standardisation == "supplied expected counts (column E)"
    assert list(study.covariates["deprivation"]) == pytest.approx([0.1, -0.3])


def test_shapefile_hashes_include_sidecars(tmp_path):
    write_areas(tmp_path, square_strip(["A", "B", "C"]), name="areas.shp")
    write_simple_study_tables(tmp_path)
    study = load_study(make_job(tmp_path, areas="areas.shp"))
    for suffix in (".shp", ".dbf", ".shx", ".prj"):
        assert str(tmp_path / f"areas{suffix}") in study.input_hashes


def write_simple_study_tables(tmp_path):
    write_csv(tmp_path, "cases.csv", [{"code": c, "cases": 1} for c in "ABC"])
    write_csv(tmp_path, "population.csv", [{"code": c, "persons": 100} for c in "ABC"])


# --------------------------------------------------------------------------- counts

def test_negative_count(tmp_path):
    write_simple_study(tmp_path, cases=(3, -2, 1))
    find(problems_of(make_job(tmp_path)), "cases.csv", "cases", "B", "negative")


def test_fractional_counts_in_cases_and_population(tmp_path):
    write_simple_study(tmp_path, cases=(3, 2.5, 1), persons=(1000, 1500, 800.5))
    problems = problems_of(make_job(tmp_path))
    find(problems, "cases.csv", "cases", "B", "not a whole number")
    find(problems, "population.csv", "persons", "C", "not a whole number")


def test_fractional_person_time_is_accepted(tmp_path):
    write_simple_study(tmp_path, persons=(1000.25, 1500.5, 800.75))
    job = make_job(tmp_path, population={"path": "population.csv", "count": "persons",
                                         "person_time": True})
    study = load_study(job)
    assert study.population == pytest.approx([1000.25, 1500.5, 800.75])
    assert study.standardisation == "crude: person-time times overall rate"


def test_missing_and_non_numeric_counts(tmp_path):
    write_areas(tmp_path, square_strip(["A", "B", "C"]))
    write_csv(tmp_path, "cases.csv", [{"code": "A", "cases": ""}, {"code": "B", "cases": "five"},
                                      {"code": "C", "cases": 1}])
    write_csv(tmp_path, "population.csv", [{"code": "A", "persons": 10}, {"code": "B", "persons": 10},
                                           {"code": "C", "persons": None}])
    problems = problems_of(make_job(tmp_path))
    find(problems, "cases.csv", "cases", "A", "missing")
    find(problems, "cases.csv", "cases", "B", "not a number")
    find(problems, "population.csv", "persons", "C", "missing")


def test_zero_population_where_cases_exist(tmp_path):
    write_simple_study(tmp_path, cases=(3, 5, 2), persons=(1000, 0, 800))
    problems = problems_of(make_job(tmp_path))
    find(problems, "population.csv", "persons", "B", "missing or 0 where there are cases")
    assert len(problems) == 1  # not also "more cases than population" or "E not positive"


def test_missing_population_for_a_stratum_with_cases(tmp_path):
    write_areas(tmp_path, square_strip(["A", "B"]))
    strata = {"strata": ["age"]}
    write_csv(tmp_path, "cases.csv", [{"code": a, "age": g, "cases": c} for a, g, c in
                                      [("A", "y", 1), ("A", "o", 2), ("B", "y", 0), ("B", "o", 3)]])
    write_csv(tmp_path, "population.csv", [{"code": a, "age": g, "persons": p} for a, g, p in
                                           [("A", "y", 100), ("A", "o", 50), ("B", "y", 80)]])
    job = make_job(tmp_path, cases={"path": "cases.csv", "count": "cases", **strata},
                   population={"path": "population.csv", "count": "persons", **strata})
    find(problems_of(job), "population.csv", "persons", "B", "missing or 0 where there are cases")


def test_cases_above_population_is_an_error_unless_person_time(tmp_path):
    write_simple_study(tmp_path, cases=(3, 50, 2), persons=(1000, 40, 800))
    find(problems_of(make_job(tmp_path)), "cases.csv", "cases", "B", "more cases than population")
    job = make_job(tmp_path, population={"path": "population.csv", "count": "persons",
                                         "person_time": True})
    assert list(load_study(job).observed) == [3, 50, 2]


def test_zero_population_and_no_cases_gives_non_positive_expected(tmp_path):
    write_simple_study(tmp_path, cases=(3, 0, 2), persons=(1000, 0, 800))
    find(problems_of(make_job(tmp_path)), "population.csv", "persons", "B",
         "computed expected count is not positive")


def test_no_cases_at_all(tmp_path):
    write_simple_study(tmp_path, cases=(0, 0, 0))
    find(problems_of(make_job(tmp_path)), "cases.csv", "cases", None, "no cases at all")


def test_supplied_expected_not_positive(tmp_path):
    write_areas(tmp_path, square_strip(["A", "B", "C"], deaths=[1, 2, 3], E=[1.5, 0.0, -2.0]))
    job = make_job(tmp_path, cases={"count": "deaths"}, population=None, expected={"column": "E"})
    problems = problems_of(job)
    find(problems, "areas.gpkg", "E", "B", "expected count must be positive")
    find(problems, "areas.gpkg", "E", "C", "expected count must be positive")


# --------------------------------------------------------------------------- ids

def test_duplicate_ids_in_the_areas_layer(tmp_path):
    write_areas(tmp_path, square_strip(["A", "B", "B"]))
    write_csv(tmp_path, "cases.csv", [{"code": "A", "cases": 1}, {"code": "B", "cases": 2}])
    write_csv(tmp_path, "population.csv", [{"code": "A", "persons": 10}, {"code": "B", "persons": 20}])
    find(problems_of(make_job(tmp_path)), "areas.gpkg", "code", "B", "more than once")


def test_duplicate_id_and_stratum_in_a_count_table(tmp_path):
    write_areas(tmp_path, square_strip(["A", "B"]))
    strata = {"strata": ["age"]}
    write_csv(tmp_path, "cases.csv", [{"code": a, "age": g, "cases": 1} for a, g in
                                      [("A", "y"), ("A", "o"), ("B", "y"), ("B", "o"), ("B", "o")]])
    write_csv(tmp_path, "population.csv", [{"code": a, "age": g, "persons": 100} for a in "AB"
                                           for g in "yo"])
    job = make_job(tmp_path, cases={"path": "cases.csv", "count": "cases", **strata},
                   population={"path": "population.csv", "count": "persons", **strata})
    problem = find(problems_of(job), "cases.csv", "code", "B", "more than one row")
    assert "age" in problem.message


def test_ids_in_one_table_and_not_another(tmp_path):
    write_areas(tmp_path, square_strip(["A", "B", "C"]))
    write_csv(tmp_path, "cases.csv", [{"code": c, "cases": 1} for c in ("A", "B", "C", "X")])
    write_csv(tmp_path, "population.csv", [{"code": c, "persons": 100} for c in ("A", "C")])
    problems = problems_of(make_job(tmp_path))
    find(problems, "cases.csv", "code", "X", "not in the areas layer")
    find(problems, "population.csv", "code", "B", "has no row in this table")


def test_many_unmatched_ids_are_capped(tmp_path):
    write_areas(tmp_path, square_strip(["A"]))
    write_csv(tmp_path, "cases.csv", [{"code": c, "cases": 1} for c in ["A"] + [f"Z{i}" for i in range(30)]])
    write_csv(tmp_path, "population.csv", [{"code": "A", "persons": 100}])
    problems = [p for p in problems_of(make_job(tmp_path)) if "not in the areas layer" in p.message]
    # ProblemLog.add_per_area: 20 named areas, then one line for the rest.
    assert len(problems) == 21
    assert "(and 10 more areas)" in problems[-1].message


def test_id_column_missing_names_the_columns_present(tmp_path):
    write_areas(tmp_path, square_strip(["A", "B"]))
    write_csv(tmp_path, "cases.csv", [{"district": "A", "cases": 1}, {"district": "B", "cases": 2}])
    write_csv(tmp_path, "population.csv", [{"code": "A", "persons": 9}, {"code": "B", "persons": 9}])
    problem = find(problems_of(make_job(tmp_path)), "cases.csv", "code", None, "id column not found")
    assert "district, cases" in problem.message
    job = make_job(tmp_path)
    areas_job = replace(job, areas=replace(job.areas, id="zone"))
    problem = find(problems_of(areas_job), "areas.gpkg", "zone", None, "id column not found")
    assert "code" in problem.message


def test_area_names_are_carried_and_a_missing_name_column_is_named(tmp_path):
    write_areas(tmp_path, square_strip(["A", "B", "C"], label=["Aldmoor", "Brenfell", "Cairnby"]))
    write_csv(tmp_path, "cases.csv", [{"code": i, "cases": 2} for i in "ABC"])
    write_csv(tmp_path, "population.csv", [{"code": i, "persons": 500} for i in "ABC"])
    job = make_job(tmp_path)
    named = replace(job, areas=replace(job.areas, name="label"))
    assert list(load_study(named).areas["area_name"]) == ["Aldmoor", "Brenfell", "Cairnby"]
    wrong = replace(job, areas=replace(job.areas, name="title"))
    problem = find(problems_of(wrong), "areas.gpkg", "title", None, "area name column not found")
    assert "label" in problem.message


def test_count_column_missing_names_the_columns_present(tmp_path):
    write_simple_study(tmp_path)
    job = make_job(tmp_path, population={"path": "population.csv", "count": "pop"})
    problem = find(problems_of(job), "population.csv", "pop", None, "count column not found")
    assert "code, persons" in problem.message


# --------------------------------------------------------------------------- strata and rates

def stratified_tables(tmp_path, case_rows, population_rows):
    write_areas(tmp_path, square_strip(["A", "B"]))
    write_csv(tmp_path, "cases.csv", case_rows)
    write_csv(tmp_path, "population.csv", population_rows)


def test_named_stratum_missing_from_a_table(tmp_path):
    stratified_tables(tmp_path, [{"code": a, "sex": "F", "cases": 1} for a in "AB"],
                      [{"code": a, "gender": "F", "persons": 100} for a in "AB"])
    job = make_job(tmp_path, cases={"path": "cases.csv", "count": "cases", "strata": ["sex"]},
                   population={"path": "population.csv", "count": "persons", "strata": ["sex"]})
    problem = find(problems_of(job), "population.csv", "sex", None, "stratum column not found")
    assert "gender" in problem.message


def test_cases_and_population_split_by_different_strata(tmp_path):
    stratified_tables(tmp_path, [{"code": a, "sex": "F", "cases": 1} for a in "AB"],
                      [{"code": a, "age": "y", "persons": 100} for a in "AB"])
    job = make_job(tmp_path, cases={"path": "cases.csv", "count": "cases", "strata": ["sex"]},
                   population={"path": "population.csv", "count": "persons", "strata": ["age"]})
    problem = find(problems_of(job), "population.csv", "age", None, "split by sex but population by age")
    assert "cases.csv" in problem.message


def test_stratum_levels_present_in_one_table_only(tmp_path):
    stratified_tables(tmp_path,
                      [{"code": a, "age": g, "cases": 1} for a in "AB" for g in ("0-44", "45+")],
                      [{"code": a, "age": g, "persons": 100} for a in "AB" for g in ("0-44", "85+")])
    job = make_job(tmp_path, cases={"path": "cases.csv", "count": "cases", "strata": ["age"]},
                   population={"path": "population.csv", "count": "persons", "strata": ["age"]})
    problems = problems_of(job)
    find(problems, "population.csv", "age", None, "no population rows for stratum age=45+")
    find(problems, "cases.csv", "age", None, "no case rows (give 0 if there were none) for stratum age=85+")


def test_reference_rate_strata_missing_from_population_and_rate_table(tmp_path):
    stratified_tables(tmp_path, [{"code": a, "cases": 1} for a in "AB"],
                      [{"code": a, "age": "y", "persons": 100} for a in "AB"])
    write_csv(tmp_path, "rates.csv", [{"age": "y", "rate": 0.01}])
    job = make_job(tmp_path, population={"path": "population.csv", "count": "persons",
                                         "strata": ["age"]},
                   reference_rates={"path": "rates.csv", "strata": ["age", "sex"], "rate": "rate"})
    problems = problems_of(job)
    find(problems, "population.csv", "sex", None, "[population] strata does not include it")
    find(problems, "rates.csv", "sex", None, "no stratum column")


def test_missing_reference_rate_for_a_stratum(tmp_path):
    stratified_tables(tmp_path, [{"code": a, "cases": 1} for a in "AB"],
                      [{"code": a, "age": g, "persons": 100} for a in "AB" for g in ("y", "o")])
    write_csv(tmp_path, "rates.csv", [{"age": "y", "rate": 0.01}, {"age": "m", "rate": ""}])
    job = make_job(tmp_path, population={"path": "population.csv", "count": "persons",
                                         "strata": ["age"]},
                   reference_rates={"path": "rates.csv", "strata": ["age"], "rate": "rate"})
    problems = problems_of(job)
    find(problems, "rates.csv", "rate", None, "no reference rate for stratum age=o")
    find(problems, "rates.csv", "rate", None, "rate for stratum age=m is missing")


# --------------------------------------------------------------------------- geometry and CRS

def test_empty_geometry_is_an_error(tmp_path):
    areas = square_strip(["A", "B", "C"])
    areas.loc[1, "geometry"] = None
    areas.loc[2, "geometry"] = Polygon()
    write_areas(tmp_path, areas)
    write_simple_study_tables(tmp_path)
    problems = problems_of(make_job(tmp_path))
    find(problems, "areas.gpkg", "geometry", "B", "empty geometry")
    find(problems, "areas.gpkg", "geometry", "C", "empty geometry")


def test_invalid_geometry_is_repaired_with_a_warning(tmp_path):
    areas = square_strip(["A", "B", "C"])
    areas.loc[1, "geometry"] = bow_tie(1.0)
    write_areas(tmp_path, areas)
    write_simple_study_tables(tmp_path)
    study = load_study(make_job(tmp_path))
    assert study.areas.geometry.is_valid.all()
    # The bow tie's two triangles (area 0.25 each) survive the repair.
    assert study.areas.geometry.iloc[1].area == pytest.approx(0.5)
    (warning,) = study.warnings
    assert "make_valid" in warning and "areas B" in warning and "areas.gpkg" in warning


@pytest.mark.filterwarnings("ignore:'crs' was not provided")
def test_missing_crs_is_a_warning(tmp_path):
    # A shapefile without its .prj sidecar has no CRS (GeoJSON would default to WGS 84).
    write_areas(tmp_path, square_strip(["A", "B", "C"], crs=None), name="areas.shp")
    assert not (tmp_path / "areas.prj").exists()
    write_simple_study_tables(tmp_path)
    study = load_study(make_job(tmp_path, areas="areas.shp"))
    assert study.areas.crs is None
    (warning,) = study.warnings
    assert "areas.shp" in warning and "coordinate reference system" in warning


# --------------------------------------------------------------------------- covariates

def test_covariate_not_numeric_or_missing(tmp_path):
    write_areas(tmp_path, square_strip(["A", "B", "C"], income=["1.5", "high", None]))
    write_simple_study_tables(tmp_path)
    problems = problems_of(make_job(tmp_path, model={"covariates": ["income"]}))
    find(problems, "areas.gpkg", "income", "B", "not a number")
    find(problems, "areas.gpkg", "income", "C", "missing")


def test_covariate_not_found(tmp_path):
    write_simple_study(tmp_path)
    problem = find(problems_of(make_job(tmp_path, model={"covariates": ["smoking"]})),
                   "areas.gpkg", "smoking", None, "covariate not found")
    assert "cases.csv" in problem.message and "code" in problem.message


# --------------------------------------------------------------------------- files

def test_missing_and_unreadable_files(tmp_path):
    write_areas(tmp_path, square_strip(["A", "B", "C"]))
    (tmp_path / "population.parquet").write_text("this is not parquet")
    job = make_job(tmp_path, population={"path": "population.parquet", "count": "persons"},
                   neighbours={"add_links": "extra_links.csv"})
    problems = problems_of(job)
    find(problems, "cases.csv", None, None, "file not found")
    find(problems, "population.parquet", None, None, "cannot read")
    find(problems, "extra_links.csv", None, None, "link file not found")


def test_missing_areas_file(tmp_path):
    write_simple_study_tables(tmp_path)
    find(problems_of(make_job(tmp_path, areas="nowhere.gpkg")), "nowhere.gpkg", None, None,
         "areas file not found")


def test_several_problems_are_reported_at_once(tmp_path):
    areas = square_strip(["A", "B", "C", "D"], income=[1.0, None, 2.0, 3.0])
    areas.loc[3, "geometry"] = None
    write_areas(tmp_path, areas)
    write_csv(tmp_path, "cases.csv", [{"code": "A", "cases": -1}, {"code": "B", "cases": 2},
                                      {"code": "C", "cases": 1.5}, {"code": "D", "cases": 1},
                                      {"code": "Q", "cases": 1}])
    write_csv(tmp_path, "population.csv", [{"code": c, "persons": 100} for c in "ABCD"])
    problems = problems_of(make_job(tmp_path, model={"covariates": ["income"]}))
    find(problems, "cases.csv", "cases", "A", "negative")
    find(problems, "cases.csv", "cases", "C", "not a whole number")
    find(problems, "cases.csv", "code", "Q", "not in the areas layer")
    find(problems, "areas.gpkg", "geometry", "D", "empty geometry")
    find(problems, "areas.gpkg", "income", "B", "missing")
    assert len(problems) == 5
