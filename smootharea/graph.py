"""Neighbour graph: contiguity, link edits, islands, components, BYM2 scaling.

Owns :class:`NeighbourGraph` and everything that builds it: contiguity from the
areas layer (libpysal), link edits from CSV edge lists, connected components and
the per-component BYM2 scaling factor (Riebler et al. 2016, SMMR 25;
Freni-Sterrantino, Ventrucci & Rue 2018, SSTE 26).
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Sequence

import numpy as np
import pandas as pd
import scipy.sparse as sp
from numba import njit
from scipy.sparse.csgraph import connected_components
from scipy.sparse.linalg import eigsh, splu

from .problems import InputError, Problem

if TYPE_CHECKING:
    import geopandas as gpd

    from .job import NeighbourRules

AREA_ID = "area_id"

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

    def component_laplacians(self):
        """(members, scaling factor, Laplacian D - W as sparse CSC) for each component with at
        least 2 areas, in the order of :attr:`components`."""
        adjacency = self.adjacency
        for label, members in enumerate(self.components):
            if members.size < 2:
                continue
            sub = adjacency[members][:, members]
            laplacian = (sp.diags(np.asarray(sub.sum(axis=1)).ravel()) - sub).tocsc()
            yield members, float(self.scaling_factors[label]), laplacian

    def smallest_laplacian_eigenpairs(self, members: np.ndarray, laplacian: sp.csc_matrix,
                                      count: int) -> tuple[np.ndarray, np.ndarray]:
        """The ``count`` smallest non-zero eigenvalues (ascending) and eigenvectors of one
        component's Laplacian (from :meth:`component_laplacians`), by shift-invert Lanczos
        (scipy eigsh). Kept on the graph: the PC prior and the combined BYM2 log-determinant
        both need them, and at 30,000 areas each call takes seconds."""
        cache = self.__dict__.setdefault("_eigenpairs", {})  # frozen dataclass: not a field
        key = (int(members[0]), int(members.size), int(count))
        if key not in cache:
            # A fixed start vector: ARPACK's own is random, which changed the PC prior's
            # tables in the last digits from run to run, and with them the draws.
            start = np.random.default_rng(members.size).uniform(-1.0, 1.0, members.size)
            values, vectors = eigsh(laplacian, k=count + 1, sigma=-1e-3, which="LM", v0=start)
            order = np.argsort(values)[1:]
            cache[key] = (values[order], vectors[:, order])
        return cache[key]

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


def build_graph(areas: "gpd.GeoDataFrame", rules: "NeighbourRules") -> NeighbourGraph:
    """Contiguity graph of the areas layer (libpysal), then the link edits of ``rules``.

    ``areas`` has an ``area_id`` column and geometry, in StudyData order. Queen
    contiguity links areas sharing a boundary point, rook only an edge segment.
    ``rules.remove_links`` removes contiguity links, then ``rules.add_links`` adds
    links (both CSV files, first two columns are area ids, header row expected).
    Raises :class:`InputError` naming every unknown id or missing link.
    """
    area_ids = tuple(areas[AREA_ID].astype(str))
    edges = contiguity_edges(areas, rules.rule)
    edges = apply_link_edits(area_ids, edges, rules.add_links, rules.remove_links)
    return graph_from_edges(area_ids, edges)


def contiguity_edges(areas: "gpd.GeoDataFrame", rule: str = "queen") -> np.ndarray:
    """(m, 2) index pairs i < j of areas that touch under the queen or rook rule."""
    from libpysal.weights import Queen, Rook

    builder = {"queen": Queen, "rook": Rook}[rule]
    frame = areas.reset_index(drop=True)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # islands are reported by the graph itself
        weights = builder.from_dataframe(frame, use_index=True, silence_warnings=True)
    pairs = [(i, j) for i, neighbours in weights.neighbors.items() for j in neighbours]
    return normalise_edges(np.array(pairs, dtype=np.int64).reshape(-1, 2), len(frame))


def apply_link_edits(area_ids: Sequence[str], edges, add_links: Path | str | None,
                     remove_links: Path | str | None) -> np.ndarray:
    """Remove then add links listed in CSV files; every bad row becomes one Problem."""
    n = len(area_ids)
    index = {area_id: i for i, area_id in enumerate(area_ids)}
    problems: list[Problem] = []
    edges = normalise_edges(edges, n)
    removals = _read_link_file(remove_links, index, problems)
    additions = _read_link_file(add_links, index, problems)
    if removals.size:
        existing = {tuple(edge) for edge in edges.tolist()}
        for i, j in removals.tolist():
            if (i, j) not in existing:
                problems.append(Problem(str(remove_links),
                                        f"cannot remove the link {area_ids[i]} - {area_ids[j]}: "
                                        "the areas are not neighbours", None, area_ids[i]))
    if problems:
        raise InputError(problems)
    if removals.size:
        keep = ~_rows_in(edges, removals)
        edges = edges[keep]
    return normalise_edges(np.vstack([edges, additions]), n)


def _read_link_file(path: Path | str | None, index: dict[str, int],
                    problems: list[Problem]) -> np.ndarray:
    """Index pairs (i < j) from a two-id-column CSV; unknown ids and self-links are problems."""
    if path is None:
        return np.empty((0, 2), dtype=np.int64)
    where = str(path)
    try:
        table = pd.read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True)
    except (OSError, pd.errors.ParserError, pd.errors.EmptyDataError) as error:
        problems.append(Problem(where, f"cannot read the link file: {error}"))
        return np.empty((0, 2), dtype=np.int64)
    if table.shape[1] < 2:
        problems.append(Problem(where, "a link file needs two columns of area ids "
                                f"(found {table.shape[1]})"))
        return np.empty((0, 2), dtype=np.int64)
    first, second = table.columns[:2]
    pairs = []
    for row, (a, b) in enumerate(zip(table[first].str.strip(), table[second].str.strip()), start=2):
        bad = False
        for column, area_id in ((first, a), (second, b)):
            if area_id not in index:
                problems.append(Problem(where, f"line {row}: unknown area id {area_id!r}"
                                        " (not in the areas layer)", str(column), area_id))
                bad = True
        if bad:
            continue
        if a == b:
            problems.append(Problem(where, f"line {row}: an area cannot be its own neighbour",
                                    str(first), a))
            continue
        pairs.append(sorted((index[a], index[b])))
    return np.array(pairs, dtype=np.int64).reshape(-1, 2)


def _rows_in(edges: np.ndarray, pairs: np.ndarray) -> np.ndarray:
    """Boolean mask: which rows of ``edges`` appear in ``pairs`` (both i < j)."""
    wanted = {tuple(pair) for pair in pairs.tolist()}
    return np.array([tuple(edge) in wanted for edge in edges.tolist()], dtype=bool)


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
    sizes = np.bincount(component, minlength=n_components)
    for label in np.flatnonzero(sizes >= 2):
        in_component = component[edges[:, 0]] == label
        scaling_factors[label] = scaling_factor(int(sizes[label]), local_index[edges[in_component]])
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
    """
    if n < 2:
        return float("nan")
    diagonal = generalised_inverse_diagonal(n, edges)
    return float(np.exp(np.mean(np.log(diagonal))))


def generalised_inverse_diagonal(n: int, edges) -> np.ndarray:
    """diag(Q^+) for one connected component with n >= 2 areas, exactly and sparsely.

    Ground node k = n-1 (drop its row and column, leaving the SPD matrix Q_g) and
    take G = Q_g^{-1} padded with a zero row and column; G is a generalised inverse
    of Q, and with P = I - 11'/n the Moore-Penrose inverse is Q^+ = P G P, so
    diag(Q^+)_i = G_ii - 2 (G1)_i / n + 1'G1 / n^2.
    """
    edges = np.asarray(edges, dtype=np.int64).reshape(-1, 2)
    precision = icar_precision(n, edges)
    if connected_components(precision, directed=False)[0] != 1:
        raise ValueError("generalised_inverse_diagonal needs one connected component")
    grounded = precision[:-1, :-1].tocsc()
    g_diagonal, g_ones = _grounded_inverse_diagonal(grounded)
    g_diagonal = np.append(g_diagonal, 0.0)
    g_ones = np.append(g_ones, 0.0)
    return g_diagonal - 2.0 * g_ones / n + g_ones.sum() / n**2


def icar_precision(n: int, edges) -> sp.csr_matrix:
    """ICAR precision Q = D - W (Besag, York & Mollie 1991) as sparse CSR."""
    adjacency = _adjacency(n, np.asarray(edges, dtype=np.int64).reshape(-1, 2))
    degree = np.asarray(adjacency.sum(axis=1)).ravel()
    return (sp.diags(degree) - adjacency).tocsr()


def _grounded_inverse_diagonal(grounded: sp.csc_matrix) -> tuple[np.ndarray, np.ndarray]:
    """diag(A^-1) and A^-1 1 for an SPD sparse A, exactly, without forming A^-1.

    Hand-written because scipy offers no sparse Cholesky and no selected inversion:
    A fill-reducing ordering comes from SuperLU (minimum degree on A'+A); the
    permuted matrix is factorised A = L D L' (up-looking LDL', Davis 2005, ACM TOMS
    31) and diag(A^-1) follows from the Takahashi recurrences (Takahashi, Fagan &
    Chin 1973; Erisman & Tinney 1975, CACM 18), which need only the entries of
    A^-1 on the pattern of L. Solving for diag(A^-1) in blocks of identity columns
    took 208 s on a 150 x 200 rook lattice (30,000 areas); this took 3-5 s.
    """
    size = grounded.shape[0]
    ordering = splu(grounded, permc_spec="MMD_AT_PLUS_A", diag_pivot_thresh=0.0,
                    options={"SymmetricMode": True}).perm_c
    permutation = np.argsort(ordering)  # row/column order in which SuperLU eliminated
    permuted = grounded[permutation][:, permutation].tocsc()
    permuted.sort_indices()
    indptr = permuted.indptr.astype(np.int64)
    indices = permuted.indices.astype(np.int64)
    parent, l_ptr = _ldl_symbolic(size, indptr, indices)
    l_rows, l_values, pivots, ok = _ldl_numeric(size, indptr, indices,
                                                permuted.data.astype(np.float64), parent, l_ptr)
    if not ok:
        raise ValueError("the grounded ICAR precision is not positive definite")
    diagonal = np.empty(size)
    diagonal[permutation] = _selected_inverse_diagonal(size, l_ptr, l_rows, l_values, pivots)
    solved = np.empty(size)
    solved[permutation] = _ldl_solve(size, l_ptr, l_rows, l_values, pivots, np.ones(size))
    return diagonal, solved


@njit(cache=True)
def _ldl_symbolic(n, a_ptr, a_rows):
    """Elimination tree and column pointers of L for a symmetric CSC matrix."""
    parent = np.full(n, -1, np.int64)
    flag = np.empty(n, np.int64)
    counts = np.zeros(n, np.int64)
    for k in range(n):
        flag[k] = k
        for p in range(a_ptr[k], a_ptr[k + 1]):
            i = a_rows[p]
            if i < k:
                while flag[i] != k:  # walk up the tree from i to the root of row k
                    if parent[i] == -1:
                        parent[i] = k
                    counts[i] += 1
                    flag[i] = k
                    i = parent[i]
    l_ptr = np.zeros(n + 1, np.int64)
    l_ptr[1:] = np.cumsum(counts)
    return parent, l_ptr


@njit(cache=True)
def _ldl_numeric(n, a_ptr, a_rows, a_values, parent, l_ptr):
    """Up-looking A = L D L' (unit lower L in CSC with sorted rows, full symbolic pattern)."""
    l_rows = np.empty(l_ptr[n], np.int64)
    l_values = np.empty(l_ptr[n])
    pivots = np.empty(n)
    work = np.zeros(n)
    pattern = np.empty(n, np.int64)
    flag = np.empty(n, np.int64)
    filled = np.zeros(n, np.int64)
    for k in range(n):
        top = n
        flag[k] = k
        for p in range(a_ptr[k], a_ptr[k + 1]):
            i = a_rows[p]
            if i <= k:
                work[i] += a_values[p]
                length = 0
                while flag[i] != k:
                    pattern[length] = i
                    length += 1
                    flag[i] = k
                    i = parent[i]
                while length > 0:
                    top -= 1
                    length -= 1
                    pattern[top] = pattern[length]
        pivots[k] = work[k]
        work[k] = 0.0
        while top < n:  # sparse triangular solve for row k of L
            i = pattern[top]
            top += 1
            y = work[i]
            work[i] = 0.0
            end = l_ptr[i] + filled[i]
            for p in range(l_ptr[i], end):
                work[l_rows[p]] -= l_values[p] * y
            l_ki = y / pivots[i]
            pivots[k] -= l_ki * y
            l_rows[end] = k
            l_values[end] = l_ki
            filled[i] += 1
        if pivots[k] <= 0.0:
            return l_rows, l_values, pivots, False
    return l_rows, l_values, pivots, True


@njit(cache=True)
def _position(l_rows, low, high, row):
    """Index of ``row`` in the sorted slice l_rows[low:high] (binary search)."""
    while low < high:
        middle = (low + high) // 2
        if l_rows[middle] < row:
            low = middle + 1
        else:
            high = middle
    return low


@njit(cache=True)
def _selected_inverse_diagonal(n, l_ptr, l_rows, l_values, pivots):
    """diag(S), S = (L D L')^-1, by the Takahashi recurrences on the pattern of L:

    S_ij = -sum_{k>j} S_ik L_kj (i > j, L_ij in pattern),  S_jj = 1/D_j - sum_{k>j} S_kj L_kj.
    """
    inverse = np.zeros(l_ptr[n])  # S on the pattern of L, same layout
    diagonal = np.empty(n)
    for j in range(n - 1, -1, -1):
        start, end = l_ptr[j], l_ptr[j + 1]
        for a in range(start, end):
            row_a = l_rows[a]
            total = 0.0
            for b in range(start, end):
                row_b = l_rows[b]
                if row_b == row_a:
                    total += l_values[b] * diagonal[row_a]
                elif row_b > row_a:
                    total += l_values[b] * inverse[_position(l_rows, l_ptr[row_a], l_ptr[row_a + 1], row_b)]
                else:
                    total += l_values[b] * inverse[_position(l_rows, l_ptr[row_b], l_ptr[row_b + 1], row_a)]
            inverse[a] = -total
        value = 1.0 / pivots[j]
        for a in range(start, end):
            value -= l_values[a] * inverse[a]
        diagonal[j] = value
    return diagonal


@njit(cache=True)
def _ldl_solve(n, l_ptr, l_rows, l_values, pivots, rhs):
    x = rhs.copy()
    for j in range(n):
        for p in range(l_ptr[j], l_ptr[j + 1]):
            x[l_rows[p]] -= l_values[p] * x[j]
    x /= pivots
    for j in range(n - 1, -1, -1):
        for p in range(l_ptr[j], l_ptr[j + 1]):
            x[j] -= l_values[p] * x[l_rows[p]]
    return x


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
    order = np.argsort(component, kind="stable")
    starts = np.concatenate([[0], np.cumsum(np.bincount(component, minlength=n_components))[:-1]])
    local = np.empty(component.size, dtype=np.int64)
    local[order] = np.arange(component.size) - starts[component[order]]
    return local
