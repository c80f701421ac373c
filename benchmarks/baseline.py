"""The hand-written baseline: BYM2 as a PyMC user would write it from the PyMC documentation.

pm.ICAR on the dense adjacency matrix W (its default soft sum-to-zero constraint), an
unstructured N(0, 1) effect, the mixing weight rho ~ Beta(0.5, 0.5), sigma ~
HalfNormal(1), an N(0, 1) intercept and N(0, 1) coefficients of the job's covariates
(standardised), the BYM2 combination of Riebler et al. (2016, SMMR
25) with the scaling factor s, and pm.sample with its defaults (NUTS, 4 chains x 1000
draws after 1000 tuning steps). Its priors are the documentation's, not smootharea's, so
the two posteriors differ slightly; the benchmark compares speed (ESS per second).

Dense W needs n^2 doubles: 30,000 areas would need 7.2 GB, so the benchmark skips it there.
"""
from __future__ import annotations

import numpy as np

DENSE_LIMIT = 10_000  # areas; above this the dense W alone exceeds 800 MB


def baseline_skip_reason(graph) -> str | None:
    """Why the baseline cannot run on this graph, or None."""
    n = graph.n_areas
    if n > DENSE_LIMIT:
        return (f"baseline skipped: dense W of {n:,}^2 doubles = {n * n * 8 / 1e9:.1f} GB "
                "is infeasible")
    if graph.n_components != 1:
        return "baseline skipped: pm.ICAR as documented assumes one connected graph without islands"
    return None


def build_baseline_model(observed: np.ndarray, expected: np.ndarray, graph,
                         covariates: np.ndarray | None = None):
    """The documentation-style BYM2 model (one connected component)."""
    import pymc as pm
    import pytensor.tensor as pt

    n = graph.n_areas
    adjacency = graph.adjacency.toarray()  # dense, as pm.ICAR takes it
    scaling_factor = float(graph.scaling_factors[0])
    log_expected = np.log(expected)
    with pm.Model(coords={"area": list(graph.area_ids)}) as model:
        intercept = pm.Normal("intercept", 0.0, 1.0)
        linear = intercept
        if covariates is not None and covariates.size:
            x = (covariates - covariates.mean(axis=0)) / covariates.std(axis=0)
            beta = pm.Normal("beta", 0.0, 1.0, shape=x.shape[1])
            linear = intercept + pt.dot(x, beta)
        unstructured = pm.Normal("theta", 0.0, 1.0, dims="area")
        spatial = pm.ICAR("spatial", W=adjacency, dims="area")
        sigma = pm.HalfNormal("sigma", 1.0)
        rho = pm.Beta("phi", 0.5, 0.5)
        mixture = pt.sqrt(1 - rho) * unstructured + pt.sqrt(rho / scaling_factor) * spatial
        log_theta = linear + sigma * mixture
        pm.Deterministic("relative_risk", pt.exp(log_theta), dims="area")
        pm.Poisson("observed", mu=pt.exp(log_expected + log_theta), observed=observed, dims="area")
    assert n == len(observed)
    return model


def sample_baseline(model, seed: int):
    """pm.sample with its defaults (4 chains x 1000 draws, 1000 tuning steps)."""
    import pymc as pm
    with model:
        return pm.sample(random_seed=seed, progressbar=False, compute_convergence_checks=False)
