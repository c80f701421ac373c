"""Make the invented demo country Tarvossia: districts, population, simulated cases.

Everything here is invented: the country, its coastline, its district names,
its people and the disease. Nothing describes a real place or real persons.
The files are generated once, deterministically from ``SEED``, and committed;
run ``python make_region.py [OUTPUT_DIR]`` to regenerate them (default: this folder).

Simulation, for district i and stratum s (sex x age band):

    E_ref_i = sum_s r_s * P_is                      (r_s: reference_rates.csv)
    log(theta_i) = alpha + spatial_i + BETA * deprivation_i + unstructured_i
    O_is ~ Poisson(P_is * r_s * theta_i)

alpha is set so that sum_i E_ref_i * theta_i = sum_i E_ref_i, i.e. theta is
relative to the reference rates and averages 1 over the country's expected cases.
"""
from __future__ import annotations

import sys
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely
from shapely.geometry import MultiPoint, Point, Polygon

SEED = 20251201
# Arbitrary projected CRS in metres (WGS 84 / UTM zone 25S). The coordinates put the
# invented country in open ocean so that it overlaps no real land; it is not a location.
CRS = "EPSG:32725"
CENTRE = np.array([500_000.0, 5_500_000.0])

N_MAINLAND = 248
SEXES = ("female", "male")
AGE_BANDS = ("0-14", "15-44", "45-64", "65-74", "75+")

# Invented national rates of the invented disease, cases per person over the whole
# five-year period (population counted at mid-period); male rates are FEMALE x 1.25.
FEMALE_RATES = (0.00015, 0.0006, 0.0025, 0.0070, 0.0120)
MALE_RATE_RATIO = 1.25
NATIONAL_AGE_SHARES = np.array([0.17, 0.39, 0.26, 0.10, 0.08])
FEMALE_SHARE_BY_AGE = np.array([0.487, 0.495, 0.505, 0.530, 0.600])

BETA_DEPRIVATION = 0.15          # true log rate ratio per unit of deprivation
UNSTRUCTURED_SD = 0.08           # sd of the iid part of log risk
TOWNS = np.array([[-45_000.0, 30_000.0], [60_000.0, -20_000.0], [10_000.0, 75_000.0]])
# Gaussian bumps of the spatial log-risk surface: (x, y, height, width), metres from CENTRE.
BUMPS = ((55_000.0, 45_000.0, 0.45, 30_000.0), (-70_000.0, -40_000.0, -0.35, 35_000.0))
SMOOTH_FIELD_SD = 0.10           # sd of a random smooth (Fourier-feature) surface

SYLLABLES = ("ka", "vo", "ren", "tal", "mir", "os", "ul", "bre", "dun", "sel", "vik",
             "ar", "tho", "qua", "zel", "nor", "pim", "ess", "lor", "gav", "tre", "oru",
             "fen", "ska", "wyn", "dal", "ith", "mok")


def main(output_dir: Path) -> None:
    rng = np.random.default_rng(SEED)
    output_dir.mkdir(parents=True, exist_ok=True)
    coast = invented_coastline(rng)
    seeds = district_seed_points(coast, rng)
    mainland = clip_voronoi_cells(seeds, coast)
    islands = offshore_islands(coast)
    geometry = list(mainland) + list(islands)
    geometry = [shapely.set_precision(g, 1.0) for g in geometry]
    centroids = np.array([[g.centroid.x, g.centroid.y] for g in geometry]) - CENTRE
    order = np.lexsort((centroids[:, 0], -centroids[:, 1]))      # north to south
    order = np.concatenate([order[order < len(mainland)], np.arange(len(mainland), len(geometry))])
    geometry = [geometry[i] for i in order]
    centroids = centroids[order]
    n = len(geometry)
    district_ids = [f"D{i + 1:03d}" for i in range(n)]
    is_island = np.arange(n) >= len(mainland)

    urban = urbanness(centroids)
    deprivation = simulated_deprivation(centroids, urban, rng)
    population = simulated_population(urban, is_island, rng)
    rates = reference_rates()
    expected_ref = population @ rates.to_numpy()
    log_risk = true_log_risk(centroids, deprivation, expected_ref, rng)
    theta = np.exp(log_risk.sum(axis=1))
    cases = rng.poisson(population * rates.to_numpy()[None, :] * theta[:, None])

    areas = gpd.GeoDataFrame({"district_id": district_ids,
                              "name": district_names(n, rng),
                              "deprivation": deprivation},
                             geometry=geometry, crs=CRS)
    areas.to_file(output_dir / "districts.gpkg", layer="districts", driver="GPKG")
    strata = pd.MultiIndex.from_product([SEXES, AGE_BANDS], names=["sex", "age_band"])
    long_table(district_ids, strata, cases, "cases").to_csv(output_dir / "cases.csv", index=False)
    long_table(district_ids, strata, population, "population").to_csv(
        output_dir / "population.csv", index=False)
    rates.rename("rate").reset_index().to_csv(output_dir / "reference_rates.csv", index=False)
    ferry_links(areas, is_island).to_csv(output_dir / "ferry_links.csv", index=False)
    truth_table(district_ids, log_risk, theta, population, rates, expected_ref).to_csv(
        output_dir / "true_risk.csv", index=False, float_format="%.6f")
    print(f"{n} districts ({is_island.sum()} islands), population {population.sum():,}, "
          f"cases {cases.sum():,}, expected (reference) {expected_ref.sum():,.1f}, "
          f"alpha {log_risk[0, 0]:.4f}")


def invented_coastline(rng: np.random.Generator) -> Polygon:
    """A star-shaped blob about 330 km by 220 km, its edge a sum of random harmonics."""
    angles = np.linspace(0.0, 2.0 * np.pi, 360, endpoint=False)
    radius = np.ones_like(angles)
    for harmonic, amplitude in zip(range(2, 8), (0.10, 0.08, 0.05, 0.04, 0.03, 0.02)):
        radius += amplitude * np.cos(harmonic * angles + rng.uniform(0, 2 * np.pi))
    x = CENTRE[0] + 150_000.0 * radius * np.cos(angles)
    y = CENTRE[1] + 110_000.0 * radius * np.sin(angles)
    return Polygon(np.column_stack([x, y])).buffer(0)


def district_seed_points(coast: Polygon, rng: np.random.Generator) -> np.ndarray:
    """Seed points, denser near the invented towns; a minimum spacing avoids slivers."""
    minx, miny, maxx, maxy = coast.bounds
    accepted: list[np.ndarray] = []
    while len(accepted) < N_MAINLAND:
        if rng.uniform() < 0.45:
            town = TOWNS[rng.integers(len(TOWNS))]
            candidate = CENTRE + town + rng.normal(0.0, 18_000.0, size=2)
        else:
            candidate = np.array([rng.uniform(minx, maxx), rng.uniform(miny, maxy)])
        if not coast.buffer(-2_000.0).contains(Point(candidate)):
            continue
        spacing = 4_000.0 + 9_000.0 * (1.0 - urbanness((candidate - CENTRE)[None, :])[0])
        if accepted and np.min(np.hypot(*(np.array(accepted) - candidate).T)) < spacing:
            continue
        accepted.append(candidate)
    return np.array(accepted)


def clip_voronoi_cells(seeds: np.ndarray, coast: Polygon) -> list[Polygon]:
    """Voronoi cells of the seeds, clipped to the coast; a cell cut in two keeps its seed's part."""
    frame = shapely.box(*coast.buffer(50_000.0).bounds)
    cells = shapely.voronoi_polygons(MultiPoint(seeds), extend_to=frame, ordered=True)
    clipped = []
    for seed, cell in zip(seeds, shapely.get_parts(cells)):
        piece = cell.intersection(coast)
        if piece.geom_type != "Polygon":
            piece = next(p for p in shapely.get_parts(piece) if p.contains(Point(seed)))
        clipped.append(piece)
    return clipped


def offshore_islands(coast: Polygon) -> list[Polygon]:
    """Two small island districts off the east and south-west coasts (about 30 and 19 km)."""
    islands = []
    for angle, offset, radius in ((0.15, 30_000.0, 7_000.0), (3.9, 26_000.0, 4_500.0)):
        direction = np.array([np.cos(angle), np.sin(angle)])
        shore = coast.exterior.intersection(
            shapely.LineString([CENTRE, CENTRE + 400_000.0 * direction]))
        shore_point = np.array(shapely.get_coordinates(shore)[0])
        centre = shore_point + (offset + radius) * direction
        angles = np.linspace(0, 2 * np.pi, 40, endpoint=False)
        wobble = 1.0 + 0.15 * np.cos(3 * angles + angle)
        x = centre[0] + radius * wobble * np.cos(angles)
        y = centre[1] + 0.7 * radius * wobble * np.sin(angles)
        islands.append(Polygon(np.column_stack([x, y])))
    return islands


def urbanness(xy: np.ndarray) -> np.ndarray:
    """0 (remote) to 1 (town centre): nearness to the closest invented town."""
    distance = np.min(np.hypot(xy[:, None, 0] - TOWNS[None, :, 0],
                               xy[:, None, 1] - TOWNS[None, :, 1]), axis=1)
    return np.exp(-0.5 * (distance / 20_000.0) ** 2)


def simulated_deprivation(xy: np.ndarray, urban: np.ndarray,
                          rng: np.random.Generator) -> np.ndarray:
    """Deprivation score: east-west gradient + town effect + noise, standardised."""
    raw = 0.4 * xy[:, 0] / 100_000.0 + 0.5 * urban + rng.normal(0.0, 0.8, size=len(xy))
    return np.round((raw - raw.mean()) / raw.std(), 3)


def simulated_population(urban: np.ndarray, is_island: np.ndarray,
                         rng: np.random.Generator) -> np.ndarray:
    """Persons per district and stratum (sex-major, then age band), as int64 (n, 10)."""
    n = len(urban)
    log_total = rng.normal(7.7 + 2.7 * urban, 0.85)
    total = np.clip(np.exp(log_total), 250, 150_000)
    total[is_island] = (420, 1_650)
    total = np.round(total).astype(np.int64)
    population = np.empty((n, 2 * len(AGE_BANDS)), dtype=np.int64)
    ageing = np.array([-1.0, -0.5, 0.2, 0.9, 1.2])   # rural districts are older
    for i in range(n):
        shift = np.exp(ageing * 0.35 * (1.0 - 2.0 * urban[i]))
        profile = NATIONAL_AGE_SHARES * shift
        age_shares = rng.dirichlet(300.0 * profile / profile.sum())
        shares = np.concatenate([age_shares * FEMALE_SHARE_BY_AGE,
                                 age_shares * (1 - FEMALE_SHARE_BY_AGE)])
        population[i] = rng.multinomial(total[i], shares)
    return population


def reference_rates() -> pd.Series:
    """Invented national rates r_s, indexed by (sex, age_band) in the population column order."""
    values = np.concatenate([FEMALE_RATES, np.array(FEMALE_RATES) * MALE_RATE_RATIO])
    index = pd.MultiIndex.from_product([SEXES, AGE_BANDS], names=["sex", "age_band"])
    return pd.Series(np.round(values, 7), index=index, name="rate")


def true_log_risk(xy: np.ndarray, deprivation: np.ndarray, expected_ref: np.ndarray,
                  rng: np.random.Generator) -> np.ndarray:
    """Columns: intercept, spatial, covariate, unstructured (their sum is log theta)."""
    spatial = sum(height * np.exp(-0.5 * ((xy[:, 0] - bx) ** 2 + (xy[:, 1] - by) ** 2) / width ** 2)
                  for bx, by, height, width in BUMPS)
    # Random Fourier features: a smooth stationary surface with ~60 km length scale.
    frequencies = rng.normal(0.0, 1.0 / 60_000.0, size=(30, 2))
    phases = rng.uniform(0, 2 * np.pi, size=30)
    field = np.cos(xy @ frequencies.T + phases).sum(axis=1)
    spatial = spatial + SMOOTH_FIELD_SD * field / np.sqrt(30 / 2)
    covariate = BETA_DEPRIVATION * deprivation
    unstructured = rng.normal(0.0, UNSTRUCTURED_SD, size=len(xy))
    rest = spatial + covariate + unstructured
    intercept = -np.log(np.sum(expected_ref * np.exp(rest)) / np.sum(expected_ref))
    return np.column_stack([np.full(len(xy), intercept), spatial, covariate, unstructured])


def truth_table(district_ids: list[str], log_risk: np.ndarray, theta: np.ndarray,
                population: np.ndarray, rates: pd.Series, expected_ref: np.ndarray) -> pd.DataFrame:
    """The known truth, plus theta re-expressed against the noiseless internal standard.

    With the internal standard the model's E uses pooled rates
    r_s^int = sum_i O_is / sum_i P_is; their noiseless version is
    r*_s = sum_i P_is r_s theta_i / sum_i P_is, so the truth on that scale is
    theta_i * E_ref_i / sum_s r*_s P_is.
    """
    true_cases = population * rates.to_numpy()[None, :] * theta[:, None]
    pooled_rates = true_cases.sum(axis=0) / population.sum(axis=0)
    theta_internal = theta * expected_ref / (population @ pooled_rates)
    return pd.DataFrame({
        "district_id": district_ids,
        "true_relative_risk": theta,
        "true_relative_risk_internal": theta_internal,
        "log_risk_intercept": log_risk[:, 0],
        "log_risk_spatial": log_risk[:, 1],
        "log_risk_covariate": log_risk[:, 2],
        "log_risk_unstructured": log_risk[:, 3],
        "expected_reference": expected_ref,
    })


def long_table(district_ids: list[str], strata: pd.MultiIndex, values: np.ndarray,
               column: str) -> pd.DataFrame:
    """One row per district x sex x age band."""
    wide = pd.DataFrame(values, index=pd.Index(district_ids, name="district_id"), columns=strata)
    return wide.stack(["sex", "age_band"], future_stack=True).rename(column).reset_index()


def ferry_links(areas: gpd.GeoDataFrame, is_island: np.ndarray) -> pd.DataFrame:
    """Each island is linked to the mainland district nearest to it."""
    mainland = areas[~is_island]
    rows = []
    for _, island in areas[is_island].iterrows():
        nearest = mainland.geometry.distance(island.geometry).idxmin()
        rows.append((island.district_id, mainland.loc[nearest, "district_id"]))
    return pd.DataFrame(rows, columns=["from_id", "to_id"])


def district_names(n: int, rng: np.random.Generator) -> list[str]:
    """Unique invented names of two or three syllables."""
    names: list[str] = []
    while len(names) < n:
        parts = rng.choice(SYLLABLES, size=rng.integers(2, 4))
        name = "".join(parts).capitalize()
        if name not in names:
            names.append(name)
    return names


if __name__ == "__main__":
    main(Path(sys.argv[1]) if len(sys.argv) > 1 else Path(__file__).resolve().parent)
