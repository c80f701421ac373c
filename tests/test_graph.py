"""Neighbour graph: BYM2 scaling factors, components, islands, contiguity, link edits."""

import geopandas as gpd
import libpysal
import numpy as np
import pytest
from libpysal.weights import Queen

from smootharea.graph import (build_graph, generalised_inverse_diagonal, graph_from_edges,
                              icar_precision, scaling_factor)
from smootharea.job import NeighbourRules
from smootharea.problems import InputError


def cycle_edges(n):
    return np.array([(i, (i + 1) % n) for i in range(n)])


def complete_edges(n):
    return np.array([(i, j) for i in range(n) for j in range(i + 1, n)])


def lattice_edges(rows, cols, queen=False):
    index = np.arange(rows * cols).reshape(rows, cols)
    pairs = [np.c_[index[:, :-1].ravel(), index[:, 1:].ravel()],
             np.c_[index[:-1].ravel(), index[1:].ravel()]]
    if queen:
        pairs += [np.c_[index[:-1, :-1].ravel(), index[1:, 1:].ravel()],
                  np.c_[index[:-1, 1:].ravel(), index[1:, :-1].ravel()]]
    return np.vstack(pairs)


@pytest.mark.parametrize("n", [3, 4, 7, 25, 101])
def test_cycle_diagonal_matches_effective_resistance_formula(n):
    # METHODS.md section 3 (from memory, the cycle's effective resistance):
    # every diagonal entry of Q^+ for a cycle of n nodes is (n^2 - 1) / (12 n).
    expected = (n**2 - 1) / (12 * n)
    np.testing.assert_allclose(generalised_inverse_diagonal(n, cycle_edges(n)), expected, rtol=1e-10)
    assert scaling_factor(n, cycle_edges(n)) == pytest.approx(expected, rel=1e-10)


@pytest.mark.parametrize("n", [2, 3, 6, 20])
def test_complete_graph_diagonal_matches_formula(n):
    # METHODS.md section 3 (from memory): for a complete graph Q = nI - 11', so
    # Q^+ = (I - 11'/n) / n and its diagonal is (n - 1) / n^2.
    expected = (n - 1) / n**2
    np.testing.assert_allclose(generalised_inverse_diagonal(n, complete_edges(n)), expected, rtol=1e-10)


def test_irregular_graph_matches_dense_pseudo_inverse():
    # Reference library: numpy.linalg.pinv of the dense Q = D - W (Moore-Penrose inverse,
    # which is the generalised inverse under sum-to-zero for a connected graph).
    rng = np.random.default_rng(7)
    n = 40
    tree = np.array([(i, int(rng.integers(0, i))) for i in range(1, n)])  # connected
    extra = rng.integers(0, n, size=(60, 2))
    edges = np.vstack([tree, extra])
    edges = edges[edges[:, 0] != edges[:, 1]]
    dense = np.diag(np.linalg.pinv(icar_precision(n, edges).toarray()))
    np.testing.assert_allclose(generalised_inverse_diagonal(n, edges), dense, rtol=1e-9)
    assert scaling_factor(n, edges) == pytest.approx(np.exp(np.mean(np.log(dense))), rel=1e-9)


def path_modes(m):
    """Eigenvalues 2 - 2 cos(pi a / m) of the Laplacian of a path of m nodes, and the squares
    of its DCT-II eigenvectors cos(pi a (x + 1/2) / m) (Strang 1999, SIAM Review 41, "The
    discrete cosine transform"). A rook lattice's Laplacian is L_rows (x) I + I (x) L_cols,
    so its eigenvalues are the sums of the two paths'."""
    a = np.arange(m)
    values = 2 - 2 * np.cos(np.pi * a / m)
    vectors = np.cos(np.pi * np.outer(np.arange(m) + 0.5, a) / m)
    vectors /= np.linalg.norm(vectors, axis=0)
    return values, vectors**2


def spectral_lattice_diagonal(rows, cols):
    """diag(Q^+) of a rook lattice from its known eigen-decomposition (independent route,
    :func:`path_modes`): diag(Q^+)_(x,y) = sum_{(a,b) != (0,0)} u_a(x)^2 v_b(y)^2 /
    (lambda_a + mu_b).
    """
    row_values, row_squares = path_modes(rows)
    col_values, col_squares = path_modes(cols)
    total = row_values[:, None] + col_values[None, :]
    total[0, 0] = np.inf  # the constant mode is excluded by sum-to-zero
    return (row_squares @ (1 / total) @ col_squares.T).ravel()


def test_large_lattice_is_exact():
    # 30,000 areas (150 x 200 rook lattice): must not need a dense inverse. Checked against
    # the closed-form spectral diagonal above. (Its speed is measured in benchmarks/, not here.)
    rows, cols = 150, 200
    edges = lattice_edges(rows, cols)
    diagonal = generalised_inverse_diagonal(rows * cols, edges)
    np.testing.assert_allclose(diagonal, spectral_lattice_diagonal(rows, cols), rtol=1e-8)


def test_components_and_islands_on_hand_made_graph():
    # Hand-made: areas a-b-c-d form a 4-cycle, e-f a pair, g has no neighbours.
    ids = ["a", "b", "c", "d", "e", "f", "g"]
    edges = [(1, 0), (1, 2), (2, 3), (3, 0), (0, 1), (5, 4), (6, 6)]  # duplicate and self-loop
    graph = graph_from_edges(ids, edges)
    assert graph.edges.tolist() == [[0, 1], [0, 3], [1, 2], [2, 3], [4, 5]]
    assert graph.component.tolist() == [0, 0, 0, 0, 1, 1, 2]
    assert graph.component_sizes.tolist() == [4, 2, 1]
    assert graph.island_ids == ("g",)
    assert [c.tolist() for c in graph.components] == [[0, 1, 2, 3], [4, 5], [6]]
    assert graph.neighbour_counts.tolist() == [2, 2, 2, 2, 1, 1, 0]
    # Freni-Sterrantino et al. 2018: each component scaled on its own; cycle of 4 gives
    # (16 - 1) / 48 (formula above), a pair (complete graph of 2) gives 1/4, islands NaN.
    assert graph.scaling_factors[0] == pytest.approx(15 / 48)
    assert graph.scaling_factors[1] == pytest.approx(0.25)
    assert np.isnan(graph.scaling_factors[2])
    summary = graph.summary()
    assert summary == {"areas": 7, "links": 5, "mean_neighbours": pytest.approx(10 / 7),
                       "max_neighbours": 2, "islands": ["g"], "components": [4, 2, 1]}
    assert (graph.adjacency != graph.adjacency.T).nnz == 0
    assert graph.adjacency.sum() == 10


def test_components_are_labelled_by_decreasing_size():
    # Smaller component listed first among the areas must still get the higher label.
    graph = graph_from_edges(list("abcde"), [(0, 1), (2, 3), (3, 4)])
    assert graph.component.tolist() == [1, 1, 0, 0, 0]
    assert graph.component_sizes.tolist() == [3, 2]


@pytest.fixture(scope="module")
def north_carolina():
    # North Carolina SIDS counties as shipped by libpysal (Cressie 1993, Statistics for
    # Spatial Data): 100 counties, FIPS codes as ids.
    areas = gpd.read_file(libpysal.examples.get_path("sids2.shp"))
    areas["area_id"] = areas["FIPS"].astype(str)
    return areas[["area_id", "geometry"]]


def test_north_carolina_queen_graph_is_one_component(north_carolina):
    graph = build_graph(north_carolina, NeighbourRules(rule="queen"))
    assert graph.n_areas == 100
    assert graph.component_sizes.tolist() == [100]
    assert graph.island_ids == ()
    assert np.isfinite(graph.scaling_factors[0]) and graph.scaling_factors[0] > 0


def test_north_carolina_links_match_libpysal_and_survive_reordering(north_carolina):
    # Reference library: libpysal Queen weights keyed by FIPS. Our graph is built from a
    # shuffled copy, so the check also covers the index <-> id bookkeeping.
    reference = Queen.from_dataframe(north_carolina, ids=list(north_carolina["area_id"]),
                                     silence_warnings=True)
    expected = {frozenset((a, b)) for a, nbrs in reference.neighbors.items() for b in nbrs}
    shuffled = north_carolina.sample(frac=1.0, random_state=3).reset_index(drop=True)
    graph = build_graph(shuffled, NeighbourRules(rule="queen"))
    found = {frozenset((graph.area_ids[i], graph.area_ids[j])) for i, j in graph.edges}
    assert found == expected
    rook = build_graph(north_carolina, NeighbourRules(rule="rook"))
    found_rook = {frozenset((rook.area_ids[i], rook.area_ids[j])) for i, j in rook.edges}
    assert found_rook < expected  # rook links are a strict subset here (corner-only contacts)


def write_links(path, rows, header=("from_area", "to_area")):
    path.write_text("\n".join([",".join(header)] + [f"{a},{b}" for a, b in rows]) + "\n")
    return path


def test_link_edits_add_remove_and_make_an_island(north_carolina, tmp_path):
    base = build_graph(north_carolina, NeighbourRules())
    ids = base.area_ids
    lonely = 17
    lonely_links = [(ids[lonely], ids[j]) for j in base.neighbours_of(lonely)]
    far_a, far_b = ids[0], ids[99]
    assert far_b not in {ids[j] for j in base.neighbours_of(0)}
    rules = NeighbourRules(add_links=write_links(tmp_path / "add.csv", [(far_a, far_b)],
                                                 header=("x", "y")),
                           remove_links=write_links(tmp_path / "remove.csv", lonely_links))
    graph = build_graph(north_carolina, rules)
    assert graph.n_links == base.n_links - len(lonely_links) + 1
    assert graph.island_ids == (ids[lonely],)
    assert 99 in graph.neighbours_of(0)
    assert graph.component_sizes.tolist()[-1] == 1 and np.isnan(graph.scaling_factors[-1])


def test_link_files_with_unknown_ids_or_missing_links_are_input_problems(north_carolina, tmp_path):
    base = build_graph(north_carolina, NeighbourRules())
    ids = base.area_ids
    not_neighbours = (ids[0], ids[99])
    rules = NeighbourRules(
        add_links=write_links(tmp_path / "add.csv", [(ids[0], "99999"), ("NOPE", ids[1])]),
        remove_links=write_links(tmp_path / "remove.csv", [not_neighbours]))
    with pytest.raises(InputError) as raised:
        build_graph(north_carolina, rules)
    problems = raised.value.problems
    assert sorted(p.area_id for p in problems if "unknown area id" in p.message) == ["99999", "NOPE"]
    assert all(p.file == str(tmp_path / "add.csv") for p in problems if "unknown" in p.message)
    missing = [p for p in problems if "not neighbours" in p.message]
    assert len(missing) == 1 and missing[0].file == str(tmp_path / "remove.csv")
    assert "99999" in str(raised.value) and "NOPE" in str(raised.value)


def test_smallest_laplacian_eigenpairs_are_the_same_on_every_build():
    # Reproducibility (same seed, same draws) needs the PC prior's tables, built from these
    # eigenpairs, equal to the last bit: ARPACK's default start vector is random. The values
    # themselves are checked against the lattice's known spectrum (path_modes, Strang 1999).
    rows, cols = 30, 40
    edges = lattice_edges(rows, cols)
    results = []
    for _ in range(3):
        graph = graph_from_edges([f"a{i}" for i in range(rows * cols)], edges)
        members, _, laplacian = next(iter(graph.component_laplacians()))
        results.append(graph.smallest_laplacian_eigenpairs(members, laplacian, 6))
    for values, vectors in results[1:]:
        assert np.array_equal(values, results[0][0])
        assert np.array_equal(vectors, results[0][1])
    spectrum = np.sort((path_modes(rows)[0][:, None] + path_modes(cols)[0][None, :]).ravel())
    np.testing.assert_allclose(results[0][0], spectrum[1:7], rtol=1e-8)
