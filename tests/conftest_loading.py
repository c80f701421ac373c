"""Helpers for loading tests: tiny square areas and count tables written to tmp_path.

The data here is invented (a strip of unit squares) purely to exercise validation.
"""
from __future__ import annotations

from pathlib import Path
from typing import Any

import geopandas as gpd
import pandas as pd
from shapely.geometry import Polygon, box

from smootharea.job import Job, parse_job


def square_strip(ids: list[Any], crs: str | None = "EPSG:27700", **columns: list[Any]) -> gpd.GeoDataFrame:
    """One unit square per id, side by side along x, with extra attribute columns."""
    data = {"code": ids, **columns}
    geometry = [box(i, 0, i + 1, 1) for i in range(len(ids))]
    return gpd.GeoDataFrame(data, geometry=geometry, crs=crs)


def bow_tie(x: float) -> Polygon:
    """A self-intersecting (invalid) polygon inside the unit square at x."""
    return Polygon([(x, 0), (x + 1, 1), (x + 1, 0), (x, 1), (x, 0)])


def write_areas(tmp_path: Path, areas: gpd.GeoDataFrame, name: str = "areas.gpkg") -> Path:
    path = tmp_path / name
    areas.to_file(path, engine="pyogrio")
    return path


def write_csv(tmp_path: Path, name: str, rows: list[dict[str, Any]] | pd.DataFrame) -> Path:
    path = tmp_path / name
    frame = rows if isinstance(rows, pd.DataFrame) else pd.DataFrame(rows)
    frame.to_csv(path, index=False)
    return path


def make_job(tmp_path: Path, areas: str = "areas.gpkg", **tables: dict[str, Any]) -> Job:
    """A job over files in tmp_path; keyword tables (cases=..., population=...) override defaults."""
    raw: dict[str, Any] = {"areas": {"path": areas, "id": "code"},
                           "cases": {"path": "cases.csv", "count": "cases"},
                           "population": {"path": "population.csv", "count": "persons"}}
    for table, section in tables.items():
        if section is None:
            raw.pop(table, None)
        else:
            raw[table] = section
    return parse_job(raw, base_dir=tmp_path)


def write_simple_study(tmp_path: Path, ids=("A", "B", "C"), cases=(3, 5, 2),
                       persons=(1000, 1500, 800)) -> None:
    """Areas layer plus one-row-per-area cases and population tables, all consistent."""
    write_areas(tmp_path, square_strip(list(ids)))
    write_csv(tmp_path, "cases.csv", [{"code": i, "cases": c} for i, c in zip(ids, cases)])
    write_csv(tmp_path, "population.csv", [{"code": i, "persons": p} for i, p in zip(ids, persons)])
