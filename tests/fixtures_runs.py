"""A real short run of the North Carolina SIDS job, shared by the map and report tests.

Data: SIDS deaths 1974-78 in the 100 North Carolina counties (Cressie 1993, via
libpysal's bundled sids2.shp; example_regions/north_carolina). Short chains (2 x 300
after 300 warm-up) keep the test suite lean; the run need not converge for drawing
tests, and a run that does not converge exercises the report's warning banner.

Import the fixture into a test module with ``from fixtures_runs import nc_run_dir``.
The run is made once per session even when several modules import the fixture.
"""
from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import pytest

NC_JOB = Path(__file__).resolve().parents[1] / "example_regions" / "north_carolina" / "job.toml"
_CACHE: dict[str, Path] = {}


def make_short_run(out_dir: Path) -> Path:
    """Fit the North Carolina job with short chains into ``out_dir``; return the run folder."""
    from smootharea.job import load_job
    from smootharea.runner import run_job
    job = load_job(NC_JOB)
    job = replace(job, sampling=replace(job.sampling, chains=2, draws=300, warmup=300))
    outcome = run_job(job, out_dir, progress=False, echo=False)
    if outcome.run_dir is None or not (outcome.run_dir / "model.json").is_file():
        raise RuntimeError(f"the short North Carolina run failed: {outcome.message}")
    return outcome.run_dir


@pytest.fixture(scope="session")
def nc_run_dir(tmp_path_factory) -> Path:
    """Run folder of a short real North Carolina run (areas.csv, results.gpkg, model.json, ...)."""
    if "nc" not in _CACHE:
        _CACHE["nc"] = make_short_run(tmp_path_factory.mktemp("nc_short_run"))
    return _CACHE["nc"]
