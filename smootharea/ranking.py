"""Rankings for any threshold from a finished run's files."""
from __future__ import annotations

import json
from pathlib import Path

import arviz as az
import pandas as pd

from .job import threshold_label
from .summarise import exceedance_from_posterior, ranking_table


def ranking_from_run(run_dir: str | Path, threshold: float | None = None) -> pd.DataFrame:
    """Order areas by P(theta > threshold); recompute from posterior.nc if the job lacked it."""
    run_dir = Path(run_dir)
    table = pd.read_csv(run_dir / "areas.csv", dtype={"area_id": str})
    model = json.loads((run_dir / "model.json").read_text(encoding="utf-8"))
    threshold = float(model["thresholds"][0]) if threshold is None else float(threshold)
    column = f"p_above_{threshold_label(threshold)}"
    if column in table:
        probability = table[column].to_numpy()
    else:
        idata = az.from_netcdf(run_dir / "posterior.nc", engine="h5netcdf")
        probability = exceedance_from_posterior(idata, threshold, table["area_id"])
    return ranking_table(table, probability, threshold)
