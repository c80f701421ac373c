"""Neighbour graph: contiguity, link edits, islands, components, BYM2 scaling.

Owns :class:`NeighbourGraph` and everything that builds it: contiguity from the
areas layer (libpysal), link edits from CSV edge lists, connected components and
the per-component BYM2 scaling factor (Riebler et al. 2016, SMMR 25;
Freni-Sterrantino, Ventrucci & Rue 2018, SSTE 26).
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components
from scipy.sparse.linalg import splu

# Columns of the identity solved at once when extracting diag(Q^-1); bounds memory
# to n * block doubles (30,000 areas x 512 columns = 123 MB).
_DIAGONAL_BLOCK = 512


@dataclass(frozen=True)
class NeighbourGraph:
    """Undirected neighbour graph over areas 0..n-1 (in StudyData.area_ids order).

    Attributes:
        area_ids: the ids, same order as StudyData.area_ids.
        edges: int64 array (m, 2), each undirected link once with i < j, sorted.
        component: int64 array (n,), component label per area; labels 0..k-1
            ordered by decreasing component size (islands are components of size 1).
        scaling_factors: float array (k,), BYM2 scaling factor per component
            (geometric mean of the diagonal of the generalised inverse of that
            component's ICAR precision); NaN for components of size 1.
    """

    area_ids: tuple[str, ...]
    edges: np.ndarray
    component: np.ndarray
    scaling_factors: np.ndarray

    @property
    def n_areas(self) -> int:
        return len(self.area_ids)

    @property
    def n_links(self) -> int:
        return int(self.edges.shape[0])

    @property
    def n_components(self) -> int:
        return int(self.scaling_factors.shape[0])

    @property
    def neighbour_counts(self) -> np.ndarray:
        """Number of neighbours of each area (int64, length n)."""
        return np.bincount(self.edges.ravel(), minlength=self.n_areas).astype(np.int64)

    @property
    def islands(self) -> np.ndarray:
        """Indices of areas with no neighbours."""
        return np.flatnonzero(self.neighbour_counts == 0)

    @property
    def island_ids(self) -> tuple[str, ...]:
        return tuple(self.area_ids[i] for i in self.islands)

    @property
    def component_sizes(self) -> np.ndarray:
        return np.bincount(self.component, minlength=self.n_components).astype(np.int64)

    @property
    def components(self) -> list[np.ndarray]:
        """Area indices of each component, largest component first."""
        order = np.argsort(self.component, kind="stable")
        return np.split(order, np.cumsum(self.component_sizes)[:-1])

    @property
    def adjacency(self) -> sp.csr_matrix:
        """Symmetric 0/1 adjacency matrix W (sparse CSR, n x n)."""
        return _adjacency(self.n_areas, self.edges)

    def neighbours_of(self, index: int) -> np.ndarray:
        """Indices of the neighbours of area ``index``."""
        adjacency = self.adjacency
        return adjacency.indices[adjacency.indptr[index]:adjacency.indptr[index + 1]]

    def summary(self) -> dict:
        """Plain numbers for reports and model.json."""
        counts = self.neighbour_counts
        return {
            "areas": self.n_areas,
            "links": self.n_links,
            "mean_neighbours": float(counts.mean()) if self.n_areas else 0.0,
            "max_neighbours": int(counts.max()) if self.n_areas else 0,
            "islands": list(self.island_ids),
            "components": [int(size) for size in self.component_sizes],
        }


def graph_from_edges(area_ids: Sequence[str], edges) -> NeighbourGraph:
    """Build a :class:`NeighbourGraph` from area ids and an (m, 2) array of index pairs.

    Links are made undirected (i < j), de-duplicated and sorted; self-loops are
    dropped. Components are labelled by decreasing size (ties: the component
    holding the lowest area index first).
    """
    area_ids = tuple(str(a) for a in area_ids)
    n = len(area_ids)
    edges = normalise_edges(edges, n)
    component = _components_by_size(n, edges)
    n_components = int(component.max()) + 1 if n else 0
    scaling_factors = np.full(n_components, np.nan)
    local_index = _local_indices(component, n_components)
    for label in range(n_components):
        members = np.flatnonzero(component == label)
        if members.size < 2:
            continue
        in_component = component[edges[:, 0]] == label
        local_edges = local_index[edges[in_component]]
        scaling_factors[label] = scaling_factor(members.size, local_edges)
    return NeighbourGraph(area_ids=area_ids, edges=edges, component=component,
                          scaling_factors=scaling_factors)


def normalise_edges(edges, n: int) -> np.ndarray:
    """Undirected links once each, as sorted int64 (m, 2) with i < j, self-loops dropped."""
    edges = np.asarray(edges, dtype=np.int64).reshape(-1, 2)
    if edges.size and (edges.min() < 0 or edges.max() >= n):
        raise ValueError(f"edge indices must lie in 0..{n - 1}")
    edges = np.sort(edges, axis=1)
    edges = edges[edges[:, 0] != edges[:, 1]]
    if not edges.size:
        return np.empty((0, 2), dtype=np.int64)
    return np.unique(edges, axis=0)


def scaling_factor(n: int, edges) -> float:
    """BYM2 scaling factor of one connected component (Riebler et al. 2016, SMMR 25).

    The geometric mean of diag(Q^+), Q = D - W the ICAR precision of the
    component and Q^+ its generalised inverse under sum(u) = 0. NaN for n = 1.

    Computed exactly with sparse algebra: ground node k = n-1 (drop its row and
    column, leaving the SPD matrix Q_g), take G = Q_g^{-1} padded with a zero row
    and column; G is a generalised inverse of Q, and with P = I - 11'/n,
    Q^+ = P G P, so diag(Q^+)_i = G_ii - 2 (G1)_i / n + 1'G1 / n^2.
    """
    if n < 2:
        return float("nan")
    edges = np.asarray(edges, dtype=np.int64).reshape(-1, 2)
    laplacian = icar_precision(n, edges)
    grounded = laplacian[:-1, :-1].tocsc()
    g_diag, g_ones = _grounded_inverse_diagonal(grounded)
    g_diag = np.append(g_diag, 0.0)
    g_ones = np.append(g_ones, 0.0)
    total = g_ones.sum()
    diagonal = g_diag - 2.0 * g_ones / n + total / n**2
    if np.any(diagonal <= 0):
        raise ValueError("scaling_factor needs a connected component")
    return float(np.exp(np.mean(np.log(diagonal))))


def icar_precision(n: int, edges) -> sp.csr_matrix:
    """ICAR precision Q = D - W (Besag, York & Mollie 1991) as sparse CSR."""
    adjacency = _adjacency(n, np.asarray(edges, dtype=np.int64).reshape(-1, 2))
    degree = np.asarray(adjacency.sum(axis=1)).ravel()
    return (sp.diags(degree) - adjacency).tocsr()


def _grounded_inverse_diagonal(grounded: sp.csc_matrix) -> tuple[np.ndarray, np.ndarray]:
    """diag(A^-1) and A^-1 1 for an SPD sparse A, factorising once."""
    size = grounded.shape[0]
    factor = splu(grounded, permc_spec="MMD_AT_PLUS_A", diag_pivot_thresh=0.0,
                  options={"SymmetricMode": True})
    g_ones = factor.solve(np.ones(size))
    diagonal = np.empty(size)
    for start in range(0, size, _DIAGONAL_BLOCK):
        stop = min(start + _DIAGONAL_BLOCK, size)
        block = np.zeros((size, stop - start))
        block[np.arange(start, stop), np.arange(stop - start)] = 1.0
        solved = factor.solve(block)
        diagonal[start:stop] = solved[np.arange(start, stop), np.arange(stop - start)]
    return diagonal, g_ones


def _adjacency(n: int, edges: np.ndarray) -> sp.csr_matrix:
    rows = np.concatenate([edges[:, 0], edges[:, 1]])
    cols = np.concatenate([edges[:, 1], edges[:, 0]])
    data = np.ones(rows.size)
    return sp.csr_matrix((data, (rows, cols)), shape=(n, n))


def _components_by_size(n: int, edges: np.ndarray) -> np.ndarray:
    if n == 0:
        return np.empty(0, dtype=np.int64)
    _, labels = connected_components(_adjacency(n, edges), directed=False)
    sizes = np.bincount(labels)
    first_member = np.full(sizes.size, n)
    np.minimum.at(first_member, labels, np.arange(n))
    order = np.lexsort((first_member, -sizes))
    relabel = np.empty_like(order)
    relabel[order] = np.arange(order.size)
    return relabel[labels].astype(np.int64)


def _local_indices(component: np.ndarray, n_components: int) -> np.ndarray:
    """Position of each area within its own component (in area order)."""
    local = np.empty(component.size, dtype=np.int64)
    for label in range(n_components):
        members = np.flatnonzero(component == label)
        local[members] = np.arange(members.size)
    return local
