"""Frequentist references: Poisson GLM, overdispersion, negative binomial, Marshall EB, Moran's I."""
import geopandas as gpd
import libpysal
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from smootharea.frequentist import fit_references, marshall_global_eb, morans_i
from smootharea.graph import build_graph, graph_from_edges
from smootharea.job import NeighbourRules


@pytest.fixture(scope="module")
def north_carolina():
    # North Carolina SIDS as shipped by libpysal (Cressie 1993, Statistics for Spatial Data;
    # Cressie & Read 1985). SID74/BIR74 hold deaths and live births for 1974-78.
    areas = gpd.read_file(libpysal.examples.get_path("sids2.shp"))
    areas["area_id"] = areas["FIPS"].astype(str)
    observed = areas["SID74"].to_numpy(dtype=float)
    births = areas["BIR74"].to_numpy(dtype=float)
    expected = births * observed.sum() / births.sum()  # internal standard, METHODS.md 1(a)
    covariates = pd.DataFrame({"nonwhite_share": areas["NWBIR74"] / areas["BIR74"]})
    graph = build_graph(areas[["area_id", "geometry"]], NeighbourRules(rule="queen"))
    return areas, observed, births, expected, covariates, graph


def test_north_carolina_totals_for_1974_78(north_carolina):
    # Cressie 1993 (from memory): 667 SIDS deaths among 329,962 live births, 1974-78.
    areas, observed, births, *_ = north_carolina
    assert observed.sum() == 667
    assert births.sum() == 329_962


def test_glm_matches_statsmodels_called_directly(north_carolina):
    # Reference library: statsmodels GLM, Poisson family, offset log(E), on the same arrays.
    _, observed, _, expected, covariates, graph = north_carolina
    references = fit_references(observed, expected, covariates, graph, permutations=99)
    design = sm.add_constant(covariates.to_numpy())
    direct = sm.GLM(observed, design, family=sm.families.Poisson(), offset=np.log(expected)).fit()
    fitted = [references.glm["intercept"], references.glm["nonwhite_share"]]
    np.testing.assert_allclose([c.estimate for c in fitted], direct.params, rtol=1e-8)
    np.testing.assert_allclose([c.std_error for c in fitted], direct.bse, rtol=1e-8)
    # Rate-ratio interval = exp of statsmodels' Wald 95% interval.
    bounds = np.exp(direct.conf_int(alpha=0.05))
    np.testing.assert_allclose([[c.rate_ratio_low, c.rate_ratio_high] for c in fitted], bounds, rtol=1e-8)
    assert references.overdispersion == pytest.approx(direct.pearson_chi2 / direct.df_resid, rel=1e-10)
    np.testing.assert_allclose(references.pearson_residuals, direct.resid_pearson, rtol=1e-10)


def test_north_carolina_overdispersion_and_negative_binomial_are_finite(north_carolina):
    # Without covariates the Pearson ratio is computed and finite. NC SIDS counts vary beyond
    # Poisson (Cressie 1993 models that extra variation; from memory), so the ratio exceeds 1
    # and the NB2 dispersion alpha is clear of 0 by its Wald interval.
    _, observed, _, expected, _, graph = north_carolina
    references = fit_references(observed, expected, pd.DataFrame(index=range(100)), graph,
                                permutations=99)
    assert np.isfinite(references.overdispersion) and references.overdispersion > 1
    assert references.df_resid == 99
    nb = references.negative_binomial
    assert nb is not None and nb.converged and np.isfinite(nb.alpha)
    assert nb.alpha - 1.96 * nb.alpha_std_error > 0
    assert set(nb.coefficients) == {"intercept"}
    summary = references.to_dict()
    assert summary["overdispersion"] == references.overdispersion
    assert set(summary["morans_i"]) >= {"i", "p_value"}
    assert summary["empirical_bayes"]["overall_ratio"] == pytest.approx(1.0)


def test_marshall_global_eb_hand_worked_case():
    # Hand-worked, following Marshall 1991 (Applied Statistics 40) as stated in METHODS.md 2:
    # O = (0, 4, 8), E = (2, 2, 4): m = 12/8 = 1.5; SMR = (0, 2, 2).
    # sum E (SMR - m)^2 = 2*2.25 + 2*0.25 + 4*0.25 = 6;  6 / 8 = 0.75.
    # mean(E) = 8/3, m / mean(E) = 0.5625, so s2 = 0.75 - 0.5625 = 0.1875.
    # C = s2 / (s2 + m/E): E=2 -> 0.1875/0.9375 = 0.2; E=4 -> 0.1875/0.5625 = 1/3.
    # estimates: 1.5 + 0.2*(0 - 1.5) = 1.2;  1.5 + 0.2*0.5 = 1.6;  1.5 + 0.5/3 = 1.6667.
    result = marshall_global_eb([0, 4, 8], [2.0, 2.0, 4.0])
    assert result.overall_ratio == pytest.approx(1.5)
    assert result.between_variance == pytest.approx(0.1875)
    np.testing.assert_allclose(result.shrinkage, [0.2, 0.2, 1 / 3])
    np.testing.assert_allclose(result.estimate, [1.2, 1.6, 1.5 + 0.5 / 3])


def test_marshall_variance_is_floored_at_zero():
    # O = E everywhere: the moment estimate 0 - m/mean(E) = -0.5 is negative, floored at 0
    # (Marshall 1991), so every area is shrunk fully to m = 1.
    result = marshall_global_eb([2, 2], [2.0, 2.0])
    assert result.between_variance == 0.0
    np.testing.assert_allclose(result.estimate, [1.0, 1.0])


def lattice_graph(rows, cols):
    index = np.arange(rows * cols).reshape(rows, cols)
    edges = np.vstack([np.c_[index[:, :-1].ravel(), index[:, 1:].ravel()],
                       np.c_[index[:-1].ravel(), index[1:].ravel()]])
    return graph_from_edges([str(i) for i in range(rows * cols)], edges)


def moran_by_formula(values, graph):
    """Moran 1950 (Biometrika 37) with row-standardised weights, written out directly:
    I = n / S0 * sum_ij w_ij z_i z_j / sum_i z_i^2; islands have an empty row."""
    z = values - values.mean()
    adjacency = graph.adjacency.toarray()
    rows = adjacency.sum(axis=1, keepdims=True)
    weights = np.divide(adjacency, rows, out=np.zeros_like(adjacency), where=rows > 0)
    return len(z) / weights.sum() * (z @ weights @ z) / (z @ z)


def test_morans_i_detects_a_spatial_gradient_and_not_a_shuffled_one():
    # A smooth east-west gradient on a 12 x 12 lattice is strongly autocorrelated; the same
    # values shuffled (fixed seed) are not (Moran 1950; permutation test, common practice).
    graph = lattice_graph(12, 12)
    gradient = np.tile(np.arange(12.0), 12) + 0.1 * np.random.default_rng(1).normal(size=144)
    patterned = morans_i(gradient, graph, permutations=999, seed=11)
    assert patterned.i == pytest.approx(moran_by_formula(gradient, graph), rel=1e-10)
    assert patterned.i > 0.8 and patterned.p_value_positive <= 0.002
    shuffled_values = np.random.default_rng(5).permutation(gradient)
    shuffled = morans_i(shuffled_values, graph, permutations=999, seed=11)
    assert shuffled.i == pytest.approx(moran_by_formula(shuffled_values, graph), rel=1e-10)
    assert shuffled.p_value > 0.05
    again = morans_i(shuffled_values, graph, permutations=999, seed=11)
    assert again.p_value == shuffled.p_value  # deterministic for a given seed


def test_morans_i_with_an_island_and_without_links():
    # Islands stay in n with an empty weights row (same definition as moran_by_formula).
    graph = graph_from_edges(list("abcdef"), [(0, 1), (1, 2), (2, 3), (3, 4)])  # f is an island
    values = np.array([1.0, 2.0, 3.0, 4.0, 5.0, 0.5])
    result = morans_i(values, graph, permutations=99, seed=0)
    assert result.i == pytest.approx(moran_by_formula(values, graph), rel=1e-10)
    assert morans_i(values, graph_from_edges(list("abcdef"), []), permutations=99) is None
    assert morans_i(np.ones(6), graph, permutations=99) is None


def test_fit_references_does_not_disturb_the_global_random_state(north_carolina):
    _, observed, _, expected, covariates, graph = north_carolina
    np.random.seed(123)
    before = np.random.random()
    np.random.seed(123)
    fit_references(observed, expected, covariates, graph, permutations=49)
    assert np.random.random() == before
