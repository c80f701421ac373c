"""Writing one finished estimation to its output folder.

Files (all derived from the posterior and the validated inputs):
``areas.csv``, ``results.gpkg`` (layer ``areas``), ``ranking.csv``,
``model.json`` and ``posterior.nc``. Published tables pass through
:mod:`smootharea.disclosure` first; ``posterior.nc`` keeps the true counts
(it is the working record, not a publication) and must stay internal.
"""
from __future__ import annotations

import json
import os
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable

import numpy as np

from .disclosure import mask_small_counts

if TYPE_CHECKING:
    from .pipeline import FitResult

AREAS_CSV = "areas.csv"
RESULTS_GPKG = "results.gpkg"
RANKING_CSV = "ranking.csv"
MODEL_JSON = "model.json"
POSTERIOR_NC = "posterior.nc"


def write_atomically(path: Path, write: Callable[[Path], None]) -> None:
    """Write to a temporary sibling, flush it to disk, then rename, so a reader never sees half a file."""
    temporary = path.with_name(f".partial-{path.name}")  # keeps the extension drivers check
    if temporary.exists():
        temporary.unlink()
    write(temporary)
    with open(temporary, "rb+") as handle:
        os.fsync(handle.fileno())
    os.replace(temporary, path)


def write_text_atomically(path: Path, text: str) -> None:
    write_atomically(path, lambda p: p.write_text(text, encoding="utf-8"))


def json_default(value: Any) -> Any:
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (np.floating,)):
        return None if not np.isfinite(value) else float(value)
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, Path):
        return str(value)
    raise TypeError(f"not JSON serialisable: {type(value).__name__}")


def clean_for_json(value: Any) -> Any:
    """Replace NaN/inf floats by None so model.json is strict JSON."""
    if isinstance(value, dict):
        return {str(k): clean_for_json(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [clean_for_json(v) for v in value]
    if isinstance(value, float) and not np.isfinite(value):
        return None
    return value


def write_json(path: Path, content: dict[str, Any]) -> None:
    text = json.dumps(clean_for_json(content), indent=2, default=json_default, allow_nan=False)
    write_text_atomically(path, text + "\n")


def published_areas(result: "FitResult"):
    """The per-area GeoDataFrame with small counts masked."""
    return mask_small_counts(result.areas, result.prepared.job.report.suppress_below)


def write_outputs(result: "FitResult", out_dir: str | Path) -> dict[str, Path]:
    """Write every run file into ``out_dir`` and return their paths by name."""
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    paths = {name: out_dir / name for name in
             (AREAS_CSV, RESULTS_GPKG, RANKING_CSV, MODEL_JSON, POSTERIOR_NC)}
    areas = published_areas(result)
    write_atomically(paths[POSTERIOR_NC], lambda p: result.idata.to_netcdf(str(p), engine="h5netcdf"))
    write_atomically(paths[AREAS_CSV],
                     lambda p: areas.drop(columns="geometry").to_csv(p, index=False))
    write_atomically(paths[RESULTS_GPKG],
                     lambda p: areas.to_file(p, layer="areas", driver="GPKG", engine="pyogrio"))
    write_atomically(paths[RANKING_CSV], lambda p: result.ranking.to_csv(p, index=False))
    write_json(paths[MODEL_JSON], result.model_info)
    return paths
