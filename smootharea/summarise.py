"""Posterior summaries an analyst publishes: relative risks, exceedance, ranks.

Everything here is computed from the InferenceData (the source of truth) and
the validated study, so any number can be recomputed from ``posterior.nc``.
"""
from __future__ import annotations

import math

import arviz as az
import numpy as np
import pandas as pd

from .expected import smr_with_limits
from .job import threshold_label

AREA_COLUMNS = (
    "area_id", "observed", "expected", "smr", "smr_lower", "smr_upper",
    "rr_mean", "rr_median", "rr_lower", "rr_upper", "rr_sd",
    "rank_median", "rank_lower", "rank_upper", "signal",
)
HYPERPARAMETER_NAMES = ("sigma", "phi", "sigma_spatial", "sigma_unstructured", "sigma_icar")

# Decision rule of Richardson, Thomson, Best & Elliott (2004, Environ Health Perspect 112):
# raised when P(theta > c) > 0.8, lowered when < 0.2, otherwise not distinguishable.
SIGNAL_UPPER = 0.8
SIGNAL_LOWER = 0.2


def relative_risk_draws(idata: az.InferenceData) -> np.ndarray:
    """Draws of theta as an array (n_draws, n_areas), chains stacked."""
    posterior = idata.posterior["relative_risk"]
    return posterior.stack(sample=("chain", "draw")).transpose("sample", "area").values


def exceedance_probability(draws: np.ndarray, threshold: float) -> np.ndarray:
    """P(theta_i > threshold | data), per area."""
    return (draws > threshold).mean(axis=0)


def signal_from_probability(probability: np.ndarray) -> np.ndarray:
    """'higher' / 'lower' / 'unclear' by the 0.8 / 0.2 rule (Richardson et al. 2004)."""
    return np.where(probability > SIGNAL_UPPER, "higher",
                    np.where(probability < SIGNAL_LOWER, "lower", "unclear"))


def rank_draws(draws: np.ndarray) -> np.ndarray:
    """Rank areas within each draw; rank 1 is the highest relative risk."""
    order = np.argsort(-draws, axis=1, kind="stable")
    ranks = np.empty_like(order)
    rows = np.arange(draws.shape[0])[:, None]
    ranks[rows, order] = np.arange(1, draws.shape[1] + 1)[None, :]
    return ranks


def tail_quantiles(interval: float) -> tuple[float, float]:
    """Equal-tailed interval quantiles, e.g. 0.95 -> (0.025, 0.975)."""
    alpha = 1.0 - interval
    return alpha / 2, 1 - alpha / 2


def area_table(area_ids, observed: np.ndarray, expected: np.ndarray, draws: np.ndarray,
               thresholds, interval: float) -> pd.DataFrame:
    """One row per area: SMR with exact limits, posterior relative risk, ranks, signal, exceedance."""
    low, high = tail_quantiles(interval)
    smr, smr_lower, smr_upper = smr_with_limits(observed, expected, interval)
    ranks = rank_draws(draws)
    probabilities = {t: exceedance_probability(draws, t) for t in thresholds}
    table = pd.DataFrame({
        "area_id": list(area_ids),
        "observed": np.asarray(observed, dtype="int64"),
        "expected": np.asarray(expected, dtype=float),
        "smr": smr, "smr_lower": smr_lower, "smr_upper": smr_upper,
        "rr_mean": draws.mean(axis=0),
        "rr_median": np.median(draws, axis=0),
        "rr_lower": np.quantile(draws, low, axis=0),
        "rr_upper": np.quantile(draws, high, axis=0),
        "rr_sd": draws.std(axis=0, ddof=1),
        "rank_median": np.median(ranks, axis=0),
        "rank_lower": np.floor(np.quantile(ranks, low, axis=0)).astype("int64"),
        "rank_upper": np.ceil(np.quantile(ranks, high, axis=0)).astype("int64"),
        "signal": signal_from_probability(probabilities[thresholds[0]]),
    })
    for threshold, probability in probabilities.items():
        table[f"p_above_{threshold_label(threshold)}"] = probability
    return table


def ranking_table(table: pd.DataFrame, probability: np.ndarray | pd.Series,
                  threshold: float) -> pd.DataFrame:
    """Areas ordered by P(theta > threshold), ties broken by posterior median relative risk."""
    ranked = table.assign(p_above=np.asarray(probability))
    ranked = ranked.sort_values(["p_above", "rr_median"], ascending=[False, False], kind="stable")
    ranked.insert(0, "position", np.arange(1, len(ranked) + 1))
    ranked["threshold"] = threshold
    names = ["area_name"] if "area_name" in ranked else []
    columns = ["position", "area_id", *names, "threshold", "p_above", "rr_median", "rr_lower",
               "rr_upper", "rank_median", "rank_lower", "rank_upper", "signal"]
    return ranked[columns].reset_index(drop=True)


def interval_summary(values: np.ndarray, interval: float) -> dict[str, float]:
    low, high = tail_quantiles(interval)
    return {"mean": float(np.mean(values)), "median": float(np.median(values)),
            "lower": float(np.quantile(values, low)), "upper": float(np.quantile(values, high))}


def fixed_effects(idata: az.InferenceData, interval: float) -> dict[str, dict[str, float]]:
    """Covariate effects as rate ratios exp(beta) per unit on the covariate's own scale."""
    posterior = idata.posterior
    if "beta" not in posterior:
        return {}
    effects = {}
    beta = posterior["beta"].stack(sample=("chain", "draw"))
    for name in beta["covariate"].values:
        draws = np.exp(beta.sel(covariate=name).values)
        effects[str(name)] = {"rate_ratio_" + k: v for k, v in interval_summary(draws, interval).items()}
    return effects


def hyperparameters(idata: az.InferenceData, interval: float) -> dict[str, dict[str, float]]:
    """Posterior summaries of sigma, phi and friends, where the model has them."""
    posterior = idata.posterior
    summaries = {}
    for name in HYPERPARAMETER_NAMES + ("intercept",):
        if name in posterior and posterior[name].ndim == 2:
            summaries[name] = interval_summary(posterior[name].values.ravel(), interval)
    return summaries


def model_comparison(idata: az.InferenceData) -> dict[str, dict[str, float | int]]:
    """PSIS-LOO and WAIC (Vehtari, Gelman & Gabry 2017) with Pareto-k counts."""
    if "log_likelihood" not in idata.groups():
        return {}
    import warnings
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        loo = az.loo(idata, pointwise=True)
        waic = az.waic(idata, pointwise=True)
    pareto_k = np.asarray(loo.pareto_k)
    return {
        "loo": {"elpd": float(loo.elpd_loo), "se": float(loo.se), "p_loo": float(loo.p_loo),
                "pareto_k_good": int(np.sum(pareto_k <= 0.7)),
                "pareto_k_bad": int(np.sum((pareto_k > 0.7) & (pareto_k <= 1.0))),
                "pareto_k_very_bad": int(np.sum(pareto_k > 1.0))},
        "waic": {"elpd": float(waic.elpd_waic), "se": float(waic.se),
                 "p_waic": float(waic.p_waic)},
    }


def finite_or_none(value):
    """JSON-safe float: NaN and infinities become None."""
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None

