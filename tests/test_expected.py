"""Expected counts, SMRs and exact Poisson limits (METHODS.md section 1)."""
import numpy as np
import pandas as pd
import pytest
from scipy import optimize, stats

from smootharea.expected import (crude_expected, exact_poisson_limits, external_standardisation,
                                 internal_standardisation, smr, smr_limits, smr_with_limits,
                                 stratum_rates)

# Exact 95% limits for a Poisson count, from memory of standard handbook tables
# (as quoted in METHODS.md section 1).
HANDBOOK_95 = [(0, 0.0, 3.689), (1, 0.0253, 5.572), (5, 1.624, 11.668), (10, 4.795, 18.390)]


@pytest.mark.parametrize("count, lower, upper", HANDBOOK_95)
def test_exact_limits_match_handbook_table(count, lower, upper):
    low, high = exact_poisson_limits(count)
    assert low == pytest.approx(lower, abs=1e-3)
    assert high == pytest.approx(upper, abs=1e-3)


def poisson_limits_by_root_finding(count: int, level: float) -> tuple[float, float]:
    """Independent route (common practice, the definition of the exact interval): the upper
    limit is the mean with P(X <= O) = a/2, the lower the mean with P(X >= O) = a/2,
    found with scipy.stats.poisson and Brent's method, not with the chi-square quantile."""
    tail = (1 - level) / 2
    upper = optimize.brentq(lambda mu: stats.poisson.cdf(count, mu) - tail, 1e-12, 1000, xtol=1e-12)
    if count == 0:
        return 0.0, upper
    lower = optimize.brentq(lambda mu: stats.poisson.sf(count - 1, mu) - tail, 1e-12, 1000,
                            xtol=1e-12)
    return lower, upper


@pytest.mark.parametrize("level", [0.8, 0.95, 0.99, 0.998])
def test_exact_limits_agree_with_poisson_root_finding(level):
    counts = np.array([0, 1, 2, 3, 7, 20, 55, 140])
    lower, upper = exact_poisson_limits(counts, level)
    for count, low, high in zip(counts, lower, upper):
        expected_low, expected_high = poisson_limits_by_root_finding(int(count), level)
        assert low == pytest.approx(expected_low, rel=1e-7, abs=1e-10)
        assert high == pytest.approx(expected_high, rel=1e-7)


def test_smr_limits_are_count_limits_over_expected():
    observed, expected = np.array([0, 5, 10]), np.array([2.0, 4.0, 12.5])
    lower, upper = smr_limits(observed, expected)
    assert smr(observed, expected) == pytest.approx([0.0, 1.25, 0.8])
    # Handbook limits for O = 5 and O = 10 (above) divided by E.
    assert lower == pytest.approx([0.0, 1.624 / 4.0, 4.795 / 12.5], abs=1e-3)
    assert upper == pytest.approx([3.689 / 2.0, 11.668 / 4.0, 18.390 / 12.5], abs=1e-3)
    ratio, low, high = smr_with_limits(observed, expected, 0.95)
    assert ratio == pytest.approx([0.0, 1.25, 0.8])
    assert low == pytest.approx(lower) and high == pytest.approx(upper)


def test_level_outside_zero_one_is_refused():
    with pytest.raises(ValueError, match="level"):
        exact_poisson_limits(3, level=95)


def test_crude_expected_is_population_times_overall_rate():
    # By hand: 10 cases over 5000 people is 0.002; E = 0.002 * (1000, 4000) = (2, 8).
    result = crude_expected([3, 7], pd.Series([1000.0, 4000.0], index=["a", "b"]))
    assert result.expected.to_dict() == pytest.approx({"a": 2.0, "b": 8.0})
    assert result.rates["rate"].iloc[0] == pytest.approx(0.002)


def long_tables(seed: int = 3):
    """Invented strata tables: 30 areas x 2 sexes x 4 age bands."""
    rng = np.random.default_rng(seed)
    index = pd.MultiIndex.from_product([[f"a{i}" for i in range(30)], ["F", "M"],
                                        ["0-14", "15-44", "45-64", "65+"]],
                                       names=["area_id", "sex", "age"])
    population = pd.DataFrame({"population": rng.integers(50, 3000, len(index))}, index=index)
    rate = np.tile([0.0005, 0.001, 0.004, 0.02], 60)
    cases = pd.DataFrame({"cases": rng.poisson(population["population"] * rate)}, index=index)
    return cases.reset_index(), population.reset_index()


def test_internal_standardisation_reproduces_the_observed_total():
    cases, population = long_tables()
    result = internal_standardisation(cases, population, ["sex", "age"])
    # Internal indirect standardisation gives sum E = sum O exactly (METHODS.md section 1).
    assert result.expected.sum() == pytest.approx(cases["cases"].sum(), abs=1e-9)
    assert len(result.expected) == 30
    assert len(result.rates) == 8
    # Each stratum's expected total equals its observed total too, by construction.
    merged = population.merge(result.rates[["sex", "age", "rate"]], on=["sex", "age"])
    by_stratum = (merged["population"] * merged["rate"]).groupby([merged["sex"], merged["age"]]).sum()
    observed_by_stratum = cases.groupby(["sex", "age"])["cases"].sum()
    assert by_stratum.to_numpy() == pytest.approx(observed_by_stratum.to_numpy(), abs=1e-9)


def test_stratum_rates_worked_by_hand():
    # Two areas, two age bands. Young: (2 + 4) / (1000 + 2000) = 0.002.
    # Old: (6 + 3) / (300 + 600) = 0.01.
    # E_x = 0.002 * 1000 + 0.01 * 300 = 5; E_y = 0.002 * 2000 + 0.01 * 600 = 10; sum 15 = 2+4+6+3.
    cases = pd.DataFrame({"area_id": ["x", "x", "y", "y"], "age": ["young", "old"] * 2,
                          "cases": [2, 6, 4, 3]})
    population = pd.DataFrame({"area_id": ["x", "x", "y", "y"], "age": ["young", "old"] * 2,
                               "population": [1000, 300, 2000, 600]})
    rates = stratum_rates(cases, population, ["age"]).set_index("age")["rate"]
    assert rates.to_dict() == pytest.approx({"young": 0.002, "old": 0.01})
    result = internal_standardisation(cases, population, ["age"])
    assert result.expected.to_dict() == pytest.approx({"x": 5.0, "y": 10.0})


def test_external_reference_rates_worked_by_hand():
    # Reference rates per person: young 0.001, old 0.01 (an invented reference table).
    # Area x: young 1200 F + 800 M = 2000 -> 2.0; old 500 -> 5.0; E_x = 7.
    # Area y: young 1000 -> 1.0; old 900 F + 600 M = 1500 -> 15.0; E_y = 16.
    # The population is split by sex too; the rates are not, so sex is summed over.
    population = pd.DataFrame({
        "area_id": ["x", "x", "x", "y", "y", "y"],
        "sex": ["F", "M", "F", "F", "F", "M"],
        "age": ["young", "young", "old", "young", "old", "old"],
        "population": [1200, 800, 500, 1000, 900, 600]})
    reference = pd.DataFrame({"age": ["young", "old"], "rate": [0.001, 0.01]})
    result = external_standardisation(population, reference, ["age"])
    assert result.expected.to_dict() == pytest.approx({"x": 7.0, "y": 16.0})
    table = result.rates.set_index("age")
    assert table.loc["young", "population"] == 3000 and table.loc["old", "expected"] == pytest.approx(20.0)


def test_external_single_rate_without_strata():
    # One reference rate 0.005 for everyone: E = 0.005 * (400, 1000) = (2, 5).
    population = pd.DataFrame({"area_id": ["x", "y"], "population": [400, 1000]})
    result = external_standardisation(population, pd.DataFrame({"rate": [0.005]}), [])
    assert result.expected.to_dict() == pytest.approx({"x": 2.0, "y": 5.0})


def test_missing_reference_rate_gives_nan_not_a_silent_zero():
    population = pd.DataFrame({"area_id": ["x", "x"], "age": ["young", "old"],
                               "population": [100, 100]})
    result = external_standardisation(population, pd.DataFrame({"age": ["young"], "rate": [0.01]}),
                                      ["age"])
    assert np.isnan(result.expected["x"])
