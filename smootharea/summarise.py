"""Posterior summaries an analyst publishes: relative risks, exceedance, ranks.

Everything here is computed from the InferenceData (the source of truth) and
the validated study, so any number can be recomputed from ``posterior.nc``.
"""
from __future__ import annotations

import math
from typing import Iterator, Sequence

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

# Areas summarised at a time (6,000 draws x 2,048 areas is 98 MB in float64), and draws ranked
# at a time; both keep large maps near the size of the draws themselves.
AREA_BLOCK = 2048
DRAW_BLOCK = 256

# Decision rule of Richardson, Thomson, Best & Elliott (2004, Environ Health Perspect 112):
# raised when P(theta > c) > 0.8, lowered when < 0.2, otherwise not distinguishable.
SIGNAL_UPPER = 0.8
SIGNAL_LOWER = 0.2


def relative_risk_values(idata: az.InferenceData) -> np.ndarray:
    """Draws of theta as stored, shaped (chain, draw, area): a view, not a copy."""
    return idata.posterior["relative_risk"].transpose("chain", "draw", "area").values


def area_blocks(values: np.ndarray) -> Iterator[tuple[slice, np.ndarray]]:
    """(areas, their draws with chains stacked as (n_draws, areas)), ``AREA_BLOCK`` at a time.

    ``values`` is (chain, draw, area) or (draw, area). Only one block is copied at a time: at
    30,000 areas x 6,000 draws the whole array is 1.4 GB and every quantile sorts a copy.
    """
    values = values if values.ndim == 3 else values[None]
    for start in range(0, values.shape[2], AREA_BLOCK):
        part = values[:, :, start:start + AREA_BLOCK]
        yield slice(start, start + part.shape[2]), part.reshape(-1, part.shape[2])


def exceedance_probability(draws: np.ndarray, threshold: float) -> np.ndarray:
    """P(theta_i > threshold | data), per area; ``draws`` is (draw, area) or (chain, draw, area)."""
    draws = draws if draws.ndim == 3 else draws[None]
    above = np.zeros(draws.shape[2])
    for chain in draws:  # one chain at a time: the comparison makes a full-size boolean array
        above += (chain > threshold).sum(axis=0)
    return above / (draws.shape[0] * draws.shape[1])


def exceedance_from_posterior(idata: az.InferenceData, threshold: float,
                              area_ids: Sequence[str]) -> np.ndarray:
    """P(theta > threshold) for ``area_ids`` (in that order) from a run's posterior draws."""
    probability = pd.Series(exceedance_probability(relative_risk_values(idata), threshold),
                            index=[str(a) for a in idata.posterior["area"].values])
    return probability.loc[list(area_ids)].to_numpy()


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


def rank_matrix(values: np.ndarray) -> np.ndarray:
    """:func:`rank_draws` of every draw, (n_draws, n_areas) with chains stacked, stored in the
    smallest unsigned type that holds the area count and computed ``DRAW_BLOCK`` draws at a time
    (2 bytes per entry up to 65,535 areas instead of 8, and no full-size sort copy)."""
    values = values if values.ndim == 3 else values[None]
    chains, draws, n_areas = values.shape
    ranks = np.empty((chains * draws, n_areas), dtype=np.min_scalar_type(n_areas))
    for chain in range(chains):
        for start in range(0, draws, DRAW_BLOCK):
            rows = values[chain, start:start + DRAW_BLOCK]
            first = chain * draws + start
            ranks[first:first + rows.shape[0]] = rank_draws(rows)
    return ranks


def tail_quantiles(interval: float) -> tuple[float, float]:
    """Equal-tailed interval quantiles, e.g. 0.95 -> (0.025, 0.975)."""
    alpha = 1.0 - interval
    return alpha / 2, 1 - alpha / 2


def area_table(area_ids, observed: np.ndarray, expected: np.ndarray, draws: np.ndarray,
               thresholds, interval: float) -> pd.DataFrame:
    """One row per area: SMR with exact limits, posterior relative risk, ranks, signal, exceedance.

    ``draws`` is (draw, area) or (chain, draw, area); summaries are taken a block of areas at a
    time so that memory stays near the size of the draws themselves on large maps.
    """
    low, high = tail_quantiles(interval)
    smr, smr_lower, smr_upper = smr_with_limits(observed, expected, interval)
    n_areas = draws.shape[-1]
    columns = {name: np.empty(n_areas) for name in
               ("rr_mean", "rr_median", "rr_lower", "rr_upper", "rr_sd",
                "rank_median", "rank_lower", "rank_upper")}
    for areas, block in area_blocks(draws):
        columns["rr_mean"][areas] = block.mean(axis=0)
        columns["rr_median"][areas] = np.median(block, axis=0)
        columns["rr_lower"][areas], columns["rr_upper"][areas] = np.quantile(
            block, [low, high], axis=0)
        columns["rr_sd"][areas] = block.std(axis=0, ddof=1)
    ranks = rank_matrix(draws)
    for areas, block in area_blocks(ranks[None]):
        columns["rank_median"][areas] = np.median(block, axis=0)
        columns["rank_lower"][areas], columns["rank_upper"][areas] = np.quantile(
            block, [low, high], axis=0)
    del ranks
    probabilities = {t: exceedance_probability(draws, t) for t in thresholds}
    table = pd.DataFrame({
        "area_id": list(area_ids),
        "observed": np.asarray(observed, dtype="int64"),
        "expected": np.asarray(expected, dtype=float),
        "smr": smr, "smr_lower": smr_lower, "smr_upper": smr_upper,
        **{name: columns[name] for name in ("rr_mean", "rr_median", "rr_lower", "rr_upper",
                                          "rr_sd", "rank_median")},
        "rank_lower": np.floor(columns["rank_lower"]).astype("int64"),
        "rank_upper": np.ceil(columns["rank_upper"]).astype("int64"),
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
    """PSIS-LOO and WAIC (Vehtari, Gelman & Gabry 2017) with Pareto-k counts.

    ArviZ's az.loo and az.waic run on ``AREA_BLOCK`` areas at a time (each stacks and copies
    the pointwise log-likelihood several times over: gigabytes at 30,000 areas) with r_eff
    computed once over the whole posterior as az.loo does; the totals are then assembled as
    ArviZ assembles them (sums, and se = sqrt(n var(pointwise))).
    """
    if "log_likelihood" not in idata.groups():
        return {}
    import warnings

    from .diagnostics import relative_efficiency

    log_likelihood = idata.log_likelihood
    reff = relative_efficiency(idata.posterior)
    loo_i, pareto_k, p_loo, waic_i, p_waic = [], [], 0.0, [], 0.0
    areas = log_likelihood.sizes["area"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for start in range(0, areas, AREA_BLOCK):
            part = az.InferenceData(
                log_likelihood=log_likelihood.isel(area=slice(start, start + AREA_BLOCK)))
            loo = az.loo(part, pointwise=True, reff=reff)
            waic = az.waic(part, pointwise=True)
            loo_i.append(np.asarray(loo.loo_i))
            pareto_k.append(np.asarray(loo.pareto_k))
            waic_i.append(np.asarray(waic.waic_i))
            p_loo, p_waic = p_loo + float(loo.p_loo), p_waic + float(waic.p_waic)
    loo_i, pareto_k, waic_i = (np.concatenate(v) for v in (loo_i, pareto_k, waic_i))
    return {
        "loo": {"elpd": float(loo_i.sum()), "se": float(np.sqrt(loo_i.size * np.var(loo_i))),
                "p_loo": p_loo,
                "pareto_k_good": int(np.sum(pareto_k <= 0.7)),
                "pareto_k_bad": int(np.sum((pareto_k > 0.7) & (pareto_k <= 1.0))),
                "pareto_k_very_bad": int(np.sum(pareto_k > 1.0))},
        "waic": {"elpd": float(waic_i.sum()), "se": float(np.sqrt(waic_i.size * np.var(waic_i))),
                 "p_waic": p_waic},
    }


def finite_or_none(value):
    """JSON-safe float: NaN and infinities become None."""
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None

