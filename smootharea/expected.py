"""Expected counts E_i and standardised mortality/morbidity ratios.

Owns the arithmetic of METHODS.md section 1: crude expected counts, indirect
standardisation over strata (internal or external reference rates), the SMR
and its exact Poisson interval. Pure functions: validated tables in, numbers
out; checking the inputs is :mod:`smootharea.load`'s job.

Long tables have one row per area and stratum; an area-stratum pair missing
from a table counts as zero there (validation has already decided whether that
is acceptable).
"""
from __future__ import annotations

from collections.abc import Sequence
from typing import NamedTuple

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike
from scipy import stats


class StandardisedExpected(NamedTuple):
    """Expected counts per area plus the rate table they came from (for reports)."""

    expected: pd.Series
    rates: pd.DataFrame


def crude_expected(observed: ArrayLike, population: ArrayLike) -> StandardisedExpected:
    """E_i = P_i * (sum O / sum P): population times the overall rate.

    The result keeps the index of ``population`` when it is a Series.
    The rates table has one row: total cases, total population, overall rate.
    """
    observed_array = np.asarray(observed, dtype=float)
    population_array = np.asarray(population, dtype=float)
    total_cases, total_population = observed_array.sum(), population_array.sum()
    rate = total_cases / total_population
    index = population.index if isinstance(population, pd.Series) else None
    expected = pd.Series(population_array * rate, index=index, name="expected")
    rates = pd.DataFrame({"cases": [total_cases], "population": [total_population],
                          "rate": [rate]})
    return StandardisedExpected(expected, rates)


def stratum_rates(cases: pd.DataFrame, population: pd.DataFrame, strata: Sequence[str], *,
                  cases_count: str = "cases",
                  population_count: str = "population") -> pd.DataFrame:
    """Pooled rate per stratum, r_s = sum_i O_is / sum_i P_is (the internal standard).

    Returns one row per stratum with the strata columns, ``cases``,
    ``population`` and ``rate``, sorted by stratum.
    """
    strata = list(strata)
    case_totals = cases.groupby(strata, sort=True)[cases_count].sum().rename("cases")
    population_totals = (population.groupby(strata, sort=True)[population_count]
                         .sum().rename("population"))
    table = pd.concat([case_totals, population_totals], axis=1).fillna(0.0)
    table["rate"] = table["cases"] / table["population"]
    return table.reset_index()


def internal_standardisation(cases: pd.DataFrame, population: pd.DataFrame,
                             strata: Sequence[str], *, id: str = "area_id",
                             cases_count: str = "cases",
                             population_count: str = "population") -> StandardisedExpected:
    """Indirect standardisation against the study's own stratum rates.

    r_s = sum_i O_is / sum_i P_is and E_i = sum_s r_s P_is (METHODS.md 1(b)),
    so that sum_i E_i = sum_i O_i exactly. With no strata this is the crude rate.
    """
    if not strata:
        observed = cases.groupby(id)[cases_count].sum()
        persons = population.groupby(id)[population_count].sum()
        return crude_expected(observed.reindex(persons.index, fill_value=0), persons)
    rates = stratum_rates(cases, population, strata, cases_count=cases_count,
                          population_count=population_count)
    expected = _apply_rates(population, rates, strata, id=id,
                            population_count=population_count, rate="rate")
    return StandardisedExpected(expected, rates)


def external_standardisation(population: pd.DataFrame, reference_rates: pd.DataFrame,
                             strata: Sequence[str], *, id: str = "area_id",
                             population_count: str = "population",
                             rate: str = "rate") -> StandardisedExpected:
    """Indirect standardisation against a reference rate table: E_i = sum_s rate_s P_is.

    ``reference_rates`` is keyed by the ``strata`` columns. The population may
    be split more finely than the rates (it is summed over the other strata).
    The rates table returned has the strata, the study population in each
    stratum, the reference rate and the expected count it contributes.
    """
    strata = list(strata)
    if not strata:  # one rate for everyone: give both tables a single shared stratum
        whole = "whole population"
        result = external_standardisation(population.assign(__whole__=whole),
                                          reference_rates.assign(__whole__=whole), ["__whole__"],
                                          id=id, population_count=population_count, rate=rate)
        return StandardisedExpected(result.expected, result.rates.drop(columns="__whole__"))
    expected = _apply_rates(population, reference_rates, strata, id=id,
                            population_count=population_count, rate=rate)
    persons = population.groupby(strata, sort=True)[population_count].sum().rename("population")
    rates = (reference_rates.set_index(strata)[[rate]].rename(columns={rate: "rate"})
             .join(persons, how="inner"))
    rates["expected"] = rates["rate"] * rates["population"]
    return StandardisedExpected(expected, rates.reset_index()[strata + ["population", "rate", "expected"]])


def _apply_rates(population: pd.DataFrame, rates: pd.DataFrame, strata: list[str], *,
                 id: str, population_count: str, rate: str) -> pd.Series:
    """sum_s rate_s * P_is per area, keeping every area of the population table."""
    merged = population[[id, *strata, population_count]].merge(
        rates[[*strata, rate]], on=strata, how="left", validate="many_to_one")
    # A stratum with no population contributes nothing, even where its rate is undefined (0/0).
    contribution = (merged[population_count] * merged[rate]).where(merged[population_count] != 0, 0.0)
    groups = merged[id]
    expected = contribution.groupby(groups, sort=False).sum()
    missing_rate = contribution.isna().groupby(groups, sort=False).any()
    expected[missing_rate] = np.nan
    return expected.rename("expected").astype(float)


def smr(observed: ArrayLike, expected: ArrayLike) -> np.ndarray:
    """Standardised ratio O_i / E_i."""
    return np.asarray(observed, dtype=float) / np.asarray(expected, dtype=float)


def exact_poisson_limits(count: ArrayLike, level: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Exact (Garwood 1936, Biometrika 28) confidence limits for a Poisson mean.

    lower = chi2.ppf(a/2, 2 O) / 2 (0 when O = 0), upper = chi2.ppf(1 - a/2, 2 O + 2) / 2,
    with a = 1 - level.
    """
    if not 0 < level < 1:
        raise ValueError(f"level must lie strictly between 0 and 1, not {level!r}")
    count = np.asarray(count, dtype=float)
    tail = (1.0 - level) / 2.0
    with np.errstate(invalid="ignore"):
        lower = np.where(count > 0, stats.chi2.ppf(tail, 2.0 * count) / 2.0, 0.0)
    upper = stats.chi2.ppf(1.0 - tail, 2.0 * count + 2.0) / 2.0
    return lower, upper


def smr_limits(observed: ArrayLike, expected: ArrayLike,
               level: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Exact interval for the SMR: the count's Garwood limits divided by E_i."""
    lower, upper = exact_poisson_limits(observed, level)
    expected = np.asarray(expected, dtype=float)
    return lower / expected, upper / expected


def smr_with_limits(observed: ArrayLike, expected: ArrayLike,
                    level: float = 0.95) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """SMR O_i / E_i with its exact (Garwood) interval at ``level``: (smr, lower, upper)."""
    lower, upper = smr_limits(observed, expected, level)
    return smr(observed, expected), lower, upper
