"""The approximate preview (smootharea.quick, ``smootharea run --quick``).

Data: North Carolina SIDS 1974-78 (Cressie 1993, via libpysal's bundled sids2.shp and
example_regions/north_carolina). References: scipy.integrate.quad for a model whose
posterior is one-dimensional per area, dense numpy linear algebra, the analytic
spectrum of a cycle graph, the conjugate Gamma posterior (scipy.stats.gamma) and a
short NUTS run of the same model.
"""
from __future__ import annotations

import json
import math
import os
from dataclasses import replace
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
import scipy.sparse as sp
from scipy import integrate, stats
from scipy.special import logit

from smootharea.graph import graph_from_edges, icar_precision
from smootharea.job import Sampling, load_job
from smootharea.quick import QUICK_LABEL, SparseFactor, fit_quick, mixing_distance_table
from smootharea.recipes import load_recipe

NC_JOB = Path(__file__).resolve().parents[1] / "example_regions" / "north_carolina" / "job.toml"


def stacked(idata, name: str) -> np.ndarray:
    return idata.posterior[name].stack(sample=("chain", "draw")).transpose("sample", ...).values


@pytest.fixture(scope="module")
def nc_counts():
    """SIDS deaths 1974-78 and expected deaths (births x statewide rate) per county."""
    import geopandas as gpd
    import libpysal
    counties = gpd.read_file(libpysal.examples.get_path("sids2.shp"))
    observed = counties["SID74"].round().astype(int).to_numpy()
    births = counties["BIR74"].to_numpy(dtype=float)
    return observed, births * observed.sum() / births.sum()


def bare_prepared(observed, expected, edges=np.empty((0, 2))):
    """Just what fit_quick reads: the study's counts and the neighbour graph."""
    ids = tuple(str(i) for i in range(len(observed)))
    study = SimpleNamespace(area_ids=ids, n_areas=len(ids), observed=np.asarray(observed),
                            expected=np.asarray(expected, dtype=float),
                            covariates=pd.DataFrame(index=range(len(ids))), covariate_names=())
    return SimpleNamespace(study=study, graph=graph_from_edges(ids, edges))


def test_laplace_matches_quadrature_for_poisson_lognormal_with_fixed_sigma(nc_counts):
    # With sigma fixed and the intercept pinned at 0, theta_i = exp(sigma v_i), v_i ~ N(0, 1)
    # independently, so each area's posterior is one-dimensional: integrate it with quad.
    observed, expected = nc_counts
    sigma = 0.4
    recipe = (load_recipe("exchangeable").with_prior("sigma", "fixed", value=sigma)
              .with_prior("intercept", "normal", mean=0.0, sd=1e-6))
    idata = fit_quick(bare_prepared(observed, expected), recipe, Sampling(chains=4, draws=1000, seed=3))
    draws = stacked(idata, "relative_risk")

    def posterior_mean_and_exceedance(count, e):
        density = lambda v: stats.poisson.pmf(count, e * math.exp(sigma * v)) * stats.norm.pdf(v)
        total = integrate.quad(density, -10, 10)[0]
        mean = integrate.quad(lambda v: math.exp(sigma * v) * density(v), -10, 10)[0] / total
        return mean, integrate.quad(density, 0, 10)[0] / total

    reference = np.array([posterior_mean_and_exceedance(o, e) for o, e in zip(observed, expected)])
    # Tolerances include the Monte Carlo error of 4000 draws (about 1% and 0.016 at most).
    assert np.max(np.abs(draws.mean(axis=0) / reference[:, 0] - 1)) < 0.03
    assert np.max(np.abs((draws > 1).mean(axis=0) - reference[:, 1])) < 0.05


def test_conjugate_recipe_is_drawn_exactly(nc_counts):
    # Poisson-Gamma with fixed hyperparameters: posterior Gamma(a + O, b + E) (METHODS.md 3).
    observed, expected = nc_counts
    recipe = load_recipe("poisson_gamma")
    idata = fit_quick(bare_prepared(observed, expected), recipe, Sampling(chains=4, draws=1000, seed=5))
    draws = stacked(idata, "relative_risk")
    prior = recipe.priors["relative_risk"].params
    exact = stats.gamma(prior["shape"] + observed, scale=1 / (prior["rate"] + expected))
    assert np.max(np.abs(draws.mean(axis=0) / exact.mean() - 1)) < 0.05
    assert np.max(np.abs((draws > 1).mean(axis=0) - exact.sf(1.0))) < 0.04


def test_sparse_factor_draws_have_the_inverse_as_covariance(nc_counts):
    # H = Q + diag(w) on the North Carolina queen graph; compare with dense numpy.
    prepared = bare_prepared(*nc_counts, edges=_nc_edges())
    n = prepared.study.n_areas
    hessian = (icar_precision(n, prepared.graph.edges)
               + sp.diags(np.linspace(0.5, 3.0, n))).tocsc()
    factor = SparseFactor(hessian, SparseFactor.ordering(hessian))
    root = factor.gaussian_draws(np.eye(n))  # x = root z, so cov(x) = root root'
    dense = hessian.toarray()
    np.testing.assert_allclose(root @ root.T, np.linalg.inv(dense), atol=1e-10)
    np.testing.assert_allclose(factor.log_determinant(), np.linalg.slogdet(dense)[1], rtol=1e-12)
    rhs = np.arange(n, dtype=float)
    np.testing.assert_allclose(factor.solve(rhs), np.linalg.solve(dense, rhs), atol=1e-10)


def _nc_edges() -> np.ndarray:
    from smootharea.graph import contiguity_edges
    import geopandas as gpd
    import libpysal
    return contiguity_edges(gpd.read_file(libpysal.examples.get_path("sids2.shp")), "queen")


def test_mixing_distance_matches_the_cycle_spectrum():
    # Cycle of n nodes: Laplacian eigenvalues 2 - 2 cos(2 pi k / n) (common practice) and
    # scaling factor (n^2 - 1) / (12 n) (METHODS.md 3); d(phi) = sqrt(2 KLD) with
    # KLD = 0.5 sum_k [phi (g_k - 1) - log(1 + phi (g_k - 1))], g_k = 1 / (s lambda_k),
    # plus the constant direction (g = 0).
    n = 40
    graph = graph_from_edges([str(i) for i in range(n)], [(i, (i + 1) % n) for i in range(n)])
    scale = (n**2 - 1) / (12 * n)
    gamma = np.r_[0.0, 1.0 / (scale * (2 - 2 * np.cos(2 * np.pi * np.arange(1, n) / n)))]
    phis = np.array([1e-3, 0.1, 0.5, 0.9, 0.999])
    kld = [0.5 * np.sum(p * (gamma - 1) - np.log1p(p * (gamma - 1))) for p in phis]
    np.testing.assert_allclose(mixing_distance_table(graph, logit(phis)), np.sqrt(2 * np.array(kld)),
                               rtol=1e-6)


@pytest.mark.slow
def test_bym2_quick_agrees_with_nuts_on_north_carolina():
    from smootharea.model import build_model
    from smootharea.pipeline import prepare
    from smootharea.sampling import sample_posterior
    job = load_job(NC_JOB)
    prepared = prepare(job)
    recipe = load_recipe("bym2")
    quick = fit_quick(prepared, recipe, job.sampling)
    sampling = replace(job.sampling, chains=2, draws=1000, warmup=500)
    nuts = sample_posterior(build_model(prepared.study, prepared.graph, recipe), sampling, recipe,
                            progress=False)
    quick_rr, nuts_rr = stacked(quick, "relative_risk"), stacked(nuts, "relative_risk")
    # Short-run tolerances: 2000 NUTS draws carry about 1-2% Monte Carlo error in a mean
    # relative risk and up to about 0.05 in an exceedance probability.
    assert np.max(np.abs(quick_rr.mean(axis=0) / nuts_rr.mean(axis=0) - 1)) < 0.05
    assert np.max(np.abs((quick_rr > 1).mean(axis=0) - (nuts_rr > 1).mean(axis=0))) < 0.1
    assert stacked(quick, "sigma").mean() == pytest.approx(stacked(nuts, "sigma").mean(), rel=0.1)
    assert stacked(quick, "intercept").mean() == pytest.approx(stacked(nuts, "intercept").mean(),
                                                               abs=0.03)


def test_large_map_path_keeps_only_modes_and_gives_the_same_posterior(monkeypatch):
    # Above quick.CACHE_LIMIT the grid keeps each point's mode, not its sparse factor (memory
    # at 30,000 areas), and the draws refit each point from that mode. Reference: the same
    # approximation with every fit kept (the small-map path), on North Carolina.
    import smootharea.quick as quick
    from smootharea.pipeline import prepare
    job = load_job(NC_JOB)
    prepared = prepare(job)
    recipe = load_recipe("bym2")
    sampling = replace(job.sampling, chains=2, draws=500)
    kept = fit_quick(prepared, recipe, sampling)
    explored = []
    original = quick.explore_grid
    monkeypatch.setattr(quick, "CACHE_LIMIT", 0)
    monkeypatch.setattr(quick, "explore_grid",
                        lambda laplace: explored.append(original(laplace)) or explored[-1])
    factors, most_alive = [], [0]
    fit_method = quick.LaplaceApproximation.fit

    def counting_fit(self, *args, **kwargs):
        import weakref
        fit = fit_method(self, *args, **kwargs)
        factors.append(weakref.ref(fit.factor))  # freed by reference counting once dropped
        most_alive[0] = max(most_alive[0], sum(ref() is not None for ref in factors))
        return fit

    monkeypatch.setattr(quick.LaplaceApproximation, "fit", counting_fit)
    refitted = fit_quick(prepared, recipe, sampling)
    assert all(isinstance(fit, np.ndarray) for fit in explored[0].fits)  # modes only
    # only the fit being extended and the new one are alive, never every grid point's factor
    assert most_alive[0] <= 3 < kept.attrs["grid_points"]
    assert kept.attrs["grid_points"] == refitted.attrs["grid_points"]
    np.testing.assert_allclose(stacked(refitted, "relative_risk").mean(axis=0),
                               stacked(kept, "relative_risk").mean(axis=0), rtol=1e-6)


def test_quick_run_is_labelled_everywhere_and_leaves_latest(tmp_path, capsys):
    from smootharea.cli import main
    out = tmp_path / "out"
    previous = out / "runs" / "previous-converged-run"
    previous.mkdir(parents=True)
    os.symlink(os.path.relpath(previous, out), out / "latest")

    code = main(["run", str(NC_JOB), "--quick", "--quiet", "--out", str(out)])
    printed = capsys.readouterr()

    assert code == 0
    assert "APPROXIMATE" in printed.out
    assert "SUMMARY" in printed.err and "(approximate)" in printed.err
    assert os.readlink(out / "latest") == os.path.relpath(previous, out)
    run_dir = next(p for p in (out / "runs").iterdir() if p.name != previous.name)
    model = json.loads((run_dir / "model.json").read_text())
    assert model["approximate"] == QUICK_LABEL
    assert model["diagnostics"]["method"] == "approximate"
    assert model["diagnostics"]["converged"] is None
    assert set(model["hyperparameters"]) >= {"sigma", "phi", "intercept"}
    assert model["loo"]["elpd"] < 0
    record = json.loads((run_dir / "run.json").read_text())
    assert record["status"] == "approximate" and record["exit_code"] == 0
    assert record["converged"] is None
    ranking = pd.read_csv(run_dir / "ranking.csv")
    assert (ranking["estimate"] == "APPROXIMATE").all()
    areas = pd.read_csv(run_dir / "areas.csv")
    assert len(areas) == 100 and areas["rr_mean"].between(0.2, 5).all()
    report = (run_dir / "report.html").read_text(encoding="utf-8")
    assert 'id="approximate"' in report and "APPROXIMATE:" in report
    # An approximation has no sampler verdict: it must not be reported as a failed sampler run.
    assert 'id="not-converged"' not in report and "sampled by MCMC" not in report
