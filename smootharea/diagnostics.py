"""Is the sampler to be trusted? One verdict per run.

Thresholds from Vehtari, Gelman, Simpson, Carpenter & Buerkner (2021, Bayesian
Analysis 16): rank-normalised split R-hat below 1.01, bulk and tail ESS at least
400 over all chains, no divergent transitions, E-BFMI above 0.3 in every chain.
All numbers come from ArviZ; this module only decides and explains.
"""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from typing import Any, Sequence

import arviz as az
import numpy as np
import xarray as xr

# Variables judged by default, where the posterior has them.
DEFAULT_VARIABLES = ("relative_risk", "intercept", "beta", "sigma", "phi",
                     "sigma_spatial", "sigma_unstructured")
# How many offending elements of one variable a reason lists by name.
_NAMED_PER_VARIABLE = 5


@dataclass
class Verdict:
    """Convergence verdict: ``converged`` is False when any threshold is missed."""

    converged: bool
    reasons: list[str] = field(default_factory=list)
    max_rhat: float = math.nan
    min_ess_bulk: float = math.nan
    min_ess_tail: float = math.nan
    divergences: int = 0
    min_bfmi: float = math.nan

    def to_dict(self) -> dict[str, Any]:
        return {key: (None if isinstance(value, float) and not math.isfinite(value) else value)
                for key, value in asdict(self).items()}


def assess_convergence(idata: az.InferenceData, var_names: Sequence[str] | None = None,
                       rhat_max: float = 1.01, ess_min: float = 400,
                       bfmi_min: float = 0.3) -> Verdict:
    """Check R-hat, bulk/tail ESS, divergences and E-BFMI; say which variable missed what."""
    posterior = idata.posterior
    names = [n for n in (var_names or DEFAULT_VARIABLES) if n in posterior]
    names = [n for n in names if _varies(posterior[n])]  # fixed quantities have no R-hat
    reasons: list[str] = []
    n_chains = posterior.sizes.get("chain", 1)

    rhat = per_element(az.rhat, posterior, names, method="rank")
    ess_bulk = per_element(az.ess, posterior, names, method="bulk")
    ess_tail = per_element(az.ess, posterior, names, method="tail")
    if n_chains < 2:
        reasons.append("R-hat needs at least 2 chains; run more chains")
    else:
        reasons += _misses(rhat, lambda v: v > rhat_max, "R-hat", f"above {rhat_max:g}")
    reasons += _misses(ess_bulk, lambda v: v < ess_min, "bulk ESS", f"below {ess_min:g}")
    reasons += _misses(ess_tail, lambda v: v < ess_min, "tail ESS", f"below {ess_min:g}")

    divergences = _divergences(idata)
    if divergences:
        total = int(np.prod([posterior.sizes.get("chain", 1), posterior.sizes.get("draw", 1)]))
        reasons.append(f"{divergences} divergent transition(s) out of {total} draws; "
                       "the posterior geometry was not explored reliably")

    bfmi = _bfmi(idata)
    if bfmi.size and np.nanmin(bfmi) < bfmi_min:
        low = ", ".join(f"chain {c}: {b:.2f}" for c, b in enumerate(bfmi) if b < bfmi_min)
        reasons.append(f"E-BFMI below {bfmi_min:g} ({low})")

    return Verdict(converged=not reasons, reasons=reasons,
                   max_rhat=_extreme(rhat, np.nanmax), min_ess_bulk=_extreme(ess_bulk, np.nanmin),
                   min_ess_tail=_extreme(ess_tail, np.nanmin), divergences=divergences,
                   min_bfmi=float(np.nanmin(bfmi)) if bfmi.size else math.nan)


def per_element(statistic, posterior: xr.Dataset, names: Sequence[str],
                block: int = 256, **options) -> xr.Dataset:
    """``statistic`` (az.rhat or az.ess) of each named variable, over blocks of at most
    ``block`` elements along its first non-sample dimension.

    Same numbers as one call; ArviZ's rank normalisation makes several full-size copies of
    its input, which on large maps (thousands of areas x thousands of draws) took many
    times the memory of the draws themselves.
    """
    results = {}
    for name in names:
        draws = posterior[name]
        extra = [dim for dim in draws.dims if dim not in ("chain", "draw")]
        if not extra or draws.sizes[extra[0]] <= block:
            results[name] = statistic(draws.to_dataset(name=name), **options)[name]
            continue
        dim = extra[0]
        parts = [statistic(draws.isel({dim: slice(start, start + block)}).to_dataset(name=name),
                           **options)[name] for start in range(0, draws.sizes[dim], block)]
        results[name] = xr.concat(parts, dim=dim)
    return xr.Dataset(results)


def _varies(draws: xr.DataArray) -> bool:
    values = draws.values
    return bool(np.nanmax(values) > np.nanmin(values)) if values.size else False


def _misses(stat: xr.Dataset, bad, label: str, limit: str) -> list[str]:
    reasons = []
    for name, values in stat.data_vars.items():
        flags = bad(values) | values.isnull()
        if not bool(flags.any()):
            continue
        stacked = values.where(flags)
        count = int(flags.sum())
        if values.ndim == 0:
            reasons.append(f"{label} of {name} is {float(values):.3g} ({limit})")
            continue
        series = stacked.to_series().dropna() if count else stacked.to_series()
        worst = series.sort_values(ascending=label != "R-hat").head(_NAMED_PER_VARIABLE)
        named = ", ".join(f"{_label(name, idx)}={val:.3g}" for idx, val in worst.items())
        more = f" and {count - len(worst)} more" if count > len(worst) else ""
        reasons.append(f"{label} {limit} for {count} element(s) of {name}: {named}{more}")
    return reasons


def _label(name: str, index: Any) -> str:
    index = index if isinstance(index, tuple) else (index,)
    return f"{name}[{','.join(str(i) for i in index)}]"


def _extreme(stat: xr.Dataset, reducer) -> float:
    values = [np.asarray(v.values, dtype=float).ravel() for v in stat.data_vars.values()]
    values = [v for v in values if v.size]
    if not values:
        return math.nan
    joined = np.concatenate(values)
    return float(reducer(joined)) if np.isfinite(joined).any() else math.nan


def _divergences(idata: az.InferenceData) -> int:
    stats = getattr(idata, "sample_stats", None)
    if stats is None or "diverging" not in stats:
        return 0
    return int(stats["diverging"].values.sum())


def _bfmi(idata: az.InferenceData) -> np.ndarray:
    stats = getattr(idata, "sample_stats", None)
    if stats is None or "energy" not in stats:
        return np.array([])
    return np.atleast_1d(az.bfmi(idata))
