"""The example regions: the invented demo country Tarvossia and North Carolina SIDS.

Tarvossia is invented data (example_regions/tarvossia/README.md); its checks are
internal consistency and recovery of the truth we simulated. North Carolina is
checked against its published source (Cressie 1993, via libpysal's bundled copy).
"""
from __future__ import annotations

import importlib.util
from pathlib import Path

import geopandas as gpd
import libpysal
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

EXAMPLES = Path(__file__).resolve().parents[1] / "example_regions"
DEMO = EXAMPLES / "tarvossia"
NC = EXAMPLES / "north_carolina"
STRATA = ["sex", "age_band"]


def _load_script(path: Path):
    spec = importlib.util.spec_from_file_location(path.stem, path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="module")
def districts() -> gpd.GeoDataFrame:
    return gpd.read_file(DEMO / "districts.gpkg", layer="districts")


@pytest.fixture(scope="module")
def cases() -> pd.DataFrame:
    return pd.read_csv(DEMO / "cases.csv", dtype={"district_id": str})


@pytest.fixture(scope="module")
def population() -> pd.DataFrame:
    return pd.read_csv(DEMO / "population.csv", dtype={"district_id": str})


@pytest.fixture(scope="module")
def truth() -> pd.DataFrame:
    return pd.read_csv(DEMO / "true_risk.csv", dtype={"district_id": str})


@pytest.fixture(scope="module")
def ferry() -> pd.DataFrame:
    return pd.read_csv(DEMO / "ferry_links.csv", dtype=str)


@pytest.fixture(scope="module")
def nc_counties() -> gpd.GeoDataFrame:
    return gpd.read_file(NC / "nc_counties.gpkg", layer="counties")


# --- Tarvossia (invented) -------------------------------------------------------

def test_demo_has_150_to_400_districts_with_unique_ids(districts):
    assert 150 <= len(districts) <= 400
    assert districts["district_id"].is_unique
    assert districts["district_id"].str.fullmatch(r"D\d{3}").all()
    assert districts["name"].is_unique
    assert {"district_id", "name", "deprivation"} <= set(districts.columns)


def test_demo_tables_cover_every_district_and_stratum_exactly_once(districts, cases,
                                                                    population, truth):
    ids = set(districts["district_id"])
    for table in (cases, population, truth):
        assert set(table["district_id"]) == ids
    assert truth["district_id"].is_unique
    for table in (cases, population):
        assert not table.duplicated(["district_id", *STRATA]).any()
        strata_per_district = table.groupby("district_id").size()
        assert (strata_per_district == table[STRATA].drop_duplicates().shape[0]).all()
    keys = ["district_id", *STRATA]
    assert cases[keys].sort_values(keys).reset_index(drop=True).equals(
        population[keys].sort_values(keys).reset_index(drop=True))


def test_demo_has_two_sexes_and_at_least_five_age_bands(population):
    assert population["sex"].nunique() == 2
    assert population["age_band"].nunique() >= 5


def test_demo_counts_are_non_negative_integers(cases, population):
    for table, column in ((cases, "cases"), (population, "population")):
        assert pd.api.types.is_integer_dtype(table[column])
        assert (table[column] >= 0).all()
    assert (population.groupby("district_id")["population"].sum() > 0).all()


def test_demo_district_sizes_range_from_hundreds_to_tens_of_thousands(population):
    totals = population.groupby("district_id")["population"].sum()
    assert (totals < 1_000).sum() >= 5
    assert (totals >= 50_000).sum() >= 3


def test_demo_geometry_is_valid_polygons_in_a_metre_crs(districts):
    assert districts.crs is not None and districts.crs.is_projected
    assert districts.crs.axis_info[0].unit_name == "metre"
    assert districts.is_valid.all()
    assert (districts.geom_type == "Polygon").all()


def test_demo_islands_touch_no_mainland_district(districts, ferry):
    queen = libpysal.weights.Queen.from_dataframe(districts, use_index=False, silence_warnings=True)
    island_ids = sorted(districts["district_id"].iloc[queen.islands])
    assert 1 <= len(island_ids) <= 2
    assert island_ids == sorted(ferry["from_id"])
    islands = districts[districts["district_id"].isin(island_ids)]
    mainland = districts[~districts["district_id"].isin(island_ids)].union_all()
    assert (islands.distance(mainland) > 1_000).all()    # metres


def test_ferry_links_join_every_district_into_one_graph(districts, ferry):
    assert list(ferry.columns[:2]) == ["from_id", "to_id"]
    ids = districts["district_id"].tolist()
    assert set(ferry["from_id"]) | set(ferry["to_id"]) <= set(ids)
    queen = libpysal.weights.Queen.from_dataframe(districts, use_index=False, silence_warnings=True)
    assert queen.n_components == 1 + len(ferry)           # mainland + one per island
    position = {area: i for i, area in enumerate(ids)}
    rows, cols = queen.sparse.nonzero()
    rows = np.concatenate([rows, ferry["from_id"].map(position), ferry["to_id"].map(position)])
    cols = np.concatenate([cols, ferry["to_id"].map(position), ferry["from_id"].map(position)])
    graph = coo_matrix((np.ones(rows.size), (rows, cols)), shape=(len(ids), len(ids)))
    n_components, _ = connected_components(graph, directed=False)
    assert n_components == 1


def test_demo_deprivation_is_standardised(districts):
    assert abs(districts["deprivation"].mean()) < 0.01
    assert districts["deprivation"].std(ddof=0) == pytest.approx(1.0, abs=0.01)


def test_true_log_risk_parts_sum_to_log_relative_risk(truth):
    parts = truth[["log_risk_intercept", "log_risk_spatial", "log_risk_covariate",
                   "log_risk_unstructured"]].sum(axis=1)
    np.testing.assert_allclose(parts, np.log(truth["true_relative_risk"]), atol=5e-5)


def test_true_covariate_part_is_beta_times_deprivation(districts, truth):
    merged = truth.merge(districts[["district_id", "deprivation"]], on="district_id")
    # beta = 0.15 per unit, stated in example_regions/tarvossia/README.md
    np.testing.assert_allclose(merged["log_risk_covariate"], 0.15 * merged["deprivation"],
                               atol=1e-6)


def test_true_risk_is_relative_to_the_reference_rates(population, truth):
    rates = pd.read_csv(DEMO / "reference_rates.csv")
    expected = (population.merge(rates, on=STRATA)
                .assign(e=lambda t: t["population"] * t["rate"])
                .groupby("district_id")["e"].sum())
    merged = truth.set_index("district_id").join(expected)
    np.testing.assert_allclose(merged["expected_reference"], merged["e"], rtol=1e-6)
    weighted = (merged["expected_reference"] * merged["true_relative_risk"]).sum()
    assert weighted == pytest.approx(merged["expected_reference"].sum(), rel=1e-5)


def test_observed_total_is_within_poisson_range_of_simulated_mean(cases, truth):
    mean = (truth["expected_reference"] * truth["true_relative_risk"]).sum()
    low, high = stats.poisson.interval(0.999, mean)
    assert low <= cases["cases"].sum() <= high


def test_deprivation_effect_is_recovered_from_the_cases(districts, cases, truth):
    """Poisson GLM (statsmodels) with the other true parts in the offset recovers beta = 0.15."""
    observed = cases.groupby("district_id")["cases"].sum().rename("observed")
    data = (truth.set_index("district_id").join(observed)
            .join(districts.set_index("district_id")["deprivation"]))
    offset = np.log(data["expected_reference"]) + data["log_risk_intercept"] \
        + data["log_risk_spatial"] + data["log_risk_unstructured"]
    fit = sm.GLM(data["observed"], sm.add_constant(data["deprivation"]),
                 family=sm.families.Poisson(), offset=offset).fit()
    assert abs(fit.params["deprivation"] - 0.15) < 3 * fit.bse["deprivation"]
    assert abs(fit.params["const"]) < 3 * fit.bse["const"]


def test_demo_files_are_small():
    total = sum(path.stat().st_size for path in DEMO.iterdir() if path.is_file())
    assert total < 2_000_000


def test_make_region_regenerates_the_committed_files(tmp_path, districts):
    _load_script(DEMO / "make_region.py").main(tmp_path)
    for name in ("cases.csv", "population.csv", "reference_rates.csv", "ferry_links.csv",
                 "true_risk.csv"):
        assert (tmp_path / name).read_bytes() == (DEMO / name).read_bytes(), name
    regenerated = gpd.read_file(tmp_path / "districts.gpkg", layer="districts")
    pd.testing.assert_frame_equal(pd.DataFrame(regenerated.drop(columns="geometry")),
                                  pd.DataFrame(districts.drop(columns="geometry")))
    assert regenerated.geometry.geom_equals_exact(districts.geometry, tolerance=0).all()


def test_demo_job_files_parse_and_point_at_existing_files(districts, cases, population):
    from smootharea.job import load_job

    for name in ("job.toml", "job_reference_rates.toml"):
        job = load_job(DEMO / name)
        assert job.areas.path.is_file() and job.areas.id in districts.columns
        assert job.cases.path.is_file() and job.cases.count in cases.columns
        assert job.population.path.is_file() and job.population.count in population.columns
        assert set(job.cases.strata) == set(STRATA) == set(job.population.strata)
        assert job.neighbours.add_links.is_file()
        assert job.model.recipe == "bym2"
        assert set(job.model.covariates) <= set(districts.columns)
        assert job.report.thresholds == (1.0, 1.5)
    assert load_job(DEMO / "job_reference_rates.toml").reference_rates.path.is_file()


# --- North Carolina SIDS 1974-78 (Cressie 1993, via libpysal) -------------------

def test_nc_totals_match_the_published_data(nc_counties):
    # Cressie (1993), Statistics for Spatial Data, pp. 386-389, as bundled in libpysal
    # (sids2.shp): 100 counties, 667 SIDS deaths and 329,962 live births in 1974-78.
    assert len(nc_counties) == 100
    assert nc_counties["FIPS"].is_unique
    assert nc_counties["SID74"].sum() == 667
    assert nc_counties["BIR74"].sum() == 329_962


def test_nc_counts_are_whole_numbers_and_share_is_a_proportion(nc_counties):
    for column in ("SID74", "BIR74", "NWBIR74"):
        assert pd.api.types.is_integer_dtype(nc_counties[column])
        assert (nc_counties[column] >= 0).all()
    np.testing.assert_allclose(nc_counties["nonwhite_birth_share"],
                               nc_counties["NWBIR74"] / nc_counties["BIR74"], atol=1e-6)
    assert nc_counties["nonwhite_birth_share"].between(0, 1).all()


def test_nc_gpkg_agrees_with_libpysal_copy_county_by_county(nc_counties):
    source = gpd.read_file(libpysal.examples.get_path("sids2.shp")).set_index("FIPS")
    ours = nc_counties.set_index("FIPS")
    for column in ("SID74", "BIR74", "NWBIR74"):
        np.testing.assert_array_equal(ours[column], source.loc[ours.index, column])
    assert (ours["NAME"] == source.loc[ours.index, "NAME"]).all()


def test_nc_job_reads_counts_from_the_areas_layer(nc_counties):
    from smootharea.job import load_job

    job = load_job(NC / "job.toml")
    assert job.areas.path == (NC / "nc_counties.gpkg").resolve()
    assert job.areas.layer == "counties"
    assert job.cases.path is None and job.population.path is None
    assert {job.areas.id, job.cases.count, job.population.count} <= set(nc_counties.columns)
    assert job.model.recipe == "bym2"
