"""BYM2 sampled as one combined effect b, with its structured/unstructured split integrated out.

BYM2 (Riebler et al. 2016, SMMR 25, section 3) writes b = sigma (sqrt(1 - phi) v + sqrt(phi / s) u)
with v ~ N(0, I) and u a unit ICAR field (sum to zero per component). Integrating over u and v,
b is Gaussian with covariance

    Sigma = sigma^2 ((1 - phi) I + phi Q^+ / s),        Q = D - W (per component, scaled by s_c).

Split b into its component means and the sum-to-zero part b0 (the two are independent):
- each connected component's mean is sigma sqrt(1 - phi) z_c / sqrt(n_c) with z_c ~ N(0, 1)
  (only v has a mean), sampled non-centred; islands are sigma v_i (Freni-Sterrantino et al. 2018);
- b0 is sampled directly (centred). On the sum-to-zero space, with M = (1 - phi) Q + phi S
  (S = diag(1 / s_c) per area) and the eigenvalues lambda_k of Q, gamma_k = 1 / (s_c lambda_k):

      log p(b0) = -q / (2 sigma^2) - (n - k) log sigma - 0.5 sum_k log(1 + phi (gamma_k - 1)) + const,
      q = b0' Q M^-1 b0,

  since Sigma has eigenvalues sigma^2 (lambda_k (1 - phi) + phi / s_c) / lambda_k there. (Algebra of
  the covariance above; checked against a dense multivariate normal in tests/test_models.py.)

Why: in the usual non-centred form phi can only move when all n entries of u and v move with it,
and its chains mixed slowly (bulk ESS 25-47 per 2,000 draws on a 3,024-area grid). Here phi acts
on b0 directly: the same grid gave phi bulk ESS 485 per 2,000 draws.

q needs x = M^-1 b0 at every gradient. M is sparse, symmetric positive definite and well
conditioned unless phi is near 0, so a Jacobi-preconditioned conjugate-gradient solve (Hestenes &
Stiefel 1952, J. Res. NBS 49) is hand-written in numba (no library solves inside a numba-compiled
log density). The value is taken in the variational form q = 2 b0'Qx - x'QMx, whose error is
quadratic in the solver's residual; the solve starts from zero, so the log density and its
gradient are deterministic functions of the position and the sampler stays exact for them.

Gradients: dq/db0 = 2 Q x, dq/dphi = |Qx|^2 - (Qx)' S x.

log det term: exact eigenvalues for components up to ``DENSE_SPECTRUM_MAX`` areas; above that, the
smallest eigenvalues exactly (scipy eigsh) and the rest through a Chebyshev interpolant in phi of
log det((1 - phi) s L + phi I) from sparse factorisations at the Chebyshev nodes (Trefethen 2013,
Approximation Theory and Approximation Practice); the exact small eigenvalues carry the part that
varies fast near phi = 0, so the remainder is smooth and a few dozen nodes reach rounding level.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numba
import numpy as np
import pymc as pm
import pytensor.tensor as pt
import scipy.sparse as sp
from pytensor.gradient import disconnected_type
from pytensor.graph.basic import Apply
from pytensor.graph.op import Op
from pytensor.link.numba.dispatch import basic as numba_basic
from pytensor.link.numba.dispatch.basic import register_funcify_default_op_cache_key
from scipy.fft import dct

from .graph import NeighbourGraph

# Relative residual at which the solve stops: SOLVER_TOLERANCE up to TOLERANCE_AREAS areas,
# SOLVER_TOLERANCE * sqrt(TOLERANCE_AREAS / n) above (solver_tolerance). The log density's error
# is of the order of the residual's square times n (variational form), so this keeps it at a
# few thousandths of a nat on any map. Measured against a solve to 1e-12, on North Carolina, the
# demo and the 3,024-cell grid, BYM2-prior and rough fields, phi 0.01-0.999, sigma = 1 (the
# error in nats does not depend on sigma): at most 3.3e-5, 2.3e-4 and 2.5e-3 nats at 1e-3
# (1.5e-5 on the grid at 1e-4). A perturbation eps of the log density moves a posterior mean by
# at most sd(eps) times the quantity's posterior SD, here under 0.3% of it, against a Monte
# Carlo error of 5% at 400 ESS. The gradient's error (measured up to 6e-3 relative) only lowers
# acceptance, since the sampler stays exact for the value it is given; on the grid steps per
# draw stayed 22-26 and sampling took 15.2-16.5 s against 17.5-19.3 s at 1e-4 (three seeds,
# 4 x (300 + 1,000) draws).
SOLVER_TOLERANCE = 1e-3
TOLERANCE_AREAS = 3000
# Bump when the numba kernel changes: pytensor caches compiled Ops by type and properties.
KERNEL_VERSION = 2
DENSE_SPECTRUM_MAX = 2000
EXACT_SMALL_EIGENVALUES = 100
CHEBYSHEV_NODES = (64, 128, 256)
# Sample b0 centred when the median over areas of mu_i * alpha (data precision over prior
# precision, see prefers_centred) is at least this; b0 / sigma otherwise.
CENTRED_FROM = 0.3
# Latent variables of this form that no output reads (see smootharea.model.LATENT_INTERNALS).
LATENT_NAMES = ("effect_free", "effect_within", "effect_component_mean")


@dataclass(frozen=True)
class CombinedLayout:
    """The graph as the solver needs it: neighbour lists padded to a common width, degrees, 1/s_c.

    ``table[k, i]`` is area i's k-th neighbour, or n (a slot that always holds 0) when i has fewer
    than ``width`` neighbours; neighbours beyond the width (areas of unusually high degree) are the
    pairs (``spill_rows``, ``spill_cols``). Why not CSR: summing one row at a time chains every
    addition on the previous one; a column of this table at a time lets the additions of different
    areas run side by side, which made the whole solve 1.3-1.9x faster at 3,024 and 30,000 areas
    with bit-identical results (same order of additions per area).
    """

    table: np.ndarray
    spill_rows: np.ndarray
    spill_cols: np.ndarray
    degree: np.ndarray
    inverse_scaling: np.ndarray   # 1 / s_c of the area's component; 1 on islands (unused there)

    @classmethod
    def from_graph(cls, graph: NeighbourGraph) -> "CombinedLayout":
        adjacency = graph.adjacency.tocsr()
        adjacency.sort_indices()
        scaling = np.asarray(graph.scaling_factors, dtype=float)[graph.component]
        island = ~np.isfinite(scaling)
        table, spill_rows, spill_cols = padded_neighbour_table(adjacency)
        return cls(table=table, spill_rows=spill_rows, spill_cols=spill_cols,
                   degree=np.diff(adjacency.indptr).astype(float),
                   inverse_scaling=np.where(island, 1.0, 1.0 / np.where(island, 1.0, scaling)))

    def arrays(self) -> tuple[np.ndarray, ...]:
        return self.table, self.spill_rows, self.spill_cols, self.degree, self.inverse_scaling


def padded_neighbour_table(adjacency: sp.csr_matrix, quantile: float = 95.0
                           ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(table, spill_rows, spill_cols) of a 0/1 adjacency: the table is as wide as the given
    quantile of the degrees (at least 1); the rest of each row goes to the spill pairs."""
    n = adjacency.shape[0]
    degree = np.diff(adjacency.indptr)
    width = max(1, int(np.ceil(np.percentile(degree, quantile)))) if n else 1
    rows = np.repeat(np.arange(n, dtype=np.int32), degree)
    rank = np.arange(adjacency.indices.size) - np.repeat(adjacency.indptr[:-1], degree)
    table = np.full((width, n), n, dtype=np.int32)
    inside = rank < width
    table[rank[inside], rows[inside]] = adjacency.indices[inside]
    return (table, rows[~inside].astype(np.int32),
            adjacency.indices[~inside].astype(np.int32))


# ----------------------------------------------------------------- q = b0' Q M^-1 b0

@numba.njit(cache=True)
def neighbour_sum(table, spill_rows, spill_cols, vector, out):
    """out_i = sum of ``vector`` over area i's neighbours (``vector[n]`` must be 0)."""
    width, n = table.shape
    first = table[0]
    for i in range(n):
        out[i] = vector[first[i]]
    for k in range(1, width):
        column = table[k]
        for i in range(n):
            out[i] += vector[column[i]]
    for j in range(spill_rows.size):
        out[spill_rows[j]] += vector[spill_cols[j]]


@numba.njit(cache=True)
def combined_quadratic_form(b, phi, table, spill_rows, spill_cols, degree, inverse_scaling,
                            tolerance):
    """(q, dq/db, dq/dphi, iterations) for M = (1 - phi) Q + phi S, Q = diag(degree) - W."""
    n = b.size
    a = 1.0 - phi
    diagonal = np.empty(n)
    inverse_diagonal = np.empty(n)
    for i in range(n):
        diagonal[i] = a * degree[i] + phi * inverse_scaling[i]
        # islands (degree 0) carry b = 0; keep their pivot finite even when phi = 0
        inverse_diagonal[i] = 1.0 / diagonal[i] if diagonal[i] > 0.0 else 0.0
    x = np.zeros(n + 1)           # entry n: the padding slot of the neighbour table, always 0
    direction = np.zeros(n + 1)
    residual = b.copy()
    applied = np.empty(n)
    neighbours = np.empty(n)
    rz = 0.0
    bb = 0.0
    for i in range(n):
        direction[i] = residual[i] * inverse_diagonal[i]
        rz += residual[i] * direction[i]
        bb += b[i] * b[i]
    limit = tolerance * tolerance * bb
    iterations = 0
    while bb > 0.0 and iterations < 10 * n + 100:
        neighbour_sum(table, spill_rows, spill_cols, direction, neighbours)
        curvature = 0.0
        for i in range(n):
            value = diagonal[i] * direction[i] - a * neighbours[i]
            applied[i] = value
            curvature += direction[i] * value
        if curvature <= 0.0:
            break
        step = rz / curvature
        rr = 0.0
        rz_next = 0.0
        for i in range(n):
            x[i] += step * direction[i]
            r = residual[i] - step * applied[i]
            residual[i] = r
            rr += r * r
            rz_next += r * r * inverse_diagonal[i]
        iterations += 1
        if rr <= limit:
            break
        ratio = rz_next / rz
        for i in range(n):
            direction[i] = residual[i] * inverse_diagonal[i] + ratio * direction[i]
        rz = rz_next
    neighbour_sum(table, spill_rows, spill_cols, x, neighbours)
    qx = np.empty(n)
    b_qx = 0.0
    qx_qx = 0.0
    qx_sx = 0.0
    for i in range(n):
        value = degree[i] * x[i] - neighbours[i]
        qx[i] = value
        b_qx += b[i] * value
        qx_qx += value * value
        qx_sx += value * inverse_scaling[i] * x[i]
    quad = 2.0 * b_qx - (a * qx_qx + phi * qx_sx)
    return quad, 2.0 * qx, qx_qx - qx_sx, iterations


class CombinedQuadraticForm(Op):
    """q(b0, phi) = b0' Q M^-1 b0 with its gradient (one solve serves both)."""

    __props__ = ("tolerance", "version")

    def __init__(self, tolerance: float = SOLVER_TOLERANCE, version: int = KERNEL_VERSION):
        self.tolerance = float(tolerance)
        self.version = int(version)

    def make_node(self, b, phi, table, spill_rows, spill_cols, degree, inverse_scaling):
        inputs = [pt.as_tensor(b, dtype="float64"), pt.as_tensor(phi, dtype="float64"),
                  pt.as_tensor(table, dtype="int32"), pt.as_tensor(spill_rows, dtype="int32"),
                  pt.as_tensor(spill_cols, dtype="int32"), pt.as_tensor(degree, dtype="float64"),
                  pt.as_tensor(inverse_scaling, dtype="float64")]
        return Apply(self, inputs, [pt.dscalar(), pt.dvector(), pt.dscalar()])

    def perform(self, node, inputs, outputs):
        b, phi, *layout = inputs
        quad, gradient_b, gradient_phi, _ = combined_quadratic_form(b, float(phi), *layout,
                                                                    self.tolerance)
        outputs[0][0] = np.asarray(quad)
        outputs[1][0] = gradient_b
        outputs[2][0] = np.asarray(gradient_phi)

    def L_op(self, inputs, outputs, output_grads):
        # First order only: the gradient outputs are not themselves differentiated.
        weight = output_grads[0]
        return [weight * outputs[1], weight * outputs[2]] + [disconnected_type()] * 5

    def connection_pattern(self, node):
        return [[True, False, False]] * 2 + [[False, False, False]] * 5


@register_funcify_default_op_cache_key(CombinedQuadraticForm)
def _numba_combined_quadratic_form(op, **kwargs):
    kernel = numba_basic.numba_njit(combined_quadratic_form.py_func)
    tolerance = op.tolerance

    @numba_basic.numba_njit
    def quadratic_form(b, phi, table, spill_rows, spill_cols, degree, inverse_scaling):
        quad, gradient_b, gradient_phi, _ = kernel(b, phi.item(), table, spill_rows, spill_cols,
                                                   degree, inverse_scaling, tolerance)
        return np.asarray(quad), gradient_b, np.asarray(gradient_phi)

    return quadratic_form


def solver_tolerance(n_areas: int) -> float:
    """The solve's relative residual for a map of ``n_areas`` (see SOLVER_TOLERANCE)."""
    return SOLVER_TOLERANCE * min(1.0, math.sqrt(TOLERANCE_AREAS / max(n_areas, 1)))


def quadratic_form(b, phi, layout: CombinedLayout):
    """The pytensor expression q(b0, phi)."""
    tolerance = solver_tolerance(layout.degree.size)
    return CombinedQuadraticForm(tolerance)(b, phi, *layout.arrays())[0]


# ------------------------------------------------- sum_k log(1 + phi (gamma_k - 1))

@dataclass(frozen=True)
class MixingLogDet:
    """sum_k log(1 + phi (gamma_k - 1)) over all components, up to a constant in phi.

    ``gamma``: exact eigenvalues gamma_k (small components, and the smallest-lambda part of large
    ones); ``chebyshev``: per large component, coefficients of the smooth remainder in x = 2 phi - 1.
    """

    gamma: np.ndarray
    chebyshev: tuple[np.ndarray, ...]

    def numpy(self, phi: float) -> float:
        total = float(np.sum(np.log1p(phi * (self.gamma - 1.0))))
        return total + sum(float(np.polynomial.chebyshev.chebval(2 * phi - 1, c))
                           for c in self.chebyshev)

    def tensor(self, phi):
        total = pt.sum(pt.log1p(phi * (pt.as_tensor(self.gamma) - 1.0)))
        for coefficients in self.chebyshev:
            total = total + _clenshaw(2.0 * phi - 1.0, coefficients)
        return total


@numba.njit(cache=True)
def chebyshev_value(x, coefficients):
    """sum_j c_j T_j(x) by Clenshaw's recurrence."""
    following, current = 0.0, 0.0
    for j in range(coefficients.size - 1, 0, -1):
        following, current = current, 2.0 * x * current - following + coefficients[j]
    return x * current - following + coefficients[0]


class ChebyshevSeries(Op):
    """sum_j c_j T_j(x) for a scalar x and constant coefficients, with its derivative (whose
    coefficients come in as a second constant). Why an Op: the recurrence written as pytensor
    scalar nodes made a graph of hundreds of nodes that took a minute to compile."""

    __props__ = ("version",)

    def __init__(self, version: int = KERNEL_VERSION):
        self.version = int(version)

    def make_node(self, x, coefficients, slope_coefficients):
        inputs = [pt.as_tensor(x, dtype="float64"), pt.as_tensor(coefficients, dtype="float64"),
                  pt.as_tensor(slope_coefficients, dtype="float64")]
        return Apply(self, inputs, [pt.dscalar(), pt.dscalar()])

    def perform(self, node, inputs, outputs):
        x, coefficients, slope_coefficients = inputs
        outputs[0][0] = np.asarray(chebyshev_value(float(x), coefficients))
        outputs[1][0] = np.asarray(chebyshev_value(float(x), slope_coefficients))

    def L_op(self, inputs, outputs, output_grads):
        return [output_grads[0] * outputs[1], disconnected_type(), disconnected_type()]

    def connection_pattern(self, node):
        return [[True, False], [False, False], [False, False]]


@register_funcify_default_op_cache_key(ChebyshevSeries)
def _numba_chebyshev_series(op, **kwargs):
    value = numba_basic.numba_njit(chebyshev_value.py_func)

    @numba_basic.numba_njit
    def series(x, coefficients, slope_coefficients):
        point = x.item()
        return (np.asarray(value(point, coefficients)),
                np.asarray(value(point, slope_coefficients)))

    return series


def _clenshaw(x, coefficients: np.ndarray):
    """The pytensor expression sum_j c_j T_j(x)."""
    slope = np.polynomial.chebyshev.chebder(coefficients) if coefficients.size > 1 else np.zeros(1)
    return ChebyshevSeries()(x, np.asarray(coefficients, dtype=float), slope)[0]


def mixing_log_det(graph: NeighbourGraph, dense_max: int = DENSE_SPECTRUM_MAX) -> MixingLogDet:
    """The log-determinant term of the combined BYM2 density for every component of ``graph``."""
    gammas, series = [np.empty(0)], []
    for members, scale, laplacian in graph.component_laplacians():
        if members.size <= dense_max:
            gammas.append(1.0 / (scale * np.linalg.eigvalsh(laplacian.toarray())[1:]))
            continue
        count = min(EXACT_SMALL_EIGENVALUES, (members.size - 1) // 4)
        small = graph.smallest_laplacian_eigenpairs(members, laplacian, count)[0]
        gamma_small = 1.0 / (scale * small)
        gammas.append(gamma_small)
        series.append(_remainder_series(laplacian, scale, gamma_small))
    return MixingLogDet(np.concatenate(gammas), tuple(series))


def _remainder_series(laplacian: sp.csc_matrix, scale: float, gamma_small: np.ndarray) -> np.ndarray:
    """Chebyshev coefficients of r(phi) = log det((1 - phi) s L + phi I) - log(phi)
    - sum over the exact small eigenvalues, which equals sum_k log(1 + phi (gamma_k - 1)) over the
    remaining eigenvalues plus a constant."""
    from .quick import SparseFactor
    n = laplacian.shape[0]
    identity = sp.identity(n, format="csc")
    order = SparseFactor.ordering(laplacian + identity)

    def remainder(phi: float) -> float:
        log_det = SparseFactor((1.0 - phi) * scale * laplacian + phi * identity, order).log_determinant()
        return log_det - np.log(phi) - float(np.sum(np.log1p(phi * (gamma_small - 1.0))))

    for count in CHEBYSHEV_NODES:
        nodes = np.cos(np.pi * (np.arange(count) + 0.5) / count)   # first kind, interior
        values = np.array([remainder(0.5 * (x + 1.0)) for x in nodes])
        coefficients = dct(values, type=2) / count
        coefficients[0] /= 2.0
        if np.max(np.abs(coefficients[-8:])) < 1e-10 * max(1.0, np.abs(values).max()):
            return coefficients
    raise ValueError(f"the log determinant of a component of {n} areas did not reach rounding "
                     f"level with {CHEBYSHEV_NODES[-1]} Chebyshev nodes")


# ------------------------------------------------------------- parameterisation

def prefers_centred(observed, expected, covariates) -> bool:
    """Whether to sample b0 itself (centred) rather than b0 / sigma (non-centred).

    Centring suits areas whose data say more about b_i than the prior does: Poisson
    information mu_i against prior precision about 1 / sigma^2, i.e. mu_i sigma^2 > 1
    (Gelfand, Sahu & Carlin 1995, Biometrika 82; Papaspiliopoulos, Roberts & Skold 2007,
    Statistical Science 22). sigma^2 is estimated before sampling by the extra-Poisson
    variance around the GLM (smootharea.frequentist.extra_poisson_variance). The cut at a
    median of 0.3 rather than 1 is empirical: spatial smoothing lowers the prior precision of
    the smooth patterns, so centring pays off earlier. Measured (4 chains x 1,000 draws,
    smallest bulk ESS of sigma / phi; the median of mu_i alpha in brackets): North Carolina
    (0.44) centred 746 / 531, non-centred 490 / 331; the 3,024-cell grid (1.0, 4 x 500)
    centred 398 / 458, non-centred 162 / 154; the demo (0.16, with its covariate) centred
    245 / 342 with E-BFMI 0.16-0.22, non-centred 692 / 284 with E-BFMI 0.41-0.49.
    """
    from .frequentist import extra_poisson_variance
    alpha, fitted = extra_poisson_variance(observed, expected, covariates)
    return bool(np.median(fitted * alpha) >= CENTRED_FROM)


# ------------------------------------------------------------------------ effect

def combined_bym2_effect(graph: NeighbourGraph, layout, sigma, phi, sqrt_one_minus_phi,
                         log_det: MixingLogDet, centred: bool = True):
    """b (dims area) for BYM2 in the combined form; adds its log density to the model.

    ``layout`` is the model's IcarLayout (free coordinates of the sum-to-zero space per
    component); ``sqrt_one_minus_phi`` is passed in computed stably near phi = 1. With
    ``centred`` the sum-to-zero part b0 is sampled itself, otherwise b0 / sigma.
    """
    from .model import zero_sum_by_component
    n = graph.n_areas
    free = pm.Flat("effect_free", shape=layout.n_free)
    standard = zero_sum_by_component(free, layout)
    form = quadratic_form(standard, phi, CombinedLayout.from_graph(graph))
    if centred:
        within = pm.Deterministic("effect_within", standard, dims="area")
        pm.Potential("combined_bym2", -0.5 * form / sigma**2 - layout.n_free * pt.log(sigma)
                     - 0.5 * log_det.tensor(phi))
    else:
        within = pm.Deterministic("effect_within", sigma * standard, dims="area")
        pm.Potential("combined_bym2", -0.5 * form - 0.5 * log_det.tensor(phi))

    sizes = np.asarray(layout.component_sizes, dtype=float)
    component_index = _compact_component(graph, layout)
    z = pm.Normal("effect_component_mean", 0.0, 1.0, shape=sizes.size)
    connected = ~layout.island_mask
    means = pt.zeros(n)
    if layout.is_one_component:
        means = z[0] / np.sqrt(sizes[0])   # broadcast: every area shares the one mean
    elif connected.any():
        means = pt.set_subtensor(means[np.flatnonzero(connected)],
                                 (z / np.sqrt(sizes))[component_index[connected]])
    effect = within + sigma * sqrt_one_minus_phi * means
    if layout.islands.size:
        v_island = pm.Normal("v_island", 0.0, 1.0, shape=layout.islands.size)
        effect = pt.set_subtensor(effect[layout.islands], sigma * v_island)
    return effect


def _compact_component(graph: NeighbourGraph, layout) -> np.ndarray:
    """Per area, the index of its component among components with >= 2 areas (-1 on islands)."""
    sizes_all = np.bincount(graph.component, minlength=graph.n_components)
    compact = np.full(sizes_all.size, -1)
    connected = np.flatnonzero(sizes_all >= 2)
    compact[connected] = np.arange(connected.size)
    return compact[graph.component]
