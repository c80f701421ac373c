"""Model, sampler and convergence checks against independent references.

Data: North Carolina SIDS 1974 (libpysal.examples 'sids2.shp', an open dataset shipped
with libpysal), with internally standardised expected counts
E_i = BIR74_i * sum(SID74) / sum(BIR74) (METHODS.md section 1).
Sampling tests use short chains (2 x 500) and are marked slow.
"""
from __future__ import annotations

import dataclasses
import math
import os

import arviz as az
import libpysal
import numpy as np
import pandas as pd
import pytensor
import pytensor.tensor as pt
import pytest
import scipy.sparse as sp
import scipy.stats as stats
import statsmodels.api as sm
from scipy.integrate import quad

import geopandas as gpd
from smootharea.diagnostics import assess_convergence
from smootharea.graph import graph_from_edges
from smootharea.job import Sampling
from smootharea.model import (IcarLayout, build_model, logit_mixing_from_distance,
                              mixing_distance, mixing_kld_logit, mixing_spectrum,
                              pairwise_difference_log_density, pc_mixing_log_density,
                              pc_mixing_rate, zero_sum_by_component)
import smootharea.model as model_module
from smootharea.recipes import load_recipe
from smootharea.sampling import sample_posterior
from smootharea.study import StudyData

SHORT = Sampling(chains=2, draws=500, warmup=500, seed=20261201, cores=2)


# ------------------------------------------------------------------ data helpers

def nc_areas(first: int | None = None) -> gpd.GeoDataFrame:
    areas = gpd.read_file(libpysal.examples.get_path("sids2.shp"))
    if first is not None:
        areas = areas.iloc[:first].reset_index(drop=True)
    areas["area_id"] = areas["FIPS"].astype(str)
    return areas


def nc_study(first: int | None = None, covariate: bool = False) -> StudyData:
    areas = nc_areas(first)
    observed = areas["SID74"].to_numpy().astype(np.int64)
    births = areas["BIR74"].to_numpy(dtype=float)
    expected = births * observed.sum() / births.sum()
    covariates = (pd.DataFrame({"nonwhite_share": areas["NWBIR74"] / areas["BIR74"]})
                  if covariate else pd.DataFrame(index=range(len(areas))))
    return StudyData(area_ids=tuple(areas["area_id"]), areas=areas, observed=observed,
                     expected=expected, population=None, covariates=covariates,
                     standardisation="internal: BIR74 x overall SIDS rate")


def queen_edges(areas: gpd.GeoDataFrame) -> list[tuple[int, int]]:
    weights = libpysal.weights.Queen.from_dataframe(areas, use_index=False, silence_warnings=True)
    return [(i, j) for i, neighbours in weights.neighbors.items() for j in neighbours if i < j]


def nc_graph(study: StudyData):
    return graph_from_edges(study.area_ids, queen_edges(study.areas))


def split_graph(study: StudyData):
    """First 20 NC counties with links (2, 9) and (3, 6) removed: components of 14 and
    5 counties plus one island (county index 3). Checked against the queen links below."""
    edges = [e for e in queen_edges(study.areas) if e not in ((2, 9), (3, 6))]
    graph = graph_from_edges(study.area_ids, edges)
    assert sorted(graph.component_sizes.tolist()) == [1, 5, 14]
    assert graph.islands.tolist() == [3]
    return graph


def dense_laplacian(n: int, edges) -> np.ndarray:
    q = np.zeros((n, n))
    for i, j in edges:
        q[i, j] = q[j, i] = -1.0
    q[np.diag_indices(n)] = -q.sum(axis=1)
    return q


# --------------------------------------------------------- ICAR and constraints

def test_icar_edge_sum_equals_quadratic_form():
    # Besag 1974: sum over neighbour pairs (u_i - u_j)^2 = u'(D - W)u; Q built densely here only.
    study = nc_study(first=20)
    graph = nc_graph(study)
    u = np.random.default_rng(1).normal(size=graph.n_areas)
    q = dense_laplacian(graph.n_areas, graph.edges)
    variable = pt.dvector("u")
    value = pytensor.function([variable], pairwise_difference_log_density(variable, graph.edges))(u)
    assert value == pytest.approx(-0.5 * u @ q @ u, rel=1e-12)
    # The gradient is -Qu, in the C and the numba backend (the sampler uses numba).
    density = pairwise_difference_log_density(variable, graph.edges)
    for mode in ("FAST_RUN", "NUMBA"):
        value, gradient = pytensor.function([variable], [density, pytensor.grad(density, variable)],
                                            mode=mode)(u)
        assert value == pytest.approx(-0.5 * u @ q @ u, rel=1e-12)
        np.testing.assert_allclose(gradient, -q @ u, rtol=1e-12, atol=1e-12)


def test_zero_sum_map_on_one_component_equals_the_general_map(monkeypatch):
    # The one-component shortcut (no gather or scatter) against the general per-component map
    # on the same 20 connected NC counties: same u to rounding, sum zero, an isometry.
    study = nc_study(first=20)
    layout = IcarLayout.from_graph(nc_graph(study))
    assert layout.is_one_component
    free = pt.dvector("free")
    z = np.random.default_rng(3).normal(size=layout.n_free)
    u_short = pytensor.function([free], zero_sum_by_component(free, layout))(z)
    monkeypatch.setattr(IcarLayout, "is_one_component", property(lambda self: False))
    u_general = pytensor.function([free], zero_sum_by_component(free, layout))(z)
    np.testing.assert_allclose(u_short, u_general, rtol=1e-12, atol=1e-14)
    assert abs(u_short.sum()) < 1e-12
    assert np.linalg.norm(u_short) == pytest.approx(np.linalg.norm(z), rel=1e-12)


def test_zero_sum_map_is_an_isometry_with_zero_component_sums():
    study = nc_study(first=20)
    layout = IcarLayout.from_graph(split_graph(study))
    assert layout.n_free == 20 - 3  # (14 - 1) + (5 - 1), the island has none
    free = pt.dvector("free")
    to_u = pytensor.function([free], zero_sum_by_component(free, layout))
    z = np.random.default_rng(2).normal(size=layout.n_free)
    u = to_u(z)
    graph = split_graph(study)
    for label, members in enumerate(graph.components):
        assert abs(u[members].sum()) < 1e-12, label
    assert u[3] == 0.0
    # Isometry (as PyMC's ZeroSumTransform): the ICAR density keeps its form.
    assert np.linalg.norm(u) == pytest.approx(np.linalg.norm(z), rel=1e-12)


# ------------------------------------------------------------- PC prior for phi

def test_mixing_kld_matches_dense_gaussian_kld_with_components_and_island():
    # Riebler et al. 2016: KLD between N(0, (1-phi) I + phi R^-) and N(0, I), R^- the scaled
    # generalised inverse per component (Freni-Sterrantino et al. 2018); islands keep variance 1.
    # Reference: 0.5 (tr S - n - log det S) from numpy.linalg.pinv, independent of eigvalsh.
    study = nc_study(first=20)
    graph = split_graph(study)
    n = graph.n_areas
    covariance_inverse = np.zeros((n, n))
    for label, members in enumerate(graph.components):
        if members.size == 1:
            covariance_inverse[members[0], members[0]] = 1.0  # island: exchangeable only
            continue
        local = {a: k for k, a in enumerate(members)}
        edges = [(local[i], local[j]) for i, j in graph.edges if i in local and j in local]
        pinv = np.linalg.pinv(dense_laplacian(members.size, edges))
        scale = math.exp(np.mean(np.log(np.diag(pinv))))
        assert scale == pytest.approx(graph.scaling_factors[label], rel=1e-8)
        covariance_inverse[np.ix_(members, members)] = pinv / scale
    island = np.zeros(n, dtype=bool)
    island[graph.islands] = True
    spectrum = mixing_spectrum(graph)
    for phi in (1e-3, 0.2, 0.5, 0.9, 0.999):
        covariance = np.where(np.diag(island), 1.0,
                              (1 - phi) * np.eye(n) + phi * covariance_inverse)
        expected = 0.5 * (np.trace(covariance) - n - np.linalg.slogdet(covariance)[1])
        y = math.log(phi) - math.log1p(-phi)
        assert mixing_kld_logit(y, spectrum) == pytest.approx(expected, rel=1e-8)


def test_pc_prior_for_phi_puts_two_thirds_below_one_half_and_integrates_to_one():
    # Riebler et al. 2016 default P(phi < 0.5) = 2/3; the density must be proper on (0, 1).
    study = nc_study()
    spectrum = mixing_spectrum(nc_graph(study))
    rate = pc_mixing_rate(spectrum, 0.5, 2 / 3)
    density = lambda p: float(np.exp(pc_mixing_log_density(p, spectrum, rate)))  # noqa: E731
    assert quad(density, 0, 0.5, limit=200)[0] == pytest.approx(2 / 3, abs=1e-6)
    edge = 1 - 1e-6
    # Mass above `edge` is exactly exp(-lambda d(edge)) since d ~ Exponential(lambda).
    upper_tail = math.exp(-rate * float(mixing_distance(edge, spectrum)))
    assert quad(density, 0.5, edge, limit=400)[0] + upper_tail == pytest.approx(1 / 3, abs=1e-5)


def test_phi_from_distance_inverts_the_distance_with_exact_gradient():
    study = nc_study()
    spectrum = mixing_spectrum(nc_graph(study))
    distance = pt.dscalar("d")
    logit_phi = logit_mixing_from_distance(distance, spectrum)
    solve = pytensor.function([distance], [logit_phi, pytensor.grad(logit_phi, distance)])
    # Interpolated inverse (model.py): exact to 1e-8 in logit(phi) against the exact distance,
    # at knots and between them, and C1 (gradient equal to a central difference).
    for phi in (1e-6, 1e-3, 0.05, 0.123456, 0.5, 0.777, 0.95, 0.999, 1 - 1e-8):
        d = float(mixing_distance(phi, spectrum))
        y, slope = solve(d)
        assert y == pytest.approx(math.log(phi) - math.log1p(-phi), abs=1e-8)
        step = 1e-6 * d
        numeric = (solve(d + step)[0] - solve(d - step)[0]) / (2 * step)
        assert slope == pytest.approx(numeric, rel=1e-5)


def test_lanczos_spectrum_agrees_with_exact_on_a_larger_graph(monkeypatch):
    # Stochastic Lanczos quadrature (Ubaru, Chen & Saad 2017) must reproduce the exact
    # distance within a few per cent; checked on all 100 NC counties.
    study = nc_study()
    graph = nc_graph(study)
    exact = mixing_spectrum(graph)
    monkeypatch.setattr(model_module, "DENSE_SPECTRUM_MAX", 10)
    estimated = mixing_spectrum(graph)
    assert exact.exact and not estimated.exact
    for phi in (0.05, 0.5, 0.95):
        assert float(mixing_distance(phi, estimated)) == pytest.approx(
            float(mixing_distance(phi, exact)), rel=0.05)


# ------------------------------------------- BYM2 as one combined effect

def scaled_bym2_covariance(graph, sigma: float, phi: float) -> np.ndarray:
    """sigma^2 ((1 - phi) I + phi R^-) per component, R^- = Q^+ / s from numpy.linalg.pinv
    (Riebler et al. 2016, section 3); islands sigma^2 (Freni-Sterrantino et al. 2018)."""
    n = graph.n_areas
    covariance = np.zeros((n, n))
    for label, members in enumerate(graph.components):
        if members.size == 1:
            covariance[members[0], members[0]] = sigma**2
            continue
        local = {a: k for k, a in enumerate(members)}
        edges = [(local[i], local[j]) for i, j in graph.edges if i in local and j in local]
        pinv = np.linalg.pinv(dense_laplacian(members.size, edges))
        scale = math.exp(np.mean(np.log(np.diag(pinv))))
        covariance[np.ix_(members, members)] = sigma**2 * (
            (1 - phi) * np.eye(members.size) + phi * pinv / scale)
    return covariance


@pytest.mark.parametrize("split", [True, False], ids=["components_and_island", "one_component"])
def test_combined_bym2_density_is_the_bym2_gaussian(split, monkeypatch):
    # Reference: scipy.stats.multivariate_normal with the BYM2 covariance built densely from
    # numpy's pseudo-inverse. The model samples b as (sum-to-zero part, one mean per component,
    # islands); its log density, with the Jacobian of that linear map, must equal the dense
    # Gaussian up to one constant for every sigma, phi and b. The connected graph takes the
    # one-component shortcut of the sum-to-zero map and of the component mean.
    import smootharea.bym2_combined as combined

    # The algebra is checked with a tight solve; the sampler's looser one is checked in
    # test_combined_quadratic_form_and_gradient_match_dense_algebra.
    monkeypatch.setattr(combined, "SOLVER_TOLERANCE", 1e-6)
    study = nc_study(first=20)
    graph = split_graph(study) if split else nc_graph(study)
    rng = np.random.default_rng(11)
    differences = []
    for sigma, phi in ((0.3, 0.2), (0.8, 0.7), (1.5, 0.999), (0.5, 1e-3)):
        recipe = (load_recipe("bym2").with_prior("sigma", "fixed", value=sigma)
                  .with_prior("phi", "fixed", value=phi))
        model = build_model(study, graph, recipe)
        others = [model["effect_component_mean"]] + ([model["v_island"]] if split else [])
        terms = model.replace_rvs_by_values([model["combined_bym2"],
                                             model.logp(vars=others, sum=True)])
        log_b = pt.log(model.replace_rvs_by_values([model["relative_risk"]])[0])
        evaluate = model.compile_fn([terms[0] + terms[1], log_b], inputs=model.value_vars,
                                    on_unused_input="ignore", point_fn=False)
        for _ in range(3):
            point = {v.name: rng.normal(size=model.initial_point()[v.name].shape)
                     for v in model.value_vars}
            point["intercept_standardised"] = np.array(0.0)
            density, b = evaluate(**point)
            # one mean per component of two or more areas, sigma per island
            means, islands = (2, 1) if split else (1, 0)
            jacobian = means * math.log(sigma * math.sqrt(1 - phi)) + islands * math.log(sigma)
            reference = stats.multivariate_normal(np.zeros(graph.n_areas),
                                                  scaled_bym2_covariance(graph, sigma, phi)).logpdf(b)
            differences.append(density - jacobian - reference)
    # The solve stops at relative residual 1e-6; the value's error is quadratic in that but
    # scaled by 1 / sigma^2 and by M's conditioning (worst at phi = 1e-3): measured 5e-7.
    # (At the sampler's 1e-3 the spread was 2.7e-5 and 6.8e-5.)
    assert np.ptp(differences) < 2e-6


def test_padded_neighbour_table_sums_like_the_adjacency_matrix():
    # A star (one hub linked to every other area) on top of a path: the hub's degree is far
    # above the 95th percentile, so most of its links go to the spill pairs. The sums must
    # equal scipy's sparse product for any vector.
    from smootharea.bym2_combined import neighbour_sum, padded_neighbour_table
    n = 40
    pairs = [(0, j) for j in range(1, n)] + [(j, j + 1) for j in range(1, n - 1)]
    rows, cols = np.array(pairs).T
    adjacency = sp.coo_matrix((np.ones(2 * len(pairs)), (np.r_[rows, cols], np.r_[cols, rows])),
                              shape=(n, n)).tocsr()
    table, spill_rows, spill_cols = padded_neighbour_table(adjacency)
    assert table.shape[0] < n - 1 and spill_rows.size > 0 and set(spill_rows) == {0}
    vector = np.append(np.random.default_rng(2).normal(size=n), 0.0)
    out = np.empty(n)
    neighbour_sum(table, spill_rows, spill_cols, vector, out)
    np.testing.assert_allclose(out, adjacency @ vector[:n], rtol=1e-12)


def test_combined_quadratic_form_and_gradient_match_dense_algebra():
    # q = b' Q M^-1 b with M = (1 - phi) Q + phi S and its gradients, against dense numpy
    # solves (value, d/db) and a central difference (d/dphi); phi near 0, in the middle, near
    # 1 and at 1. Solved tightly (relative residual 1e-10) the kernel must match to rounding;
    # through the Op, in the numba backend the sampler uses and in Python, at the sampler's
    # tolerance: the value's error is of the order of its square, the gradients' of itself.
    from smootharea.bym2_combined import (CombinedLayout, combined_quadratic_form,
                                          quadratic_form, solver_tolerance)
    study = nc_study()
    graph = nc_graph(study)
    layout = CombinedLayout.from_graph(graph)
    q = dense_laplacian(graph.n_areas, graph.edges)
    s_inverse = np.diag(layout.inverse_scaling)
    b = np.random.default_rng(5).normal(size=graph.n_areas)
    b -= b.mean()

    def dense(phi):
        return b @ q @ np.linalg.solve((1 - phi) * q + phi * s_inverse, b)

    def check(value, gradient_b, gradient_phi, phi, tolerance):
        solved = np.linalg.solve((1 - phi) * q + phi * s_inverse, b)
        assert value == pytest.approx(b @ q @ solved, rel=max(10 * tolerance**2, 1e-12))
        exact = 2 * q @ solved
        assert np.linalg.norm(gradient_b - exact) < 100 * tolerance * np.linalg.norm(exact)
        # M stays positive definite a little beyond phi = 1, so a central difference works there.
        h = min(1e-6, phi / 10)
        numeric = (dense(phi + h) - dense(phi - h)) / (2 * h)
        assert gradient_phi == pytest.approx(numeric, rel=max(100 * tolerance, 1e-5), abs=1e-4)

    phis = (1e-4, 0.3, 0.8, 1 - 1e-9, 1.0)
    for phi in phis:
        value, gradient_b, gradient_phi, _ = combined_quadratic_form(b, phi, *layout.arrays(), 1e-10)
        check(value, gradient_b, gradient_phi, phi, 1e-10)
    b_var, phi_var = pt.dvector("b"), pt.dscalar("phi")
    form = quadratic_form(b_var, phi_var, layout)
    gradients = pytensor.grad(form, [b_var, phi_var])
    for mode in ("NUMBA", "FAST_COMPILE"):
        evaluate = pytensor.function([b_var, phi_var], [form, *gradients], mode=mode)
        for phi in phis:
            check(*evaluate(b, phi), phi, solver_tolerance(graph.n_areas))


def test_bym2_parameterisation_follows_the_extra_poisson_variation():
    # North Carolina SIDS 1974 has clear extra-Poisson variation (Pearson chi2 / df 2.28 from
    # statsmodels' GLM, as `smootharea check` reports): centred. The same expected counts
    # with counts equal to them (rounded) have none: non-centred, and a different compiled model.
    from smootharea.model import random_effect_parameterisation
    study = nc_study()
    recipe = load_recipe("bym2")
    assert random_effect_parameterisation(study, recipe) == "centred"
    flat = dataclasses.replace(study, observed=np.round(study.expected).astype(np.int64))
    assert random_effect_parameterisation(flat, recipe) == "non-centred"
    assert random_effect_parameterisation(study, load_recipe("bym")) == "non-centred"
    graph = nc_graph(study)
    assert build_model(study, graph, recipe).structure_key != build_model(flat, graph, recipe).structure_key


def test_chebyshev_log_determinant_matches_exact_eigenvalues():
    # The large-component path (a few exact small eigenvalues, a Chebyshev interpolant for the
    # rest) against the exact spectrum from numpy eigvalsh, on all 100 NC counties; the term
    # only matters up to a constant in phi, so differences from phi = 0.5 are compared.
    from smootharea.bym2_combined import mixing_log_det
    graph = nc_graph(nc_study())
    exact = mixing_log_det(graph)
    interpolated = mixing_log_det(graph, dense_max=10)
    assert not exact.chebyshev and len(interpolated.chebyshev) == 1
    for phi in (1e-6, 1e-3, 0.05, 0.3, 0.7, 0.95, 1 - 1e-9, 1.0):
        assert interpolated.numpy(phi) - interpolated.numpy(0.5) == pytest.approx(
            exact.numpy(phi) - exact.numpy(0.5), abs=1e-8)
    phi = pt.dscalar("phi")
    slope = pytensor.function([phi], pytensor.grad(interpolated.tensor(phi), phi))
    for value in (0.01, 0.5, 0.99):
        numeric = (interpolated.numpy(value + 1e-6) - interpolated.numpy(value - 1e-6)) / 2e-6
        assert slope(value) == pytest.approx(numeric, rel=1e-5)


# --------------------------------------------------------------- model contract

def test_every_recipe_builds_with_the_named_variables():
    study = nc_study(first=20, covariate=True)
    graph = split_graph(study)
    expected_free = {"exchangeable": {"sigma"}, "icar": {"sigma"},
                     "bym": {"sigma_spatial", "sigma_unstructured"},
                     "bym2": {"sigma", "phi_distance", "effect_free", "effect_component_mean"}}
    for name, hyper in expected_free.items():
        model = build_model(study, graph, load_recipe(name))
        names = set(model.named_vars)
        assert {"relative_risk", "intercept", "beta", "poisson_log_likelihood"} <= names, name
        assert hyper <= names, name
        assert model.named_vars_to_dims["relative_risk"] == ("area",)
        assert list(model.coords["area"]) == list(study.area_ids)
        assert list(model.coords["covariate"]) == ["nonwhite_share"]
        assert np.isfinite(model.compile_logp()(model.initial_point()))
    with pytest.raises(ValueError, match="no covariates"):
        build_model(study, graph, load_recipe("poisson_gamma"))


def test_spatial_recipe_on_a_graph_without_links_is_refused():
    study = nc_study(first=5)
    graph = graph_from_edges(study.area_ids, np.empty((0, 2)))
    with pytest.raises(ValueError, match="exchangeable"):
        build_model(study, graph, load_recipe("bym2"))


# ------------------------------------------------------------------- sampling

@pytest.mark.slow
def test_poisson_gamma_matches_the_conjugate_posterior():
    # Conjugacy (METHODS.md section 3; Clayton & Kaldor 1987): theta_i | O_i ~
    # Gamma(a + O_i, rate b + E_i); reference values from scipy.stats.gamma.
    study = nc_study(first=20)
    recipe = load_recipe("poisson_gamma")
    a, b = recipe.priors["relative_risk"].params["shape"], recipe.priors["relative_risk"].params["rate"]
    idata = sample_posterior(build_model(study, nc_graph(study), recipe), SHORT, recipe,
                             progress=False, max_draws=SHORT.draws)
    exact = stats.gamma(a + study.observed, scale=1 / (b + study.expected))
    theta = idata.posterior["relative_risk"]
    mean_error = np.abs(theta.mean(("chain", "draw")).values - exact.mean())
    mcse_mean = az.mcse(theta).to_array().values.ravel()
    assert np.all(mean_error < 4 * mcse_mean), (mean_error / mcse_mean).max()
    above = (theta > 1.0).astype(float)
    above_error = np.abs(above.mean(("chain", "draw")).values - exact.sf(1.0))
    mcse_above = az.mcse(above.to_dataset(name="p")).p.values
    assert np.all(above_error < 4 * mcse_above + 0.01), above_error.max()
    # Pointwise log-likelihood for PSIS-LOO: log Poisson(O | E theta) per draw and area.
    log_lik = idata.log_likelihood["observed"]
    assert log_lik.dims == ("chain", "draw", "area")
    draw = theta.isel(chain=0, draw=0).values
    assert np.allclose(log_lik.isel(chain=0, draw=0).values,
                       stats.poisson.logpmf(study.observed, study.expected * draw))
    assert np.isfinite(az.loo(idata).elpd_loo)


@pytest.mark.slow
def test_exchangeable_with_tiny_sigma_reproduces_the_poisson_glm():
    # Reference: statsmodels Poisson GLM with offset log(E) (METHODS.md section 2). With
    # sigma fixed at 0.001 the model is that GLM plus Normal priors, so posterior means agree
    # within Monte Carlo error plus the prior's pull (first-order: SE_z^2 / prior_var * est_z
    # on the standardised scale). 3 MCSE rather than 2: 2 fails ~5% of seeds by chance.
    study = nc_study(covariate=True)
    recipe = load_recipe("exchangeable").with_prior("sigma", "fixed", value=0.001)
    idata = sample_posterior(build_model(study, nc_graph(study), recipe), SHORT, recipe,
                             progress=False, max_draws=SHORT.draws)
    x = study.covariates["nonwhite_share"].to_numpy()
    glm = sm.GLM(study.observed, sm.add_constant(x), family=sm.families.Poisson(),
                 offset=np.log(study.expected)).fit()
    posterior = idata.posterior
    sd_x = x.std()
    beta_z, se_z = glm.params[1] * sd_x, glm.bse[1] * sd_x
    pull = se_z**2 / 1.0**2 * abs(beta_z) / sd_x  # on the per-unit scale
    beta = posterior["beta"].sel(covariate="nonwhite_share")
    beta_mcse = float(az.mcse(beta.to_dataset(name="b")).b)
    assert abs(float(beta.mean()) - glm.params[1]) < 3 * beta_mcse + pull
    intercept = posterior["intercept"]
    intercept_mcse = float(az.mcse(intercept.to_dataset(name="a")).a)
    assert abs(float(intercept.mean()) - glm.params[0]) < 3 * intercept_mcse + pull * x.mean()
    # Posterior SD close to the GLM standard error (large-sample agreement).
    assert float(beta.std()) == pytest.approx(glm.bse[1], rel=0.15)
    assert float(intercept.std()) == pytest.approx(glm.bse[0], rel=0.15)


@pytest.mark.slow
def test_bym2_shrinks_toward_one_most_where_expected_counts_are_small():
    # Common practice (Clayton & Kaldor 1987; Riebler et al. 2016): smoothed relative risks
    # vary less than SMRs, and small-E areas move furthest.
    study = nc_study()
    recipe = load_recipe("bym2")
    idata = sample_posterior(build_model(study, nc_graph(study), recipe), SHORT, recipe,
                             progress=False, max_draws=SHORT.draws)
    # The trace keeps what outputs read, not the random effect's per-area internals.
    assert {"relative_risk", "sigma", "phi"} <= set(idata.posterior.data_vars)
    assert not {"u", "v", "u_free"} & set(idata.posterior.data_vars)
    smr = study.observed / study.expected
    risk = idata.posterior["relative_risk"].median(("chain", "draw")).values
    assert risk.std() < 0.6 * smr.std()
    move = np.abs(smr - risk)
    small, large = study.expected <= np.quantile(study.expected, 0.25), \
        study.expected >= np.quantile(study.expected, 0.75)
    assert move[small].mean() > 2 * move[large].mean()
    assert assess_convergence(idata).divergences == 0


@pytest.mark.slow
@pytest.mark.parametrize("name", ["bym2", "bym"])
def test_island_and_two_components_sample_with_exact_zero_sums(name):
    # Sum-to-zero on each connected component (METHODS.md section 3, Freni-Sterrantino et al.
    # 2018); the constraint is hard by construction, so it holds to rounding in every draw.
    study = nc_study(first=20)
    graph = split_graph(study)
    recipe = load_recipe(name)
    idata = sample_posterior(build_model(study, graph, recipe),
                             Sampling(chains=2, draws=300, warmup=300, seed=7, cores=2),
                             recipe, progress=False, max_draws=300, keep_latent=True)
    # bym2 samples the combined effect; its sum-to-zero part is ``effect_within``.
    u = idata.posterior["u" if name == "bym" else "effect_within"].values
    for members in graph.components:
        sums = u[..., members].sum(axis=-1)
        assert np.abs(sums).max() < 1e-9
    assert np.all(u[..., 3] == 0.0)  # the island has no ICAR effect
    assert np.isfinite(idata.posterior["relative_risk"].values).all()


@pytest.mark.slow
def test_poisson_term_equals_scipy_log_likelihood_less_the_factorial_constant():
    # Reference: scipy.stats.poisson.logpmf; the model drops only -sum log(O_i!), which
    # does not depend on the parameters.
    study = nc_study(first=20)
    model = build_model(study, nc_graph(study), load_recipe("exchangeable"))
    point = model.initial_point()
    point["intercept_standardised"] = 0.3
    point["v"] = np.linspace(-1.0, 1.0, study.n_areas)
    point["sigma_log__"] = math.log(0.5)
    term = model.replace_rvs_by_values([model["poisson_log_likelihood"]])[0]
    potential = model.compile_fn(term, inputs=model.value_vars, on_unused_input="ignore",
                                 point_fn=False)(**point)
    theta = np.exp(0.3 + 0.5 * point["v"])
    reference = stats.poisson.logpmf(study.observed, study.expected * theta).sum()
    constant = -np.sum([math.lgamma(count + 1) for count in study.observed])
    assert potential == pytest.approx(reference - constant, rel=1e-12)


def test_draw_counter_reads_post_warmup_draws_from_progress_text():
    from smootharea.sampling import DrawCounter

    counter = DrawCounter(chains=3, warmup=1000, total=4000, show=False)
    assert counter.post_warmup().tolist() == [0, 0, 0]
    counter("1200;1000;950;")
    assert counter.post_warmup().tolist() == [200, 0, 0]
    counter("garbled")  # a text that does not name every chain leaves the counts alone
    assert counter.post_warmup().tolist() == [200, 0, 0]


def small_conjugate_model():
    """Poisson-Gamma on the first 20 NC counties: quick to sample, for the sampler's own tests."""
    study = nc_study(first=20)
    recipe = load_recipe("poisson_gamma")
    return build_model(study, nc_graph(study), recipe), recipe


def test_chains_in_batches_of_the_core_count_are_reproducible_and_distinct():
    # 3 chains on 2 cores: a batch of 2 chains and a batch of 1 (sampling._start_batches),
    # run in turn; the joined trace has chains 0, 1, 2, the same seed gives the same draws,
    # and the second batch's chain is not a copy of the first batch's chain 0 (own seed).
    model, recipe = small_conjugate_model()
    sampling = Sampling(chains=3, draws=100, warmup=100, seed=1, cores=2)
    first = sample_posterior(model, sampling, recipe, progress=False)
    second = sample_posterior(model, sampling, recipe, progress=False)
    draws = first.posterior["relative_risk"]
    assert draws.coords["chain"].values.tolist() == [0, 1, 2]
    np.testing.assert_array_equal(draws.values, second.posterior["relative_risk"].values)
    assert not np.array_equal(draws.values[0], draws.values[2])
    assert first.sample_stats.sizes["chain"] == 3
    assert first.attrs["stop_reason"].startswith(("converged", "reached the cap"))


def test_same_seed_gives_identical_draws_even_when_the_run_is_extended():
    # 2 chains x 100 draws cannot reach bulk ESS 400, so the run is extended (the same
    # chains keep drawing, sampling.py); extension and stopping depend only on the draws.
    # With only 100 warm-up steps some seeds need more than the 800-draw cap (seed 99 did).
    model, recipe = small_conjugate_model()
    sampling = Sampling(chains=2, draws=100, warmup=100, seed=1, cores=2)
    first_run = sample_posterior(model, sampling, recipe, progress=False)
    first = first_run.posterior["relative_risk"]
    second = sample_posterior(model, sampling, recipe, progress=False).posterior["relative_risk"]
    np.testing.assert_array_equal(first.values, second.values)
    other = Sampling(chains=2, draws=100, warmup=100, seed=2, cores=2)
    third = sample_posterior(model, other, recipe, progress=False).posterior["relative_risk"]
    assert not np.array_equal(first.values[:, :100], third.values[:, :100])
    # Extended past the minimum, stopped at a checkpoint (100 + k * 50) that passed the verdict.
    kept = first.sizes["draw"]
    assert 200 <= kept <= 800 and (kept - 100) % 50 == 0
    assert first_run.attrs["stop_reason"].startswith("converged")
    verdict = assess_convergence(first_run)
    assert verdict.converged and verdict.min_ess_bulk >= 400, verdict.reasons


@pytest.mark.parametrize("cpus, moves", [(2, False), (3, True)], ids=["no_spare_core", "spare_core"])
def test_chains_wait_while_a_check_judges_their_draws_unless_a_core_is_spare(monkeypatch, cpus,
                                                                             moves):
    # sampling._advance: 2 chains on 2 cores leave no core for the check, so they pause while
    # it runs (their draw counts stand still); with a spare core they keep drawing. The fake
    # check fails at checkpoint 100 and passes at 150; the cap is too far to reach meanwhile.
    import time as clock

    import smootharea.sampling as sampling_module
    from smootharea.diagnostics import Verdict

    moved = []

    def draws_reported(batches) -> int:
        return sum(int(batch.progress.finished.sum()) for batch in batches)

    def slow_check(batches, judged, per_area, checkpoint):
        clock.sleep(0.6)  # progress is reported every 0.25 s: let the last report arrive
        before = draws_reported(batches)
        clock.sleep(1.5)
        moved.append(draws_reported(batches) > before)
        passed = checkpoint >= 150
        return Verdict(converged=passed, reasons=[] if passed else ["fake"], max_rhat=1.0,
                       min_ess_bulk=500.0, min_ess_tail=500.0, divergences=0, min_bfmi=1.0)

    monkeypatch.setattr(sampling_module.os, "cpu_count", lambda: cpus)
    monkeypatch.setattr(sampling_module, "_verdict_at", slow_check)
    model, recipe = small_conjugate_model()
    sampling = Sampling(chains=2, draws=100, warmup=100, seed=1, cores=2, max_draws=1_000_000)
    idata = sample_posterior(model, sampling, recipe, progress=False)
    assert idata.posterior.sizes["draw"] == 150 and len(moved) == 2
    assert moved[0] == moves, moved
    if not moves:
        assert moved == [False, False]


def test_trace_on_disk_gives_the_same_draws_as_in_memory(monkeypatch, tmp_path):
    # Large traces go to a zarr store on disk (sampling.DISK_TRACE_BYTES); forcing that path
    # on a small model must change nothing but where the draws were kept.
    import smootharea.sampling as sampling_module

    model, recipe = small_conjugate_model()
    sampling = Sampling(chains=2, draws=100, warmup=100, seed=1, cores=2)
    in_memory = sample_posterior(model, sampling, recipe, progress=False)
    monkeypatch.setattr(sampling_module, "DISK_TRACE_BYTES", 0)
    monkeypatch.setattr(sampling_module.tempfile, "tempdir", str(tmp_path))
    on_disk = sample_posterior(model, sampling, recipe, progress=False)
    assert on_disk.attrs["stop_reason"] == in_memory.attrs["stop_reason"]
    np.testing.assert_array_equal(on_disk.posterior["relative_risk"].values,
                                  in_memory.posterior["relative_risk"].values)
    np.testing.assert_array_equal(on_disk.sample_stats["diverging"].values,
                                  in_memory.sample_stats["diverging"].values)
    assert "gradient" not in on_disk.sample_stats
    assert list(tmp_path.iterdir()) == []  # the disk trace is removed afterwards
    # posterior.nc must be writable: the disk trace's settings arrive as a dict attribute
    stored = tmp_path / "posterior.nc"
    on_disk.to_netcdf(str(stored), engine="h5netcdf")
    assert az.from_netcdf(stored, engine="h5netcdf").attrs["stop_reason"] == \
        in_memory.attrs["stop_reason"]


def test_trace_folders_of_ended_processes_are_removed(tmp_path):
    import subprocess
    import sys

    from smootharea.sampling import remove_orphaned_traces

    ended = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                           capture_output=True, text=True, check=True)
    orphan = tmp_path / f"smootharea-trace-{ended.stdout.strip()}-abc"
    mine = tmp_path / f"smootharea-trace-{os.getpid()}-def"
    other = tmp_path / "smootharea-trace-notapid-ghi"
    for folder in (orphan, mine, other):
        folder.mkdir()
    assert remove_orphaned_traces(tmp_path) == [orphan]
    assert not orphan.exists() and mine.exists() and other.exists()


@pytest.mark.slow
def test_fixed_draw_count_when_the_cap_equals_the_minimum():
    study = nc_study(first=20)
    recipe = load_recipe("poisson_gamma")
    sampling = Sampling(chains=2, draws=100, warmup=100, seed=99, cores=2)
    idata = sample_posterior(build_model(study, nc_graph(study), recipe), sampling, recipe,
                             progress=False, max_draws=100)
    assert idata.posterior.sizes["draw"] == 100
    assert idata.attrs["stop_reason"] == "fixed draw count"
    assert idata.attrs["draws_cap"] == 100


# ---------------------------------------------------------------- diagnostics

def _fake_posterior(shift: float = 0.0, diverging: int = 0) -> az.InferenceData:
    """Independent normal draws (ideal chains); `shift` moves chain 1 to break R-hat."""
    rng = np.random.default_rng(3)
    risk = rng.lognormal(size=(4, 1000, 3))
    risk[1] *= math.exp(shift)
    sigma = rng.gamma(5.0, 0.1, size=(4, 1000))
    flags = np.zeros((4, 1000), dtype=bool)
    flags[0, :diverging] = True
    return az.from_dict(posterior={"relative_risk": risk, "sigma": sigma},
                        sample_stats={"diverging": flags, "energy": rng.normal(size=(4, 1000))},
                        coords={"area": ["a", "b", "c"]}, dims={"relative_risk": ["area"]})


def test_convergence_statistics_equal_arviz():
    # Reference: ArviZ 0.23's own az.rhat (method "rank") and az.ess ("bulk", "tail", "mean"),
    # element by element, on autocorrelated draws with a constant element, a missing draw, tied
    # values, a random walk (Geyer's sequence runs to hundreds of lags), an odd number of draws
    # and a single chain; and per_element's blocks against one call.
    from smootharea.diagnostics import convergence_statistics, mean_ess, per_element

    rng = np.random.default_rng(5)
    for shape in ((4, 300, 40), (4, 301, 6), (1, 40, 6)):
        risk = np.cumsum(rng.normal(size=shape), axis=1) * 0.05 + rng.normal(size=shape)
        risk[:, :, 0] = 1.5
        risk[-1, 5, 2] = np.nan
        risk[:, :, 3] = np.round(risk[:, :, 3])
        risk[:, :, 4] = np.cumsum(rng.normal(size=shape[:2]), axis=1)
        posterior = az.from_dict(posterior={"relative_risk": risk},
                                 dims={"relative_risk": ["area"]}).posterior
        with np.errstate(divide="ignore", invalid="ignore"):
            ours = convergence_statistics(risk) + (mean_ess(risk),)
            blocks = per_element(posterior, ["relative_risk"], block=16)
        for index, (statistic, method) in enumerate(((az.rhat, "rank"), (az.ess, "bulk"),
                                                     (az.ess, "tail"), (az.ess, "mean"))):
            reference = statistic(posterior, var_names=["relative_risk"], method=method)
            np.testing.assert_allclose(ours[index], reference["relative_risk"].values, rtol=1e-10)
            if index < 3:
                np.testing.assert_allclose(blocks[index]["relative_risk"].values, ours[index],
                                           rtol=1e-12)


def test_bfmi_equals_arviz():
    # Reference: ArviZ 0.23's az.bfmi on energies of a well-mixed and a sticky chain (E-BFMI,
    # Betancourt 2016); the verdict's threshold of 0.3 must separate them.
    from smootharea.diagnostics import _bfmi

    rng = np.random.default_rng(8)
    energy = np.stack([rng.normal(size=500), np.cumsum(rng.normal(size=500)) * 0.1,
                       rng.normal(size=500)])
    idata = az.from_dict(sample_stats={"energy": energy})
    ours = _bfmi(idata)
    np.testing.assert_allclose(ours, az.bfmi(idata), rtol=1e-12)
    assert ours[0] > 0.3 > ours[1]


def test_verdict_passes_ideal_chains():
    # Vehtari et al. 2021 thresholds; independent draws must pass all of them.
    verdict = assess_convergence(_fake_posterior())
    assert verdict.converged, verdict.reasons
    assert verdict.max_rhat < 1.01 and verdict.min_ess_bulk > 400 and verdict.min_bfmi > 0.3


def test_verdict_names_the_variable_and_threshold_missed():
    verdict = assess_convergence(_fake_posterior(shift=1.0, diverging=3))
    assert not verdict.converged
    text = " | ".join(verdict.reasons)
    assert "R-hat above 1.01" in text and "relative_risk[a]" in text
    assert "3 divergent" in text and verdict.divergences == 3
    assert verdict.to_dict()["divergences"] == 3


def test_the_stopping_check_verdict_is_the_verdict_on_the_kept_draws(monkeypatch):
    # The check that stops sampling judged exactly the kept draws, scalars first and then
    # blocks of areas; its combined verdict is reused as the run's verdict, so it must equal
    # the verdict computed afresh on the kept draws (diagnostics.assess_convergence, whose
    # R-hat and ESS are held equal to ArviZ 0.23 in test_convergence_statistics_equal_arviz).
    import smootharea.sampling as sampling_module
    from smootharea.sampling import VERDICT_ATTR, run_verdict

    monkeypatch.setattr(sampling_module, "AREA_BLOCK", 7)  # 20 areas: blocks of 7, 7 and 6
    model, recipe = small_conjugate_model()
    sampling = Sampling(chains=2, draws=100, warmup=100, seed=1, cores=2)
    idata = sample_posterior(model, sampling, recipe, progress=False)
    assert VERDICT_ATTR in idata.attrs
    stored, fresh = run_verdict(idata), assess_convergence(idata)
    assert stored.converged and fresh.converged and stored.reasons == fresh.reasons == []
    for field in ("max_rhat", "min_ess_bulk", "min_ess_tail", "min_bfmi"):
        assert getattr(stored, field) == pytest.approx(getattr(fresh, field), rel=1e-12), field
    assert stored.divergences == fresh.divergences
    del idata.attrs[VERDICT_ATTR]  # without the record, the verdict is computed afresh
    assert run_verdict(idata).min_ess_bulk == pytest.approx(fresh.min_ess_bulk, rel=1e-12)
