"""Draw from the posterior with nutpie (PyMC's sampler only if nutpie is missing).

Adds the pointwise log-likelihood group ``observed`` (dims area) that
``arviz.loo``/``arviz.waic`` need, computed exactly in numpy from the draws of
``relative_risk``: log Poisson(O_i | E_i theta_i) (scipy.stats.poisson).
The same seed gives the same draws.
"""
from __future__ import annotations

import os
import sys

import arviz as az
import numpy as np
import pymc as pm
import xarray as xr
from scipy.stats import poisson

from .job import Sampling
from .recipes import Recipe


def sample_posterior(model: pm.Model, sampling: Sampling, recipe: Recipe,
                     progress: bool | None = None) -> az.InferenceData:
    """Sample ``model`` with nutpie: ``sampling.chains`` x ``sampling.draws`` after
    ``sampling.warmup`` tuning steps, target acceptance from the recipe.

    ``progress`` None shows a progress bar only when stderr is a terminal.
    """
    show_progress = sys.stderr.isatty() if progress is None else bool(progress)
    cores = sampling.cores or os.cpu_count() or 1
    try:
        import nutpie
    except ImportError:  # pragma: no cover - nutpie is a declared dependency
        idata = _sample_with_pymc(model, sampling, recipe, cores, show_progress)
        sampler = f"pymc {pm.__version__} NUTS"
    else:
        compiled = nutpie.compile_pymc_model(model)
        idata = nutpie.sample(
            compiled, draws=sampling.draws, tune=sampling.warmup, chains=sampling.chains,
            cores=cores, seed=sampling.seed, target_accept=recipe.sampler.target_accept,
            low_rank_modified_mass_matrix=recipe.sampler.low_rank_mass_matrix,
            save_warmup=False, progress_bar=show_progress)
        sampler = f"nutpie {nutpie.__version__}"
    add_log_likelihood(idata, model)
    idata.attrs.update({"sampler": sampler, "recipe": recipe.name, "seed": int(sampling.seed),
                        "chains": int(sampling.chains), "draws": int(sampling.draws),
                        "warmup": int(sampling.warmup)})
    return idata


def _sample_with_pymc(model: pm.Model, sampling: Sampling, recipe: Recipe, cores: int,
                      show_progress: bool) -> az.InferenceData:
    with model:
        return pm.sample(draws=sampling.draws, tune=sampling.warmup, chains=sampling.chains,
                         cores=min(cores, sampling.chains), random_seed=sampling.seed,
                         target_accept=recipe.sampler.target_accept, progressbar=show_progress,
                         compute_convergence_checks=False)


def add_log_likelihood(idata: az.InferenceData, model: pm.Model) -> None:
    """Add ``log_likelihood.observed`` and ``observed_data.observed`` (dims area) in place.

    log p(O_i | theta_i) = log Poisson(O_i; E_i theta_i), evaluated per draw.
    """
    counts = np.asarray(model["observed_count"].get_value())
    expected = np.exp(np.asarray(model["log_expected"].get_value()))
    theta = idata.posterior["relative_risk"]
    values = poisson.logpmf(counts, expected * theta.values)
    log_likelihood = xr.Dataset({"observed": (("chain", "draw", "area"), values)},
                                coords={"chain": theta["chain"], "draw": theta["draw"],
                                        "area": theta["area"]})
    groups = {"log_likelihood": log_likelihood,
              "observed_data": xr.Dataset({"observed": (("area",), counts)},
                                          coords={"area": theta["area"]})}
    for name in [name for name in groups if name in idata.groups()]:
        setattr(idata, name, groups.pop(name))  # replace what the sampler may have written
    if groups:
        idata.add_groups(groups)
