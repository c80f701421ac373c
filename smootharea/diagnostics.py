"""Is the sampler to be trusted? One verdict per run.

Thresholds from Vehtari, Gelman, Simpson, Carpenter & Buerkner (2021, Bayesian
Analysis 16): rank-normalised split R-hat below 1.01, bulk and tail ESS at least
400 over all chains, no divergent transitions, E-BFMI above 0.3 in every chain.
R-hat and ESS are ArviZ's definitions (ArviZ 0.23: az.rhat method "rank", az.ess methods
"bulk" and "tail"), computed here for all elements of a variable at once (see
:func:`convergence_statistics`); E-BFMI comes from ArviZ itself.
"""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from functools import lru_cache
from typing import Any, Iterator, Sequence

import arviz as az
import numba
import numpy as np
import xarray as xr
from scipy.special import ndtri

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

    @classmethod
    def from_dict(cls, record: dict[str, Any]) -> "Verdict":
        """The inverse of :meth:`to_dict`."""
        return cls(**{key: (math.nan if value is None and key != "reasons" else value)
                      for key, value in record.items()})


def combine_verdicts(verdicts: Sequence[Verdict]) -> Verdict:
    """One verdict from verdicts on disjoint parts (variables, blocks of areas) of the same
    draws: every element's R-hat and ESS depend on that element alone, so this equals the
    verdict on all parts at once."""
    def extreme(values, reducer) -> float:
        finite = [v for v in values if math.isfinite(v)]
        return reducer(finite) if finite else math.nan

    return Verdict(converged=all(v.converged for v in verdicts),
                   reasons=[reason for v in verdicts for reason in v.reasons],
                   max_rhat=extreme([v.max_rhat for v in verdicts], max),
                   min_ess_bulk=extreme([v.min_ess_bulk for v in verdicts], min),
                   min_ess_tail=extreme([v.min_ess_tail for v in verdicts], min),
                   divergences=max((v.divergences for v in verdicts), default=0),
                   min_bfmi=extreme([v.min_bfmi for v in verdicts], min))


def assess_convergence(idata: az.InferenceData, var_names: Sequence[str] | None = None,
                       rhat_max: float = 1.01, ess_min: float = 400,
                       bfmi_min: float = 0.3) -> Verdict:
    """Check R-hat, bulk/tail ESS, divergences and E-BFMI; say which variable missed what."""
    posterior = idata.posterior
    names = [n for n in (var_names or DEFAULT_VARIABLES) if n in posterior]
    names = [n for n in names if _varies(posterior[n])]  # fixed quantities have no R-hat
    reasons: list[str] = []
    n_chains = posterior.sizes.get("chain", 1)

    with np.errstate(divide="ignore", invalid="ignore"):  # constant elements give NaN R-hat
        rhat, ess_bulk, ess_tail = per_element(posterior, names)
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


def per_element(posterior: xr.Dataset, names: Sequence[str], block: int = 512
                ) -> tuple[xr.Dataset, xr.Dataset, xr.Dataset]:
    """(R-hat, bulk ESS, tail ESS) of every element of each named variable
    (:func:`convergence_statistics`), ``block`` elements at a time (each block's rank
    normalisation and autocovariances take several copies of its draws)."""
    results: tuple[dict, dict, dict] = ({}, {}, {})
    for name in names:
        draws = posterior[name].transpose("chain", "draw", ...)
        extra = draws.dims[2:]
        parts = [convergence_statistics(part) for part in _element_blocks(draws, block)]
        coords = {dim: draws[dim] for dim in extra if dim in draws.coords}
        for index, result in enumerate(results):
            stat = np.concatenate([part[index] for part in parts])
            result[name] = xr.DataArray(stat.reshape(draws.shape[2:]), dims=extra, coords=coords)
    rhat, ess_bulk, ess_tail = (xr.Dataset(result) for result in results)
    return rhat, ess_bulk, ess_tail


def _element_blocks(draws: xr.DataArray, block: int) -> Iterator[np.ndarray]:
    """Draws of a variable as chain x draw x element arrays of ``block`` elements each."""
    values = np.asarray(draws.transpose("chain", "draw", ...).values, dtype=float)
    flat = values.reshape(values.shape[0], values.shape[1], -1)
    for start in range(0, flat.shape[2], block):
        yield flat[:, :, start:start + block]


# --------------------------------------------------- R-hat and ESS, all elements at once
# Vehtari, Gelman, Simpson, Carpenter & Buerkner (2021), exactly as ArviZ 0.23 computes them,
# for every element (last axis of draws shaped chain x draw x element) in one compiled pass. Why
# by hand: ArviZ runs its ESS one element at a time in Python (Geyer's sequence with a NumPy call
# per lag), which took 10-14 s per convergence check at 3,024 areas (4 x 750 draws) and minutes
# at 30,000 - more than the sampling between checks. Checked against ArviZ in tests/test_models.py.

def convergence_statistics(draws: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(rank R-hat, bulk ESS, tail ESS) per element of draws shaped chain x draw x element;
    NaN for an element with a missing draw, and where ArviZ gives NaN (R-hat with one chain,
    fewer than 4 draws)."""
    nan = np.full(draws.shape[2], np.nan)
    if draws.shape[1] < 4:
        return nan, nan, nan
    values = _element_major(draws)
    split = _split_chains(values)
    pooled_split = split.reshape(split.shape[0], -1)
    # Tail quantiles over all draws, as ArviZ takes them (the split chains drop each chain's
    # middle draw when the count is odd).
    tail_quantiles = np.quantile(values.reshape(values.shape[0], -1), _TAIL_PROBABILITIES,
                                 axis=1).T.copy()
    stats = _rank_statistics(pooled_split, np.argsort(pooled_split, axis=1),
                             _normal_scores(pooled_split.shape[1]), split.shape[1],
                             tail_quantiles, draws.shape[0] >= 2)
    invalid = np.isnan(draws).any(axis=(0, 1))
    return tuple(np.where(invalid, np.nan, stat) for stat in stats)


def mean_ess(draws: np.ndarray) -> np.ndarray:
    """ESS of the mean per element of draws shaped chain x draw x element (ArviZ's method
    "mean": split chains, no rank normalisation); NaN where ArviZ gives NaN."""
    if draws.shape[1] < 4:
        return np.full(draws.shape[2], np.nan)
    split = _split_chains(_element_major(draws))
    ess = _ess_per_element(split.reshape(split.shape[0], -1), split.shape[1])
    return np.where(np.isnan(draws).any(axis=(0, 1)), np.nan, ess)


def relative_efficiency(posterior: xr.Dataset, block: int = 512) -> float:
    """PSIS-LOO's relative efficiency r_eff as az.loo computes it by default: the mean ESS of
    the mean over every element of every posterior variable, over the number of draws."""
    n_chains, n_draws = posterior.sizes["chain"], posterior.sizes["draw"]
    if n_chains == 1:
        return 1.0
    total, count = 0.0, 0
    for name in posterior.data_vars:
        for part in _element_blocks(posterior[name], block):
            ess = mean_ess(part)
            total, count = total + ess.sum(), count + ess.size
    return total / count / (n_chains * n_draws)


def _element_major(draws: np.ndarray) -> np.ndarray:
    """element x chain x draw, contiguous: sorting and transforms then run along memory."""
    return np.ascontiguousarray(np.moveaxis(draws, 2, 0), dtype=float)


def _split_chains(values: np.ndarray) -> np.ndarray:
    half = values.shape[2] // 2
    return np.concatenate([values[:, :, :half], values[:, :, values.shape[2] - half:]], axis=1)


_TAIL_PROBABILITIES = np.array([0.05, 0.95])
_RESOLUTION = np.finfo(float).resolution  # a series varying less than this counts as constant


@lru_cache(maxsize=8)
def _normal_scores(size: int) -> np.ndarray:
    """Rank normalisation's normal score of every possible average rank 1, 1.5, ..., size
    (Blom's offset 3/8), indexed by twice the rank minus 2."""
    ranks = np.arange(2 * size - 1) / 2.0 + 1.0
    return ndtri((ranks - 0.375) / (size + 0.25))


@numba.njit(cache=True, error_model="numpy")
def _rank_statistics(pooled, order, scores, chains, tail_quantiles, with_rhat):
    """(R-hat, bulk ESS, tail ESS) x element from split chains pooled per element (element x
    chains*n, chain after chain), each row's sorting order and its 5% and 95% quantiles. The
    folded draws' order is merged outward from the median instead of sorted again."""
    elements, size = pooled.shape
    n = size // chains
    out = np.full((3, elements), np.nan)
    z = np.empty(size)
    z_folded = np.empty(size)
    folded = np.empty(size)
    folded_order = np.empty(size, dtype=np.int64)
    indicator = np.empty(size)
    centred = np.empty(size)
    rho = np.empty(n)
    for j in range(elements):
        x, rank_order = pooled[j], order[j]
        if np.isnan(x[rank_order[size - 1]]):  # NaN sorts last
            continue
        _scores_by_rank(x, rank_order, scores, z)
        out[1, j] = _geyer_ess(z, chains, n, centred, rho)
        if with_rhat:
            median = (x[rank_order[size // 2 - 1]] + x[rank_order[size // 2]]) / 2.0
            _folded_order(x, rank_order, median, folded, folded_order)
            _scores_by_rank(folded, folded_order, scores, z_folded)
            out[0, j] = np.maximum(_split_rhat(z, chains, n), _split_rhat(z_folded, chains, n))
        tail = np.inf
        for q in range(2):
            for i in range(size):
                indicator[i] = 1.0 if x[i] <= tail_quantiles[j, q] else 0.0
            ess = _geyer_ess(indicator, chains, n, centred, rho)
            tail = ess if np.isnan(ess) or ess < tail else tail
        out[2, j] = tail
    return out


@numba.njit(cache=True)
def _scores_by_rank(values, order, scores, out):
    """Normal score of each value's pooled rank, ties given their average rank (scipy's
    rankdata method "average"); ``scores`` from :func:`_normal_scores`."""
    size = values.size
    start = 0
    while start < size:
        end = start
        while end + 1 < size and values[order[end + 1]] == values[order[start]]:
            end += 1
        score = scores[start + end]  # average rank (start + end) / 2 + 1
        for position in range(start, end + 1):
            out[order[position]] = score
        start = end + 1


@numba.njit(cache=True)
def _folded_order(values, order, median, folded, folded_order):
    """|values - median| and its sorting order, merged from the two sorted runs that start at
    the median and move outward (values sorted by ``order``)."""
    size = values.size
    for i in range(size):
        folded[i] = abs(values[i] - median)
    below, above = size // 2 - 1, size // 2
    for k in range(size):
        if above >= size or (below >= 0 and folded[order[below]] <= folded[order[above]]):
            folded_order[k] = order[below]
            below -= 1
        else:
            folded_order[k] = order[above]
            above += 1


@numba.njit(cache=True)
def _split_rhat(series, chains, n):
    """Split R-hat of one element's series (chains * n, chain after chain)."""
    means = np.empty(chains)
    within = 0.0
    for c in range(chains):
        chain = series[c * n:(c + 1) * n]
        means[c] = chain.mean()
        within += ((chain - means[c]) ** 2).sum() / (n - 1)
    within /= chains
    between = n * ((means - means.mean()) ** 2).sum() / (chains - 1)
    return np.sqrt((between / within + n - 1) / n)


@numba.njit(cache=True)
def _lagged_sum(centred, start, n, lag):
    """sum_i centred[start + i] * centred[start + i + lag] (BLAS dot: 3-4x a plain loop)."""
    return np.dot(centred[start:start + n - lag], centred[start + lag:start + n])


@numba.njit(cache=True)
def _mean_autocovariance(centred, chains, n, lag):
    """The chains' mean autocovariance at ``lag`` (ArviZ divides each by n)."""
    total = 0.0
    for c in range(chains):
        total += _lagged_sum(centred, c * n, n, lag) / n
    return total / chains


@numba.njit(cache=True, error_model="numpy")  # a constant series divides by 0; handled first
def _geyer_ess(series, chains, n, centred, rho):
    """ESS of one element's series (chains * n, chain after chain) from Geyer's initial
    positive and initial monotone sequences, as ArviZ's _ess. Autocovariances are summed
    directly, one lag at a time as the sequence needs them: the sequence usually stops after
    a few dozen lags, long before an FFT of every lag pays off."""
    total = chains * n
    if series.max() - series.min() < _RESOLUTION:
        return float(total)
    means = np.empty(chains)
    for c in range(chains):
        means[c] = series[c * n:(c + 1) * n].mean()
        centred[c * n:(c + 1) * n] = series[c * n:(c + 1) * n] - means[c]
    mean_var = _mean_autocovariance(centred, chains, n, 0) * n / (n - 1.0)
    var_plus = mean_var * (n - 1.0) / n
    if chains > 1:
        var_plus += ((means - means.mean()) ** 2).sum() / (chains - 1)
    rho[:] = 0.0
    rho_even = 1.0
    rho_odd = 1.0 - (mean_var - _mean_autocovariance(centred, chains, n, 1)) / var_plus
    rho[0], rho[1] = rho_even, rho_odd
    t = 1
    while t < n - 3 and rho_even + rho_odd > 0.0:
        rho_even = 1.0 - (mean_var - _mean_autocovariance(centred, chains, n, t + 1)) / var_plus
        rho_odd = 1.0 - (mean_var - _mean_autocovariance(centred, chains, n, t + 2)) / var_plus
        if rho_even + rho_odd >= 0.0:
            rho[t + 1] = rho_even
            rho[t + 2] = rho_odd
        t += 2
    max_t = t - 2
    if rho_even > 0.0:
        rho[max_t + 1] = rho_even
    t = 1
    while t <= max_t - 2:
        if rho[t + 1] + rho[t + 2] > rho[t - 1] + rho[t]:
            rho[t + 1] = (rho[t - 1] + rho[t]) / 2.0
            rho[t + 2] = rho[t + 1]
        t += 2
    tau = -1.0 + 2.0 * rho[:max_t + 1].sum() + rho[max_t + 1]
    tau = max(tau, 1.0 / np.log10(total))
    return np.nan if np.isnan(rho).any() else total / tau


@numba.njit(cache=True)
def _ess_per_element(pooled, chains):
    """:func:`_geyer_ess` of every row of ``pooled`` (element x chains*n)."""
    elements, size = pooled.shape
    n = size // chains
    out = np.empty(elements)
    centred, rho = np.empty(size), np.empty(n)
    for j in range(elements):
        out[j] = _geyer_ess(pooled[j], chains, n, centred, rho)
    return out


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
    """E-BFMI per chain, mean((E_t - E_t-1)^2) / Var(E) (Betancourt 2016, arXiv:1604.00695),
    as ArviZ 0.23's az.bfmi computes it (variance with ddof 1). Why not az.bfmi: its numba
    variance compiles on the first call of every process (0.3-0.8 s, paid at the first
    convergence check of each run)."""
    stats = getattr(idata, "sample_stats", None)
    if stats is None or "energy" not in stats:
        return np.array([])
    energy = np.atleast_2d(np.asarray(stats["energy"].transpose("chain", "draw").values, dtype=float))
    return np.square(np.diff(energy, axis=1)).mean(axis=1) / np.var(energy, axis=1, ddof=1)
