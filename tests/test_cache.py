"""The compiled-model cache: same structure reuses the compiled code (in this process and,
through the cache folder, in a new one), a changed structure does not, and reused code
samples the *new* data.

Data: the first 12 North Carolina counties (libpysal 'sids2.shp', an open dataset shipped
with libpysal), expected counts internally standardised on births (METHODS.md section 1).
"""
from __future__ import annotations

import dataclasses
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

from smootharea import compiled_cache
from smootharea.graph import graph_from_edges
from smootharea.job import Sampling
from smootharea.model import build_model
from smootharea.recipes import load_recipe
from smootharea.sampling import sample_posterior

from test_models import nc_study, queen_edges

ROOT = Path(__file__).resolve().parents[1]
TINY = Sampling(chains=2, draws=100, warmup=100, seed=5, cores=2)


@pytest.fixture
def cache_folder(tmp_path, monkeypatch):
    monkeypatch.setenv("SMOOTHAREA_CACHE_DIR", str(tmp_path / "compiled"))
    compiled_cache.clear_memory_cache()
    compiled_cache.statistics.clear()
    yield tmp_path / "compiled"
    compiled_cache.clear_memory_cache()


def _small(first: int = 12):
    study = nc_study(first=first)
    graph = graph_from_edges(study.area_ids, queen_edges(study.areas))
    return study, graph


@pytest.mark.slow
def test_same_structure_reuses_the_compiled_model_and_a_changed_graph_does_not(cache_folder,
                                                                              monkeypatch):
    study, graph = _small()
    recipe = load_recipe("exchangeable")
    first = sample_posterior(build_model(study, graph, recipe), TINY, recipe, progress=False,
                             max_draws=TINY.draws)
    assert first.attrs["compiled_from"] == "compiled"
    assert len(list(cache_folder.glob("*.pkl"))) == 1

    # Same structure, other counts: reused, and it samples the new data exactly as a fresh
    # compilation of the new model does (same seed, same draws).
    tripled = dataclasses.replace(study, observed=study.observed * 3,
                                  expected=study.expected * 3)
    second = sample_posterior(build_model(tripled, graph, recipe), TINY, recipe, progress=False,
                              max_draws=TINY.draws)
    assert second.attrs["compiled_from"] == "memory"
    np.testing.assert_array_equal(second.observed_data["observed"].values, tripled.observed)
    compiled_cache.clear_memory_cache()
    monkeypatch.setenv("SMOOTHAREA_CACHE_DIR", "")  # disk cache off: compile afresh
    fresh = sample_posterior(build_model(tripled, graph, recipe), TINY, recipe, progress=False,
                             max_draws=TINY.draws)
    assert fresh.attrs["compiled_from"] == "compiled"
    np.testing.assert_array_equal(second.posterior["relative_risk"].values,
                                  fresh.posterior["relative_risk"].values)
    assert not np.array_equal(first.posterior["relative_risk"].values,
                              second.posterior["relative_risk"].values)

    # One link fewer: another structure, compiled afresh.
    edges = queen_edges(study.areas)[1:]
    other = graph_from_edges(study.area_ids, edges)
    third = sample_posterior(build_model(study, other, recipe), TINY, recipe, progress=False,
                             max_draws=TINY.draws)
    assert third.attrs["compiled_from"] == "compiled"
    assert compiled_cache.statistics == {"compiled": 3, "memory": 1}


def test_structure_key_follows_graph_recipe_and_covariates_not_counts():
    study, graph = _small()
    bym2, exchangeable = load_recipe("bym2"), load_recipe("exchangeable")
    model = build_model(study, graph, bym2)
    key = model.structure_key
    # New counts keep the key as long as they keep BYM2's parameterisation, which is chosen
    # from the data (model.random_effect_parameterisation; tested in test_models.py).
    recounted = dataclasses.replace(study, observed=study.observed[::-1].copy())
    recounted_model = build_model(recounted, graph, bym2)
    assert recounted_model.parameterisation == model.parameterisation
    assert recounted_model.structure_key == key
    assert build_model(study, graph, exchangeable).structure_key != key
    fewer_links = graph_from_edges(study.area_ids, queen_edges(study.areas)[:-1])
    assert build_model(study, fewer_links, bym2).structure_key != key
    tighter = bym2.with_prior("sigma", "pc_sd", upper=0.5, tail_probability=0.01)
    assert build_model(study, graph, tighter).structure_key != key


_CHILD = textwrap.dedent("""
    import sys, json
    sys.path.insert(0, {tests!r})
    from test_models import nc_study, queen_edges
    from smootharea.graph import graph_from_edges
    from smootharea.job import Sampling
    from smootharea.model import build_model
    from smootharea.recipes import load_recipe
    from smootharea.sampling import sample_posterior
    study = nc_study(first=12)
    graph = graph_from_edges(study.area_ids, queen_edges(study.areas))
    recipe = load_recipe("exchangeable")
    idata = sample_posterior(build_model(study, graph, recipe),
                             Sampling(chains=2, draws=100, warmup=100, seed=5, cores=2),
                             recipe, progress=False, max_draws=100)
    print(json.dumps({{"source": idata.attrs["compiled_from"],
                      "draws": idata.posterior["relative_risk"].values.ravel()[:50].tolist()}}))
""")


@pytest.mark.slow
def test_a_new_process_loads_the_compiled_model_from_the_cache_folder(cache_folder):
    import json

    script = _CHILD.format(tests=str(ROOT / "tests"))
    env = {**os.environ, "SMOOTHAREA_CACHE_DIR": str(cache_folder)}

    def child() -> dict:
        done = subprocess.run([sys.executable, "-c", script], env=env, cwd=ROOT,
                              capture_output=True, text=True, timeout=300, check=True)
        return json.loads(done.stdout.strip().splitlines()[-1])

    first, second = child(), child()
    assert first["source"] == "compiled" and second["source"] == "disk"
    # Loaded machine code is the same code: same seed, same draws.
    assert first["draws"] == second["draws"]


def _call_logp(compiled, point: np.ndarray):
    """(return code, log density, gradient) from a compiled model's C log-density callback."""
    import ctypes

    double_pointer = ctypes.POINTER(ctypes.c_double)
    callback = ctypes.CFUNCTYPE(ctypes.c_int64, ctypes.c_uint64, double_pointer, double_pointer,
                                double_pointer, ctypes.c_void_p)(
        compiled.compiled_logp_func.address)
    point = np.ascontiguousarray(point, dtype=float)
    gradient, value = np.zeros(point.size), np.zeros(1)
    code = callback(point.size, point.ctypes.data_as(double_pointer),
                    gradient.ctypes.data_as(double_pointer), value.ctypes.data_as(double_pointer),
                    compiled.user_data.ctypes.data)
    return code, value[0], gradient


def _call_expand(compiled, point: np.ndarray):
    """(return code, expanded values) from a compiled model's C expansion callback."""
    import ctypes

    double_pointer = ctypes.POINTER(ctypes.c_double)
    callback = ctypes.CFUNCTYPE(ctypes.c_int64, ctypes.c_uint64, ctypes.c_uint64, double_pointer,
                                double_pointer, ctypes.c_void_p)(
        compiled.compiled_expand_func.address)
    point = np.ascontiguousarray(point, dtype=float)
    values = np.zeros(compiled.n_expanded)
    code = callback(point.size, values.size, point.ctypes.data_as(double_pointer),
                    values.ctypes.data_as(double_pointer), compiled.user_data.ctypes.data)
    return code, values


@pytest.mark.slow
def test_copying_callbacks_return_what_nutpies_own_return(cache_folder, monkeypatch):
    """smootharea compiles nutpie's two C callbacks with an element-by-element copy
    (compiled_cache._copying_wrappers); values, gradients and return codes must be those of
    nutpie's own callbacks (the reference, nutpie 0.16 compile_pymc_model) for the same model."""
    import nutpie

    monkeypatch.setenv("SMOOTHAREA_CACHE_DIR", "")
    study, graph = _small()
    model = build_model(study, graph, load_recipe("exchangeable"))
    ours, source = compiled_cache.compile_model(model)
    reference = nutpie.compile_pymc_model(model)
    assert source == "compiled"
    assert ours.compiled_logp_func.address != reference.compiled_logp_func.address

    rng = np.random.default_rng(3)
    points = [rng.normal(0.0, 0.5, ours.n_dim) for _ in range(3)]
    points.append(np.full(ours.n_dim, 800.0))  # exp overflows: not finite
    codes = []
    for point in points:
        code, value, gradient = _call_logp(ours, point)
        expected_code, expected_value, expected_gradient = _call_logp(reference, point)
        codes.append(code)
        assert code == expected_code
        if code == 0:
            assert value == expected_value
            np.testing.assert_array_equal(gradient, expected_gradient)
        expand_code, values = _call_expand(ours, point)
        expected_expand_code, expected_values = _call_expand(reference, point)
        assert expand_code == expected_expand_code == 0
        np.testing.assert_array_equal(values, expected_values)
    assert codes[:3] == [0, 0, 0] and codes[3] != 0
    assert _call_logp(ours, points[0][:-1])[0] == -1  # wrong size


def test_straight_line_extraction_reads_the_arrays_nutpies_extraction_reads():
    """compiled_cache._straight_line_extraction against nutpie's own make_extraction_fn (the
    reference, nutpie 0.16) on shared arrays of 0, 1 and 2 dimensions and two dtypes, read
    through nutpie's user-data record after the data were swapped for arrays of other sizes."""
    import numba
    from nutpie.compile_pymc import (address_as_void_pointer, make_extraction_fn,
                                     make_user_data, update_user_data)

    def inner(x, scalar, counts, table):
        return x.sum() * scalar[()] + counts.sum() + table[-1, 0] * table.shape[0] + table.shape[1]

    arrays = {"scalar": np.array(2.5), "counts": np.arange(5, dtype=np.int32),
              "table": np.arange(12.0).reshape(4, 3)}
    names = list(arrays)

    class Shared:  # what nutpie's make_user_data reads of a pytensor shared variable
        def __init__(self, value):
            self.ndim = value.ndim

    user_data = make_user_data({name: Shared(value) for name, value in arrays.items()}, arrays)
    inner_jit = numba.njit(inner)
    ours = compiled_cache._straight_line_extraction(inner_jit, arrays, names, user_data.dtype)
    reference = make_extraction_fn(inner_jit, arrays, names, user_data.dtype)

    @numba.njit
    def call(extract, x, address):
        return extract(x, address_as_void_pointer(address))

    x = np.array([1.0, 2.0])
    swapped = {"scalar": np.array(-1.0), "counts": np.arange(7, dtype=np.int32) * 3,
               "table": np.arange(10.0).reshape(2, 5) + 0.5}
    for data in (arrays, swapped):
        record = update_user_data(user_data, data)
        address = record.ctypes.data
        expected = inner(x, *(data[name] for name in names))
        assert call(ours, x, address) == call(reference, x, address) == expected


def _relative_imports(source: Path) -> set[str]:
    """smootharea modules a file imports (``from .x import``, at any depth), except under
    ``if TYPE_CHECKING``."""
    import ast

    tree = ast.parse(source.read_text())
    typing_only = {id(inner) for node in ast.walk(tree)
                   if isinstance(node, ast.If) and "TYPE_CHECKING" in ast.unparse(node.test)
                   for statement in node.body for inner in ast.walk(statement)}
    return {f"{node.module.split('.')[0]}.py" for node in ast.walk(tree)
            if isinstance(node, ast.ImportFrom) and node.level == 1 and node.module
            and id(node) not in typing_only}


def test_cache_key_covers_every_module_the_model_is_built_from():
    """A change to any module model.py draws on (for instance the BYM2 solver's tolerance in
    bym2_combined.py) must compile afresh rather than load stale machine code."""
    package = ROOT / "smootharea"
    reached, pending = set(), ["model.py"]
    while pending:
        module = pending.pop()
        if module not in reached:
            reached.add(module)
            pending.extend(_relative_imports(package / module))
    assert "bym2_combined.py" in reached
    assert reached <= set(compiled_cache.MODEL_SOURCES), reached - set(compiled_cache.MODEL_SOURCES)
