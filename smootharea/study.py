"""The validated study: what every step after loading may trust.

Built once by :func:`smootharea.load.load_study`; nothing downstream re-checks it.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import geopandas as gpd
import numpy as np
import pandas as pd


@dataclass(frozen=True)
class StudyData:
    """Validated inputs for one job, all aligned on ``area_ids`` (the areas-layer order).

    Attributes:
        area_ids: area identifiers as strings, unique, in areas-layer order.
        areas: GeoDataFrame with an ``area_id`` column (str), ``area_name`` when the job names
            a name column, and valid geometry, same order.
        observed: observed case counts O_i (int64, >= 0).
        expected: expected counts E_i (float64, > 0).
        population: persons or person-time per area, or None when E was supplied.
        covariates: one float column per covariate named in the job, indexed like area_ids.
        standardisation: one line saying how E was obtained (for reports).
        input_hashes: SHA-256 of every input file, keyed by path as given.
        warnings: non-fatal remarks found while loading (missing CRS, repaired geometry).
        strata_rates: the stratum rates r_s used for indirect standardisation, if any.
    """

    area_ids: tuple[str, ...]
    areas: gpd.GeoDataFrame
    observed: np.ndarray
    expected: np.ndarray
    population: np.ndarray | None
    covariates: pd.DataFrame
    standardisation: str
    input_hashes: dict[str, str] = field(default_factory=dict)
    warnings: tuple[str, ...] = ()
    strata_rates: pd.DataFrame | None = None

    @property
    def n_areas(self) -> int:
        return len(self.area_ids)

    @property
    def covariate_names(self) -> tuple[str, ...]:
        return tuple(self.covariates.columns)
