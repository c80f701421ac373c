"""Frequentist references fitted on the same data as the Bayesian models.

Owns the Poisson GLM with log(E) offset, its Pearson overdispersion ratio, a
negative-binomial alternative (statsmodels), the global empirical Bayes
estimator of Marshall (1991) and Moran's I on the neighbour graph (esda).
These are the yardsticks the report sets beside the smoothed relative risks
(METHODS.md section 2).
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
import statsmodels.api as sm
from scipy import stats

from .graph import NeighbourGraph

INTERCEPT = "intercept"


@dataclass(frozen=True)
class Coefficient:
    """One regression coefficient on the log scale, with its rate ratio exp(estimate)."""

    estimate: float
    std_error: float
    rate_ratio: float
    rate_ratio_low: float
    rate_ratio_high: float

    @classmethod
    def from_estimate(cls, estimate: float, std_error: float, level: float = 0.95) -> "Coefficient":
        z = stats.norm.ppf(0.5 + level / 2)
        return cls(float(estimate), float(std_error), float(np.exp(estimate)),
                   float(np.exp(estimate - z * std_error)), float(np.exp(estimate + z * std_error)))

    def to_dict(self) -> dict[str, float]:
        return {"estimate": self.estimate, "std_error": self.std_error,
                "rate_ratio": self.rate_ratio, "rate_ratio_low": self.rate_ratio_low,
                "rate_ratio_high": self.rate_ratio_high}


@dataclass(frozen=True)
class NegativeBinomialFit:
    """NB2 regression (variance mu + alpha mu^2) with log(E) offset."""

    alpha: float
    alpha_std_error: float
    coefficients: dict[str, Coefficient]
    converged: bool

    def to_dict(self) -> dict[str, Any]:
        return {"alpha": self.alpha, "alpha_std_error": self.alpha_std_error,
                "converged": self.converged,
                "coefficients": {k: c.to_dict() for k, c in self.coefficients.items()}}


@dataclass(frozen=True)
class MoransI:
    """Moran's I (Moran 1950, Biometrika 37) with a permutation p-value.

    ``p_value`` is esda's folded pseudo p-value (the smaller tail);
    ``p_value_positive`` is one-sided against positive spatial autocorrelation.
    """

    i: float
    expected: float
    p_value: float
    p_value_positive: float
    z_permutation: float
    permutations: int

    def to_dict(self) -> dict[str, float | int]:
        return {"i": self.i, "expected": self.expected, "p_value": self.p_value,
                "p_value_positive": self.p_value_positive,
                "z_permutation": self.z_permutation, "permutations": self.permutations}


@dataclass(frozen=True)
class EmpiricalBayes:
    """Global empirical Bayes relative risks (Marshall 1991, Applied Statistics 40)."""

    overall_ratio: float
    between_variance: float
    shrinkage: np.ndarray
    estimate: np.ndarray

    def to_dict(self) -> dict[str, float]:
        return {"overall_ratio": self.overall_ratio, "between_variance": self.between_variance}


@dataclass(frozen=True)
class FrequentistReferences:
    """Everything :func:`fit_references` computes; per-area arrays follow area order."""

    glm: dict[str, Coefficient]
    pearson_chi2: float
    df_resid: float
    overdispersion: float
    pearson_residuals: np.ndarray
    glm_fitted: np.ndarray
    negative_binomial: NegativeBinomialFit | None
    empirical_bayes: EmpiricalBayes
    morans_i: MoransI | None
    notes: tuple[str, ...] = field(default=())

    @property
    def empirical_bayes_estimate(self) -> np.ndarray:
        return self.empirical_bayes.estimate

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready summary (per-area arrays are left out; they belong in areas.csv)."""
        return {
            "glm": {name: c.to_dict() for name, c in self.glm.items()},
            "pearson_chi2": self.pearson_chi2,
            "df_resid": self.df_resid,
            "overdispersion": self.overdispersion,
            "negative_binomial": (self.negative_binomial.to_dict()
                                  if self.negative_binomial else None),
            "empirical_bayes": self.empirical_bayes.to_dict(),
            "morans_i": self.morans_i.to_dict() if self.morans_i else None,
            "notes": list(self.notes),
        }


def fit_references(observed, expected, covariates: pd.DataFrame | None,
                   graph: NeighbourGraph, permutations: int = 999,
                   seed: int = 0) -> FrequentistReferences:
    """Fit the frequentist yardsticks on validated O, E and covariates.

    The Poisson GLM is ``log E[O_i] = log(E_i) + alpha + x_i'beta`` (statsmodels GLM,
    Poisson family, offset log E); overdispersion is Pearson chi2 / residual df.
    """
    observed = np.asarray(observed, dtype=float)
    expected = np.asarray(expected, dtype=float)
    design, names = _design(covariates, observed.size)
    offset = np.log(expected)
    notes: list[str] = []

    glm = sm.GLM(observed, design, family=sm.families.Poisson(), offset=offset).fit()
    coefficients = {name: Coefficient.from_estimate(est, se)
                    for name, est, se in zip(names, glm.params, glm.bse)}
    df_resid = float(glm.df_resid)
    pearson_chi2 = float(glm.pearson_chi2)
    overdispersion = pearson_chi2 / df_resid if df_resid > 0 else float("nan")
    if df_resid <= 0:
        notes.append("no residual degrees of freedom: overdispersion is undefined")

    negative_binomial = _negative_binomial(observed, design, offset, names, notes)
    residuals = np.asarray(glm.resid_pearson, dtype=float)
    moran = morans_i(residuals, graph, permutations=permutations, seed=seed)
    if moran is None:
        notes.append("Moran's I is undefined here (no links, or constant residuals)")
    return FrequentistReferences(
        glm=coefficients, pearson_chi2=pearson_chi2, df_resid=df_resid,
        overdispersion=overdispersion, pearson_residuals=residuals,
        glm_fitted=np.asarray(glm.fittedvalues, dtype=float),
        negative_binomial=negative_binomial,
        empirical_bayes=marshall_global_eb(observed, expected),
        morans_i=moran, notes=tuple(notes))


def extra_poisson_variance(observed, expected, covariates: pd.DataFrame | None) -> tuple[float, np.ndarray]:
    """(alpha, mu): a moment estimate of alpha in Var(O_i) = mu_i + alpha mu_i^2 around the
    Poisson GLM fit mu (statsmodels, offset log E, the job's covariates), floored at 0.

    alpha = sum((O - mu)^2 - O) / sum(mu^2), the regression-based moment estimator of the
    negative-binomial (NB2) dispersion (Cameron & Trivedi 1990, J. Econometrics 46; from
    memory). For a lognormal random effect of SD sigma, alpha is about sigma^2.
    """
    observed = np.asarray(observed, dtype=float)
    design, _ = _design(covariates, observed.size)
    fitted = np.asarray(sm.GLM(observed, design, family=sm.families.Poisson(),
                               offset=np.log(np.asarray(expected, dtype=float))).fit().fittedvalues)
    alpha = float(np.sum((observed - fitted) ** 2 - observed) / np.sum(fitted**2))
    return max(alpha, 0.0), fitted


def marshall_global_eb(observed, expected) -> EmpiricalBayes:
    """Global method-of-moments empirical Bayes (Marshall 1991, Applied Statistics 40).

    m = sum O / sum E;  s2 = sum E_i (SMR_i - m)^2 / sum E_i - m / mean(E), floored at 0;
    C_i = s2 / (s2 + m / E_i);  estimate_i = m + C_i (SMR_i - m).
    """
    observed = np.asarray(observed, dtype=float)
    expected = np.asarray(expected, dtype=float)
    smr = observed / expected
    overall = observed.sum() / expected.sum()
    variance = np.sum(expected * (smr - overall) ** 2) / expected.sum() - overall / expected.mean()
    variance = max(float(variance), 0.0)
    if variance == 0.0:
        shrinkage = np.zeros_like(expected)  # also covers m = 0 (no cases at all)
    else:
        shrinkage = variance / (variance + overall / expected)
    return EmpiricalBayes(overall_ratio=float(overall), between_variance=variance,
                          shrinkage=shrinkage, estimate=overall + shrinkage * (smr - overall))


def morans_i(values, graph: NeighbourGraph, permutations: int = 999,
             seed: int = 0) -> MoransI | None:
    """Moran's I of ``values`` on the graph, row-standardised weights (esda.Moran).

    Islands stay in the data with no weights (they add to n, not to the
    cross-products). Returns None when I is undefined: no links or constant values.
    """
    import esda  # heavy import, only needed here

    values = np.asarray(values, dtype=float)
    if graph.n_links == 0 or np.allclose(values, values.mean()):
        return None
    weights = libpysal_weights(graph)
    # esda draws its permutations from numpy's global generator: seed it for
    # reproducibility and put the caller's state back afterwards.
    state = np.random.get_state()
    try:
        np.random.seed(seed)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            result = esda.Moran(values, weights, transformation="r",
                                permutations=permutations)
    finally:
        np.random.set_state(state)
    if permutations:
        positive = (np.sum(result.sim >= result.I) + 1.0) / (permutations + 1.0)
        p_value, z_sim = float(result.p_sim), float(result.z_sim)
    else:
        positive = float(stats.norm.sf(result.z_rand))
        p_value, z_sim = float(result.p_rand), float("nan")
    return MoransI(i=float(result.I), expected=float(result.EI), p_value=p_value,
                   p_value_positive=float(positive), z_permutation=z_sim,
                   permutations=int(permutations))


def libpysal_weights(graph: NeighbourGraph):
    """libpysal W with binary weights from the graph (ids are area indices)."""
    from libpysal.weights import W

    neighbours: dict[int, list[int]] = {i: [] for i in range(graph.n_areas)}
    for i, j in graph.edges:
        neighbours[int(i)].append(int(j))
        neighbours[int(j)].append(int(i))
    return W(neighbours, silence_warnings=True)


def _design(covariates: pd.DataFrame | None, n: int) -> tuple[np.ndarray, list[str]]:
    columns = [np.ones(n)]
    names = [INTERCEPT]
    if covariates is not None:
        for name in covariates.columns:
            columns.append(covariates[name].to_numpy(dtype=float))
            names.append(str(name))
    return np.column_stack(columns), names


def _negative_binomial(observed: np.ndarray, design: np.ndarray, offset: np.ndarray,
                       names: list[str], notes: list[str]) -> NegativeBinomialFit | None:
    """NB2 by maximum likelihood (statsmodels NegativeBinomial); None if it fails."""
    from statsmodels.discrete.discrete_model import NegativeBinomial

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            fit = NegativeBinomial(observed, design, offset=offset,
                                   loglike_method="nb2").fit(disp=0, maxiter=200)
    except Exception as error:  # numerical failure is a note, not a crash
        notes.append(f"negative-binomial fit failed: {error}")
        return None
    params = np.asarray(fit.params, dtype=float)
    bse = np.asarray(fit.bse, dtype=float)
    converged = bool(fit.mle_retvals.get("converged", False))
    if not converged:
        notes.append("negative-binomial fit did not converge; its numbers are indicative only")
    coefficients = {name: Coefficient.from_estimate(est, se)
                    for name, est, se in zip(names, params[:-1], bse[:-1])}
    return NegativeBinomialFit(alpha=float(params[-1]), alpha_std_error=float(bse[-1]),
                               coefficients=coefficients, converged=converged)
