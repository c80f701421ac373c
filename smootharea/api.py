"""Python entry points that mirror the command line, for notebook users.

>>> job = load_job("example_regions/.../job.toml")
>>> result = fit(job)
>>> result.areas        # GeoDataFrame, one row per area
>>> result.idata        # arviz.InferenceData
"""
from __future__ import annotations

import tempfile
from pathlib import Path
from typing import Sequence

import geopandas as gpd

from .job import Job, load_job, parse_job
from .pipeline import FitResult, fit, prepare
from .runner import run_job

__all__ = ["fit", "job_from_frame", "load_job", "prepare", "run_job", "FitResult"]


def job_from_frame(frame: gpd.GeoDataFrame, id: str, cases: str, *,
                   population: str | None = None, expected: str | None = None,
                   covariates: Sequence[str] = (), recipe: str = "bym2",
                   rule: str = "queen", thresholds: Sequence[float] = (1.0,),
                   chains: int = 4, draws: int = 1000, warmup: int = 1000, seed: int = 1,
                   output_dir: str | Path | None = None, workdir: str | Path | None = None) -> Job:
    """Build a job from an in-memory GeoDataFrame and column names.

    The frame is written to a GeoPackage in ``workdir`` (a new temporary folder by
    default) so it passes through exactly the same validation as a job file.
    """
    workdir = Path(workdir) if workdir else Path(tempfile.mkdtemp(prefix="smootharea-"))
    workdir.mkdir(parents=True, exist_ok=True)
    areas_path = workdir / "areas.gpkg"
    frame.to_file(areas_path, layer="areas", driver="GPKG", engine="pyogrio")
    raw: dict = {
        "areas": {"path": str(areas_path), "layer": "areas", "id": id},
        "cases": {"count": cases},
        "neighbours": {"rule": rule},
        "model": {"recipe": recipe, "covariates": list(covariates)},
        "sampling": {"chains": chains, "draws": draws, "warmup": warmup, "seed": seed},
        "report": {"thresholds": [float(t) for t in thresholds]},
        "output": {"dir": str(output_dir or workdir / "output")},
    }
    if population is not None:
        raw["population"] = {"count": population}
    if expected is not None:
        raw["expected"] = {"column": expected}
    return parse_job(raw, base_dir=workdir)
