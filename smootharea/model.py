"""The PyMC model: one builder for every recipe.

    O_i ~ Poisson(E_i * theta_i),   log(theta_i) = alpha + x_i' beta + b_i

with log(E_i) an offset (METHODS.md section 1) and b_i the recipe's random effect
(section 3). All random effects are non-centred. Covariates enter centred and scaled
by their SD; the posterior reports ``intercept`` and ``beta`` on the original scale.

Hand-written here because no library does them the way we need:
- the ICAR density as a sum over the edge list (pm.ICAR builds a dense n x n matrix);
- a hard per-component sum-to-zero constraint (PyMC's zero-sum transform is per axis,
  not per graph component);
- the PC prior for the BYM2 mixing parameter phi (no PyMC distribution exists).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pymc as pm
import pytensor.tensor as pt
import scipy.sparse as sp
from scipy.optimize import brentq

from .graph import NeighbourGraph
from .recipes import Prior, Recipe
from .study import StudyData

# Components up to this many areas get the exact eigen-decomposition for the PC prior
# on phi; larger ones a stochastic Lanczos quadrature estimate of the spectrum.
DENSE_SPECTRUM_MAX = 2000
_LANCZOS_PROBES = 48
_LANCZOS_STEPS = 60


@dataclass(frozen=True)
class CovariateScaling:
    """Means and SDs used to standardise covariates (kept to report beta per original unit)."""

    names: tuple[str, ...]
    means: np.ndarray
    sds: np.ndarray


# --------------------------------------------------------------------------- builder

def build_model(study: StudyData, graph: NeighbourGraph, recipe: Recipe) -> pm.Model:
    """Build the PyMC model for one study, graph and recipe.

    The returned model carries ``model.covariate_scaling`` (:class:`CovariateScaling`) and
    ``model.recipe_name``; observed counts and log(E) are ``pm.Data`` named
    ``observed_count`` and ``log_expected`` so they can be swapped without rebuilding.
    """
    coords = {"area": list(study.area_ids)}
    if study.covariate_names:
        coords["covariate"] = list(study.covariate_names)
    with pm.Model(coords=coords) as model:
        observed = pm.Data("observed_count", np.asarray(study.observed, dtype=np.int64), dims="area")
        log_expected = pm.Data("log_expected", np.log(np.asarray(study.expected, dtype=float)),
                               dims="area")
        if recipe.structure == "poisson_gamma":
            scaling = _poisson_gamma(study, recipe, observed, log_expected)
        else:
            scaling = _regression(study, graph, recipe, observed, log_expected)
    model.covariate_scaling = scaling
    model.recipe_name = recipe.name
    return model


def _poisson_gamma(study: StudyData, recipe: Recipe, observed, log_expected) -> CovariateScaling:
    """theta_i ~ Gamma(a, rate b) with a, b fixed: posterior Gamma(a + O_i, b + E_i)."""
    if study.covariate_names:
        raise ValueError(f"recipe {recipe.name!r} (poisson_gamma) takes no covariates; "
                         f"remove {', '.join(study.covariate_names)} from [model] covariates")
    prior = recipe.priors["relative_risk"].params
    theta = pm.Gamma("relative_risk", alpha=prior["shape"], beta=prior["rate"], dims="area")
    pm.Poisson("observed", mu=pt.exp(log_expected) * theta, observed=observed, dims="area")
    return CovariateScaling((), np.empty(0), np.empty(0))


def _regression(study: StudyData, graph: NeighbourGraph, recipe: Recipe,
                observed, log_expected) -> CovariateScaling:
    scaling = standardise_covariates(study)
    intercept_prior = recipe.priors["intercept"].params
    alpha = pm.Normal("intercept_standardised", mu=intercept_prior["mean"],
                      sigma=intercept_prior["sd"])
    linear = alpha
    if scaling.names:
        x = (study.covariates.to_numpy(dtype=float) - scaling.means) / scaling.sds
        coefficient_prior = recipe.priors["coefficients"].params
        beta_z = pm.Normal("beta_standardised", mu=coefficient_prior["mean"],
                           sigma=coefficient_prior["sd"], dims="covariate")
        linear = linear + pt.dot(pt.as_tensor(x), beta_z)
        # Per original unit: beta = beta_z / sd, alpha = alpha_z - sum(beta_z * mean / sd).
        pm.Deterministic("beta", beta_z / scaling.sds, dims="covariate")
        pm.Deterministic("intercept", alpha - pt.sum(beta_z * scaling.means / scaling.sds))
    else:
        pm.Deterministic("intercept", alpha)

    effect = random_effect(graph, recipe)
    log_theta = linear + effect
    pm.Deterministic("relative_risk", pt.exp(log_theta), dims="area")
    pm.Poisson("observed", mu=pt.exp(log_theta + log_expected), observed=observed, dims="area")
    return scaling


def standardise_covariates(study: StudyData) -> CovariateScaling:
    """Means and SDs (ddof=0) of each covariate; a constant covariate is an error."""
    names = study.covariate_names
    if not names:
        return CovariateScaling((), np.empty(0), np.empty(0))
    values = study.covariates.to_numpy(dtype=float)
    means, sds = values.mean(axis=0), values.std(axis=0)
    constant = [name for name, sd in zip(names, sds) if not sd > 0]
    if constant:
        raise ValueError(f"covariate(s) {', '.join(constant)} take the same value in every area "
                         "and cannot be estimated; remove them from [model] covariates")
    return CovariateScaling(tuple(names), means, sds)


# ----------------------------------------------------------------- random effects

def random_effect(graph: NeighbourGraph, recipe: Recipe) -> pt.TensorVariable:
    """b_i for the recipe's structure (METHODS.md section 3), non-centred."""
    n = graph.n_areas
    structure = recipe.structure
    if structure == "exchangeable":
        sigma = _sd_parameter("sigma", recipe.priors["sigma"])
        return sigma * pm.Normal("v", 0.0, 1.0, dims="area")

    layout = IcarLayout.from_graph(graph)
    if layout.n_free == 0:
        raise ValueError(f"recipe {recipe.name!r} needs a neighbour graph with at least one link; "
                         "every area is an island, so use the exchangeable recipe")
    u = icar_effect(layout)
    island = pt.as_tensor(layout.island_mask.astype(float))

    if structure == "icar":
        # Scaled ICAR (sigma = typical marginal SD); islands take an exchangeable effect.
        sigma = _sd_parameter("sigma", recipe.priors["sigma"])
        v_island = _island_effect(layout, n)
        return sigma * (u * layout.inverse_sqrt_scaling + v_island)
    if structure == "bym":
        sigma_spatial = _sd_parameter("sigma_spatial", recipe.priors["sigma_spatial"])
        sigma_unstructured = _sd_parameter("sigma_unstructured", recipe.priors["sigma_unstructured"])
        v = pm.Normal("v", 0.0, 1.0, dims="area")
        return sigma_spatial * u + sigma_unstructured * v
    if structure == "bym2":
        # Riebler et al. 2016; islands: sigma * v only (Freni-Sterrantino et al. 2018).
        sigma = _sd_parameter("sigma", recipe.priors["sigma"])
        phi = _mixing_parameter(recipe.priors["phi"], graph)
        v = pm.Normal("v", 0.0, 1.0, dims="area")
        unstructured_weight = island + (1.0 - island) * pt.sqrt(1.0 - phi)
        return sigma * (unstructured_weight * v + pt.sqrt(phi) * layout.inverse_sqrt_scaling * u)
    raise ValueError(f"unknown structure {structure!r}")  # recipes.py validates; defensive


def _sd_parameter(name: str, prior: Prior) -> pt.TensorVariable:
    """PC prior on an SD (Simpson et al. 2017): P(sigma > U) = a -> Exponential(-ln(a)/U)."""
    if prior.kind == "fixed":
        return pm.Deterministic(name, pt.as_tensor(prior.params["value"]))
    return pm.Exponential(name, lam=prior.exponential_rate)


def _mixing_parameter(prior: Prior, graph: NeighbourGraph) -> pt.TensorVariable:
    if prior.kind == "fixed":
        return pm.Deterministic("phi", pt.as_tensor(prior.params["value"]))
    spectrum = mixing_spectrum(graph)
    rate = pc_mixing_rate(spectrum, prior.params["threshold"], prior.params["probability_below"])
    # Uniform(0,1) only supplies the logit transform; its log density is constant and the
    # Potential adds the PC density. (Prior predictive sampling ignores Potentials.)
    phi = pm.Uniform("phi", 0.0, 1.0)
    pm.Potential("phi_pc_prior", pc_mixing_log_density(phi, spectrum, rate))
    return phi


def _island_effect(layout: "IcarLayout", n: int) -> pt.TensorVariable:
    if not layout.islands.size:
        return pt.zeros(n)
    v_island = pm.Normal("v_island", 0.0, 1.0, shape=layout.islands.size)
    return pt.set_subtensor(pt.zeros(n)[layout.islands], v_island)


# ------------------------------------------------------------------------- ICAR

@dataclass(frozen=True)
class IcarLayout:
    """Where the free ICAR parameters go.

    Each connected component c with n_c >= 2 areas has n_c - 1 free parameters; the
    component's effect is their image under an isometric map onto {sum u = 0} (the
    Householder-type map of PyMC's ZeroSumTransform), so the constraint holds exactly
    in every draw and no stiff soft-constraint direction slows the sampler. Islands
    have u = 0 and appear in no ICAR term.
    """

    n_areas: int
    edges: np.ndarray
    free_component: np.ndarray      # (n_free,) compact component label of each free parameter
    component_sizes: np.ndarray     # (k,) sizes of components with >= 2 areas
    order: np.ndarray               # (n,) gather index from [free | last-of-component | islands]
    islands: np.ndarray
    island_mask: np.ndarray
    inverse_sqrt_scaling: np.ndarray  # (n,) 1/sqrt(s_c); 0 on islands

    @property
    def n_free(self) -> int:
        return int(self.free_component.size)

    @classmethod
    def from_graph(cls, graph: NeighbourGraph) -> "IcarLayout":
        n = graph.n_areas
        sizes_all = np.bincount(graph.component, minlength=graph.n_components)
        connected = np.flatnonzero(sizes_all >= 2)
        compact = np.full(sizes_all.size, -1)
        compact[connected] = np.arange(connected.size)
        island_mask = sizes_all[graph.component] < 2

        free_slots, free_component, last_slots = [], [], []
        for label in connected:
            members = np.flatnonzero(graph.component == label)
            free_slots.append(members[:-1])
            free_component.append(np.full(members.size - 1, compact[label]))
            last_slots.append(members[-1])
        islands = np.flatnonzero(island_mask)
        slots = np.concatenate([*free_slots, np.asarray(last_slots, dtype=np.int64), islands]
                               ).astype(np.int64)
        order = np.empty(n, dtype=np.int64)
        order[slots] = np.arange(n)

        scaling = np.asarray(graph.scaling_factors, dtype=float)[graph.component]
        inverse_sqrt = np.where(island_mask, 0.0, 1.0 / np.sqrt(np.where(island_mask, 1.0, scaling)))
        return cls(n_areas=n, edges=np.asarray(graph.edges, dtype=np.int64).reshape(-1, 2),
                   free_component=np.concatenate(free_component or [np.empty(0)]).astype(np.int64),
                   component_sizes=sizes_all[connected].astype(float), order=order,
                   islands=islands, island_mask=island_mask, inverse_sqrt_scaling=inverse_sqrt)


def zero_sum_by_component(free: pt.TensorVariable, layout: IcarLayout) -> pt.TensorVariable:
    """Map free parameters to u with sum(u) = 0 on every component and u = 0 on islands.

    Per component (z of length n_c - 1, s = sum z): u = [z, f] - q with
    q = s / (sqrt(n_c) + n_c) and f = q - s / sqrt(n_c); an isometry onto the
    sum-zero subspace (as in PyMC's ZeroSumTransform), so the ICAR density keeps its form.
    """
    sizes = pt.as_tensor(layout.component_sizes)
    sums = pt.zeros(layout.component_sizes.size)[layout.free_component].inc(free) \
        if layout.n_free else pt.zeros(layout.component_sizes.size)
    shift = sums / (pt.sqrt(sizes) + sizes)
    fill = shift - sums / pt.sqrt(sizes)
    stacked = pt.concatenate([free - shift[layout.free_component], fill - shift,
                              pt.zeros(layout.islands.size)])
    return stacked[layout.order]


def pairwise_difference_log_density(u: pt.TensorVariable, edges: np.ndarray) -> pt.TensorVariable:
    """ICAR log density up to a constant (Besag 1974): -0.5 * sum over links (u_i - u_j)^2.

    Equals -0.5 u'Qu with Q = D - W; costs one pass over the edge list.
    """
    difference = u[edges[:, 0]] - u[edges[:, 1]]
    return -0.5 * pt.sum(pt.square(difference))


def icar_effect(layout: IcarLayout) -> pt.TensorVariable:
    """Unit-precision ICAR effect u (dims area), sum-to-zero per component, u = 0 on islands."""
    free = pm.Flat("u_free", shape=layout.n_free)
    u = pm.Deterministic("u", zero_sum_by_component(free, layout), dims="area")
    pm.Potential("icar", pairwise_difference_log_density(u, layout.edges))
    return u


# ------------------------------------------------------- PC prior for BYM2 phi

@dataclass(frozen=True)
class MixingSpectrum:
    """Eigenvalues gamma_k (weighted) of the scaled generalised inverse R^- of the ICAR
    precision, over every component of the graph, with weights w_k (1 when exact).

    The BYM2 covariance of b/sigma is (1 - phi) I + phi R^-, with eigenvalues
    1 + phi (gamma_k - 1); islands contribute gamma = 1 and are left out.
    ``exact`` is False when a component used the Lanczos estimate.
    """

    gamma: np.ndarray
    weight: np.ndarray
    exact: bool


def mixing_spectrum(graph: NeighbourGraph) -> MixingSpectrum:
    """Spectrum needed by the PC prior on phi (Riebler et al. 2016, section 3).

    Per component c with n_c >= 2 areas and Laplacian eigenvalues 0 = l_0 < l_1 <= ...:
    gamma = 1 / (s_c l_k) for k >= 1 and gamma = 0 for the constant direction (the
    sum-to-zero constraint leaves no ICAR variance there). Exact (dense eigvalsh) up to
    DENSE_SPECTRUM_MAX areas; above that, stochastic Lanczos quadrature (Ubaru, Chen &
    Saad 2017, SIAM J. Matrix Anal. Appl. 38) gives Ritz values and weights whose
    weighted sums estimate the spectral sums with a few per cent Monte Carlo error.
    """
    gammas, weights, exact = [], [], True
    adjacency = graph.adjacency if graph.n_links else None
    for label, members in enumerate(graph.components):
        if members.size < 2:
            continue
        scale = float(graph.scaling_factors[label])
        sub = adjacency[members][:, members]
        laplacian = sp.diags(np.asarray(sub.sum(axis=1)).ravel()) - sub
        if members.size <= DENSE_SPECTRUM_MAX:
            eigenvalues = np.linalg.eigvalsh(laplacian.toarray())[1:]
            node_weights = np.ones(eigenvalues.size)
        else:
            eigenvalues, node_weights = _lanczos_quadrature(laplacian.tocsr(), seed=label)
            exact = False
        gammas += [1.0 / (scale * eigenvalues), [0.0]]
        weights += [node_weights, [1.0]]
    return MixingSpectrum(np.concatenate(gammas), np.concatenate(weights), exact)


def _lanczos_quadrature(laplacian: sp.csr_matrix, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Ritz values and weights so that sum_j w_j f(theta_j) ~ sum over non-zero eigenvalues
    of f(l) (probes are kept orthogonal to the constant null vector)."""
    n = laplacian.shape[0]
    rng = np.random.default_rng(seed)
    nodes, weights = [], []
    for _ in range(_LANCZOS_PROBES):
        probe = rng.choice([-1.0, 1.0], size=n)
        probe -= probe.mean()
        basis = [probe / np.linalg.norm(probe)]
        alphas, betas = [], []
        for step in range(min(_LANCZOS_STEPS, n - 1)):
            w = laplacian @ basis[-1]
            alphas.append(basis[-1] @ w)
            w -= w.mean()
            stacked = np.asarray(basis)
            w -= stacked.T @ (stacked @ w)   # full reorthogonalisation, twice
            w -= stacked.T @ (stacked @ w)
            norm = np.linalg.norm(w)
            if norm < 1e-10 or step == _LANCZOS_STEPS - 1:
                break
            betas.append(norm)
            basis.append(w / norm)
        tridiagonal = np.diag(alphas) + np.diag(betas[:len(alphas) - 1], 1) \
            + np.diag(betas[:len(alphas) - 1], -1)
        theta, vectors = np.linalg.eigh(tridiagonal)
        nodes.append(theta)
        weights.append(vectors[0] ** 2 * (n - 1) / _LANCZOS_PROBES)
    return np.concatenate(nodes), np.concatenate(weights)


def mixing_kld(phi, spectrum: MixingSpectrum):
    """KLD(phi) between BYM2 and its base model phi = 0 (Riebler et al. 2016, eq. for d(phi)):
    0.5 * sum_k w_k [phi (gamma_k - 1) - log(1 + phi (gamma_k - 1))]. Works on numpy or pytensor."""
    lib = pt if isinstance(phi, pt.TensorVariable) else np
    x = phi * (spectrum.gamma - 1.0)
    # x - log1p(x) loses all digits for |x| < 1e-4; use its series there.
    series = x**2 / 2 - x**3 / 3 + x**4 / 4
    exact_form = x - lib.log1p(x)
    small = lib.abs(x) < 1e-4
    terms = lib.switch(small, series, exact_form) if lib is pt else np.where(small, series, exact_form)
    return 0.5 * lib.sum(spectrum.weight * terms)


def mixing_distance(phi, spectrum: MixingSpectrum):
    """d(phi) = sqrt(2 KLD(phi))."""
    lib = pt if isinstance(phi, pt.TensorVariable) else np
    return lib.sqrt(2.0 * mixing_kld(phi, spectrum))


def pc_mixing_rate(spectrum: MixingSpectrum, threshold: float, probability_below: float) -> float:
    """lambda with P(phi < threshold) = probability_below when d(phi) ~ Exponential(lambda).

    d(1) is infinite (the constant direction has gamma = 0), so no truncation is needed.
    """
    return -np.log1p(-probability_below) / float(mixing_distance(np.float64(threshold), spectrum))


def pc_mixing_log_density(phi, spectrum: MixingSpectrum, rate: float):
    """log pi(phi) = log(lambda) - lambda d(phi) + log d'(phi), d' = KLD'(phi) / d(phi),
    KLD'(phi) = 0.5 phi sum_k w_k (gamma_k - 1)^2 / (1 + phi (gamma_k - 1))."""
    lib = pt if isinstance(phi, pt.TensorVariable) else np
    deviation = spectrum.gamma - 1.0
    slope_sum = lib.sum(spectrum.weight * deviation**2 / (1.0 + phi * deviation))
    distance = mixing_distance(phi, spectrum)
    # log d' = log(0.5 phi S) - log d; phi / d stays finite as phi -> 0.
    log_slope = np.log(0.5) + lib.log(phi) + lib.log(slope_sum) - lib.log(distance)
    return np.log(rate) - rate * distance + log_slope


def describe_mixing_spectrum(spectrum: MixingSpectrum) -> str:
    """One line for reports on how the PC prior's distance was computed."""
    if spectrum.exact:
        return "PC prior for phi: exact eigenvalues of every component's scaled ICAR precision"
    return ("PC prior for phi: spectrum of components above "
            f"{DENSE_SPECTRUM_MAX} areas estimated by stochastic Lanczos quadrature "
            f"({_LANCZOS_PROBES} probes x {_LANCZOS_STEPS} steps)")
