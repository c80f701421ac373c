"""Posterior summaries: exceedance, ranks, decision rule, disclosure masking."""
import numpy as np
import pandas as pd
import pytest
from scipy import stats

from smootharea.disclosure import mask_small_counts
from smootharea.summarise import (area_table, exceedance_probability, rank_draws,
                                  ranking_table, signal_from_probability)


def gamma_draws(shapes, rates, n=40000, seed=3):
    rng = np.random.default_rng(seed)
    return np.column_stack([rng.gamma(a, 1 / b, size=n) for a, b in zip(shapes, rates)])


def test_exceedance_matches_scipy_gamma_tail():
    # Reference: scipy.stats.gamma survival function; Monte Carlo error sqrt(p(1-p)/n).
    shapes, rates = [3.0, 12.0, 40.0], [2.5, 10.0, 45.0]
    draws = gamma_draws(shapes, rates)
    probability = exceedance_probability(draws, 1.0)
    exact = stats.gamma(np.array(shapes), scale=1 / np.array(rates)).sf(1.0)
    mc_error = np.sqrt(exact * (1 - exact) / draws.shape[0])
    assert np.all(np.abs(probability - exact) < 4 * mc_error + 1e-12)


def test_ranks_agree_with_scipy_rankdata_per_draw():
    # Reference: scipy.stats.rankdata on the negated values (rank 1 = highest risk).
    rng = np.random.default_rng(0)
    draws = rng.lognormal(size=(50, 9))
    expected = np.vstack([stats.rankdata(-row, method="ordinal") for row in draws])
    assert np.array_equal(rank_draws(draws), expected)


def test_decision_rule_cut_offs():
    # Richardson et al. 2004: raised above 0.8, lowered below 0.2, else unclear.
    assert list(signal_from_probability(np.array([0.81, 0.8, 0.5, 0.2, 0.19]))) == [
        "higher", "unclear", "unclear", "unclear", "lower"]


def test_area_table_columns_and_intervals():
    draws = gamma_draws([30.0, 5.0, 80.0], [20.0, 5.0, 100.0], n=20000)
    table = area_table(["a", "b", "c"], np.array([12, 3, 70]), np.array([10.0, 4.0, 80.0]),
                       draws, (1.0, 1.5), 0.9)
    assert list(table.columns[:15]) == [
        "area_id", "observed", "expected", "smr", "smr_lower", "smr_upper", "rr_mean",
        "rr_median", "rr_lower", "rr_upper", "rr_sd", "rank_median", "rank_lower",
        "rank_upper", "signal"]
    assert list(table.columns[15:]) == ["p_above_1", "p_above_1.5"]
    # 90% equal-tailed interval of a Gamma(30, rate 20) from scipy.
    lower, upper = stats.gamma(30.0, scale=1 / 20.0).ppf([0.05, 0.95])
    assert table.loc[0, "rr_lower"] == pytest.approx(lower, rel=0.02)
    assert table.loc[0, "rr_upper"] == pytest.approx(upper, rel=0.02)
    assert table.loc[0, "signal"] == "higher" and table.loc[2, "signal"] == "lower"


def test_ranking_orders_by_probability_then_median():
    table = pd.DataFrame({"area_id": ["a", "b", "c"], "rr_median": [1.2, 1.5, 0.9],
                          "rr_lower": [1.0] * 3, "rr_upper": [2.0] * 3, "rank_median": [2, 1, 3],
                          "rank_lower": [1] * 3, "rank_upper": [3] * 3, "signal": ["x"] * 3})
    ranking = ranking_table(table, np.array([0.9, 0.9, 0.95]), 1.0)
    assert list(ranking["area_id"]) == ["c", "b", "a"]
    assert list(ranking["position"]) == [1, 2, 3]


def test_small_counts_and_count_revealing_figures_are_masked():
    # Common practice (METHODS.md section 6): counts below the local threshold are not published,
    # and neither is the SMR, from which O = SMR * E could be read back.
    table = pd.DataFrame({"observed": [0, 3, 5, 12], "expected": [1.0, 2.0, 4.0, 10.0],
                          "smr": [0.0, 1.5, 1.25, 1.2], "smr_lower": [0.0] * 4,
                          "smr_upper": [3.0] * 4, "rr_mean": [0.9, 1.1, 1.1, 1.15]})
    masked = mask_small_counts(table, 5)
    assert masked["observed"].isna().tolist() == [True, True, False, False]
    assert masked["smr"].isna().tolist() == [True, True, False, False]
    assert masked["rr_mean"].notna().all()
    assert masked["suppressed"].tolist() == [True, True, False, False]


def test_a_single_small_count_gets_a_complementary_partner():
    # Common practice (statistical disclosure control): one hidden cell could be recovered from
    # the published total by subtraction, so the next-smallest count is hidden as well.
    table = pd.DataFrame({"observed": [40, 3, 12, 9], "expected": [30.0, 4.0, 11.0, 10.0],
                          "smr": [1.3, 0.75, 1.1, 0.9]})
    masked = mask_small_counts(table, 5)
    assert masked["suppressed"].tolist() == [False, True, False, True]
    assert masked["observed"].isna().tolist() == [False, True, False, True]


# --- large maps: the same numbers, computed a block at a time -----------------------------

from fixtures_runs import nc_run_dir  # noqa: E402,F401  (shared session fixture)


def _nc_posterior(run_dir):
    import arviz as az
    return az.from_netcdf(run_dir / "posterior.nc", engine="h5netcdf")


def test_blocked_area_table_equals_whole_array_numpy(nc_run_dir, monkeypatch):
    # Reference: numpy's mean, median, quantile and std over the whole stacked draws, and
    # scipy.stats.rankdata per draw, on a real North Carolina posterior (2 chains x 300 draws).
    import smootharea.summarise as summarise
    values = summarise.relative_risk_values(_nc_posterior(nc_run_dir))
    draws = values.reshape(-1, values.shape[-1])
    n = draws.shape[1]
    monkeypatch.setattr(summarise, "AREA_BLOCK", 7)  # 100 counties: 15 blocks, the last short
    monkeypatch.setattr(summarise, "DRAW_BLOCK", 33)
    table = summarise.area_table([str(i) for i in range(n)], np.arange(n), np.ones(n), values,
                                 (1.0, 1.2), 0.9)
    ranks = np.vstack([stats.rankdata(-row, method="ordinal") for row in draws])
    assert np.allclose(table["rr_mean"], draws.mean(axis=0), rtol=1e-12)
    assert np.allclose(table["rr_median"], np.median(draws, axis=0), rtol=1e-12)
    assert np.allclose(table["rr_lower"], np.quantile(draws, 0.05, axis=0), rtol=1e-12)
    assert np.allclose(table["rr_upper"], np.quantile(draws, 0.95, axis=0), rtol=1e-12)
    assert np.allclose(table["rr_sd"], draws.std(axis=0, ddof=1), rtol=1e-12)
    assert np.array_equal(table["rank_median"], np.median(ranks, axis=0))
    assert np.array_equal(table["rank_lower"], np.floor(np.quantile(ranks, 0.05, axis=0)))
    assert np.array_equal(table["rank_upper"], np.ceil(np.quantile(ranks, 0.95, axis=0)))
    assert np.array_equal(table["p_above_1.2"], (draws > 1.2).mean(axis=0))


def test_rank_matrix_uses_a_small_integer_type():
    rng = np.random.default_rng(1)
    from smootharea.summarise import rank_matrix
    values = rng.lognormal(size=(2, 5, 300))
    ranks = rank_matrix(values)
    assert ranks.dtype == np.uint16 and ranks.shape == (10, 300)
    assert np.array_equal(ranks, rank_draws(values.reshape(10, 300)))


def test_blocked_loo_and_waic_equal_arviz_on_the_whole_posterior(nc_run_dir, monkeypatch):
    # Reference: ArviZ 0.23's az.loo and az.waic on the whole North Carolina posterior
    # (r_eff from the whole posterior, as az.loo computes it by default).
    import warnings

    import arviz as az

    import smootharea.summarise as summarise
    idata = _nc_posterior(nc_run_dir)
    monkeypatch.setattr(summarise, "AREA_BLOCK", 30)  # 100 counties: 4 blocks
    result = summarise.model_comparison(idata)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        loo, waic = az.loo(idata, pointwise=True), az.waic(idata, pointwise=True)
    k = np.asarray(loo.pareto_k)
    assert result["loo"]["elpd"] == pytest.approx(float(loo.elpd_loo), rel=1e-9)
    assert result["loo"]["se"] == pytest.approx(float(loo.se), rel=1e-9)
    assert result["loo"]["p_loo"] == pytest.approx(float(loo.p_loo), rel=1e-9)
    assert result["loo"]["pareto_k_good"] == int(np.sum(k <= 0.7))
    assert result["loo"]["pareto_k_very_bad"] == int(np.sum(k > 1.0))
    assert result["waic"]["elpd"] == pytest.approx(float(waic.elpd_waic), rel=1e-9)
    assert result["waic"]["se"] == pytest.approx(float(waic.se), rel=1e-9)
    # ArviZ adds up the float32 pointwise variances in float32; the blocks add in float64.
    assert result["waic"]["p_waic"] == pytest.approx(float(waic.p_waic), rel=1e-6)
