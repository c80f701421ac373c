"""Synthetic benchmark maps with known truth: a regular grid or an irregular Voronoi map.

Invented data (benchmark only). Counts are simulated from the BYM2 model (Riebler et al.
2016, SMMR 25):

    O_i ~ Poisson(E_i theta_i),  log theta_i = alpha + sigma (sqrt(1 - phi) v_i + sqrt(phi / s) u_i)

with v_i ~ N(0, 1), u a unit-precision ICAR draw (sum to zero) and s its scaling factor,
so the true relative risks are known and written next to the job (true_risk.csv).

``python benchmarks/synthetic.py grid 3000 OUT_DIR`` writes OUT_DIR/job.toml and its data.
"""
from __future__ import annotations

import math
import sys
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import scipy.sparse as sp
from scipy.sparse.linalg import splu
from shapely import voronoi_polygons
from shapely.geometry import MultiPoint, box

TRUE_SIGMA = 0.4
TRUE_PHI = 0.7
TRUE_ALPHA = 0.0
RATE = 0.002  # cases per person over the period


def grid_areas(n: int) -> gpd.GeoDataFrame:
    """About n unit squares in a rows x columns lattice (rows ~ 3/4 of columns)."""
    columns = max(2, round(math.sqrt(n * 4 / 3)))
    rows = max(1, round(n / columns))
    cells = [box(c, r, c + 1, r + 1) for r in range(rows) for c in range(columns)]
    return _frame(cells)


def voronoi_areas(n: int, seed: int) -> gpd.GeoDataFrame:
    """n Voronoi cells of uniform random points in a square, clipped to the square."""
    rng = np.random.default_rng(seed)
    side = math.sqrt(n)
    points = MultiPoint(rng.uniform(0, side, size=(n, 2)))
    frame = box(0, 0, side, side)
    cells = [cell.intersection(frame) for cell in voronoi_polygons(points, extend_to=frame).geoms]
    return _frame(cells)


def _frame(cells) -> gpd.GeoDataFrame:
    ids = [f"A{i:06d}" for i in range(len(cells))]
    return gpd.GeoDataFrame({"area_id": ids}, geometry=list(cells), crs="EPSG:3857")


def icar_draw(n: int, edges: np.ndarray, component: np.ndarray,
              rng: np.random.Generator) -> np.ndarray:
    """One draw of a unit-precision ICAR field, centred on every component (islands 0).

    x = (Q + eps I)^-1 (B' z1 + sqrt(eps) z2) has covariance (Q + eps I)^-1 with Q = B'B;
    centring each component then removes the only direction eps affects.
    """
    m = edges.shape[0]
    incidence = sp.csr_matrix((np.r_[np.ones(m), -np.ones(m)],
                               (np.r_[np.arange(m), np.arange(m)], edges.T.ravel())), shape=(m, n))
    eps = 1e-6
    precision = (incidence.T @ incidence + eps * sp.identity(n)).tocsc()
    draw = splu(precision).solve(incidence.T @ rng.standard_normal(m)
                                 + math.sqrt(eps) * rng.standard_normal(n))
    degree = np.bincount(edges.ravel(), minlength=n)
    for label in np.unique(component):
        members = component == label
        draw[members] -= draw[members].mean()
    draw[degree == 0] = 0.0
    return draw


def simulate(areas: gpd.GeoDataFrame, seed: int) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Populations, counts and true relative risks from BYM2 on the areas' queen graph."""
    from smootharea.graph import contiguity_edges, graph_from_edges
    rng = np.random.default_rng(seed)
    n = len(areas)
    graph = graph_from_edges(areas["area_id"], contiguity_edges(areas, "queen"))
    u = icar_draw(n, graph.edges, graph.component, rng)
    scale = np.asarray(graph.scaling_factors)[graph.component]
    island = ~np.isfinite(scale)
    spatial = np.where(island, 0.0, u / np.sqrt(np.where(island, 1.0, scale)))
    v = rng.standard_normal(n)
    weight_v = np.where(island, 1.0, math.sqrt(1 - TRUE_PHI))
    log_theta = TRUE_ALPHA + TRUE_SIGMA * (weight_v * v + math.sqrt(TRUE_PHI) * spatial)
    population = np.round(np.exp(rng.uniform(math.log(500), math.log(20000), size=n))).astype(int)
    expected_truth = population * RATE
    cases = rng.poisson(expected_truth * np.exp(log_theta))
    data = pd.DataFrame({"area_id": areas["area_id"], "cases": cases, "population": population})
    truth = pd.DataFrame({"area_id": areas["area_id"], "true_relative_risk": np.exp(log_theta)})
    return data, truth


JOB_TEMPLATE = """# Synthetic benchmark map ({kind}, {n} areas): invented data simulated from BYM2
# (sigma = {sigma}, phi = {phi}) by benchmarks/synthetic.py; true risks in true_risk.csv.

[job]
name = "synthetic_{kind}_{n}"
title = "Synthetic {kind} map, {n} areas (invented benchmark data)"
period = "simulated"
source = "benchmarks/synthetic.py, seed {seed}"

[areas]
path = "areas.gpkg"
layer = "areas"
id = "area_id"

[cases]
count = "cases"

[population]
count = "population"

[neighbours]
rule = "queen"

[model]
recipe = "bym2"

[sampling]
chains = 4
draws = 500
warmup = 300
seed = {seed}

[report]
thresholds = [1.0]
interval = 0.95
suppress_below = 5

[output]
dir = "output"
"""


def write_synthetic_job(kind: str, n: int, out_dir: Path, seed: int = 2026) -> Path:
    """Write areas.gpkg, true_risk.csv and job.toml into ``out_dir``; return the job path."""
    out_dir = Path(out_dir)
    job_path = out_dir / "job.toml"
    if job_path.is_file():
        return job_path  # generated before (same kind, size and seed)
    out_dir.mkdir(parents=True, exist_ok=True)
    areas = grid_areas(n) if kind == "grid" else voronoi_areas(n, seed)
    data, truth = simulate(areas, seed)
    layer = areas.merge(data, on="area_id")
    layer.to_file(out_dir / "areas.gpkg", layer="areas", driver="GPKG", engine="pyogrio")
    truth.to_csv(out_dir / "true_risk.csv", index=False)
    job_path.write_text(JOB_TEMPLATE.format(kind=kind, n=len(areas), seed=seed,
                                            sigma=TRUE_SIGMA, phi=TRUE_PHI), encoding="utf-8")
    return job_path


if __name__ == "__main__":
    print(write_synthetic_job(sys.argv[1], int(sys.argv[2]), Path(sys.argv[3])))
