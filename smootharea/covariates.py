"""Covariate standardisation shared by the sampler's model and the quick approximation.

Kept free of PyMC so the approximate path does not pay PyMC's import.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .study import StudyData


@dataclass(frozen=True)
class CovariateScaling:
    """Means and SDs used to standardise covariates (kept to report beta per original unit)."""

    names: tuple[str, ...]
    means: np.ndarray
    sds: np.ndarray

    def standardise(self, study: StudyData) -> np.ndarray:
        """The (n_areas, n_covariates) matrix of standardised values."""
        values = study.covariates.to_numpy(dtype=float).reshape(study.n_areas, -1)
        return (values - self.means) / np.where(self.sds > 0, self.sds, 1.0)


def standardise_covariates(study: StudyData) -> CovariateScaling:
    """Means and SDs (ddof=0) of each covariate; a constant covariate is an error."""
    names = study.covariate_names
    if not names:
        return CovariateScaling((), np.empty(0), np.empty(0))
    values = study.covariates.to_numpy(dtype=float)
    means, sds = values.mean(axis=0), values.std(axis=0)
    constant = [name for name, sd in zip(names, sds) if not sd > 0]
    if constant:
        raise ValueError(f"covariate(s) {', '.join(constant)} take the same value in every area "
                         "and cannot be estimated; remove them from [model] covariates")
    return CovariateScaling(tuple(names), means, sds)
