"""Reuse nutpie's compiled model across fits of the same structure.

Compiling a model with nutpie's numba backend takes 10-30 s; sampling a small study
takes a few. The compiled code depends only on the model's *structure* (neighbour
graph, recipe, covariate names, number of areas: ``model.structure_key``, set by
:func:`smootharea.model.build_model`); the data enter as ``pm.Data`` shared arrays that
nutpie swaps without recompiling (``CompiledPyMCModel.with_data``). So:

- in one process, a dictionary keyed by structure (plus the environment) holds the
  compiled model;
- across processes (nightly runs), the machine code of nutpie's two C callbacks is
  written to a cache folder with numba's own cache serialisation
  (``CompileResult._reduce``/``_rebuild``, the mechanism behind ``@njit(cache=True)``,
  which refuses these callbacks only because they are closures). Loading needs no
  compilation, only the cheap PyMC initial-point function is rebuilt.

Hand-written because neither nutpie nor numba caches closures across processes.
A first compilation builds nutpie's two C callbacks from copies that skip a slow-to-compile
error path and loop (:func:`_copying_wrappers`).
The cache folder is ``$SMOOTHAREA_CACHE_DIR`` (an empty value turns the disk cache
off), else ``$XDG_CACHE_HOME/smootharea/compiled``, else ``~/.cache/smootharea/compiled``.
Entries are keyed by structure plus package versions, CPU and the source of the
model-building code (:data:`MODEL_SOURCES`), so any change there compiles afresh. An
unreadable entry is ignored and rewritten.
"""
from __future__ import annotations

import contextlib
import dataclasses
import hashlib
import os
import pickle
import platform
import sys
import tempfile
import threading
from collections import Counter
from pathlib import Path
from typing import Any, Iterator

import numpy as np
import pymc as pm

CACHE_FORMAT = "smootharea-compiled-v1"
_MAX_DISK_ENTRIES = 64
_MEMORY_ENTRIES = 8

# Where each compiled model came from in this process: "memory", "disk" or "compiled".
statistics: Counter[str] = Counter()
_memory: dict[str, Any] = {}
_lock = threading.Lock()
_compile_lock = threading.Lock()  # the capture below patches numba process-wide


def cache_dir() -> Path | None:
    """Folder of the on-disk cache, or None when turned off (SMOOTHAREA_CACHE_DIR="")."""
    configured = os.environ.get("SMOOTHAREA_CACHE_DIR")
    if configured is not None:
        return Path(configured).expanduser() if configured.strip() else None
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "smootharea" / "compiled"


def compile_model(model: pm.Model, jitter_rvs: set | None = None,
                  var_names: list[str] | None = None) -> tuple[Any, str]:
    """A nutpie compiled model for ``model``, and where it came from.

    Returns ``(compiled, source)`` with ``source`` one of ``"memory"``, ``"disk"``
    (reused, data swapped in) or ``"compiled"``. Models without ``structure_key``
    are always compiled.
    """
    import nutpie

    options = {"jitter_rvs": jitter_rvs, "var_names": var_names}
    structure = getattr(model, "structure_key", None)
    if structure is None:
        statistics["compiled"] += 1
        return nutpie.compile_pymc_model(model, **options), "compiled"
    key = _full_key(structure, model, jitter_rvs, var_names)
    with _lock:
        template = _memory.get(key)
    if template is not None:
        statistics["memory"] += 1
        return _with_model_data(template, model), "memory"
    compiled = _load_from_disk(key, model, options)
    source = "disk"
    if compiled is None:
        with _compile_lock, _capture_callback_results() as captured, _copying_wrappers():
            compiled = nutpie.compile_pymc_model(model, **options)
        _save_to_disk(key, compiled, captured)
        source = "compiled"
    with _lock:
        _memory[key] = compiled
        while len(_memory) > _MEMORY_ENTRIES:
            _memory.pop(next(iter(_memory)))
    statistics[source] += 1
    return compiled, source


def clear_memory_cache() -> None:
    """Forget compiled models held in this process (the disk cache stays)."""
    with _lock:
        _memory.clear()


# ----------------------------------------------------------------------------- keys

def environment_fingerprint() -> str:
    """Package versions, Python, CPU and the source of the model code, hashed."""
    import llvmlite
    import numba
    import nutpie
    import pytensor
    from llvmlite import binding

    here = Path(__file__).resolve().parent
    digest = hashlib.sha256(CACHE_FORMAT.encode())
    for part in (sys.version, platform.machine(), binding.get_host_cpu_name(),
                 binding.get_host_cpu_features().flatten(), nutpie.__version__, pm.__version__,
                 pytensor.__version__, numba.__version__, llvmlite.__version__, np.__version__):
        digest.update(str(part).encode() + b"\0")
    for module in MODEL_SOURCES:
        digest.update((here / module).read_bytes())
    return digest.hexdigest()


# Modules whose code or constants shape the compiled log density (model.py and what it
# imports from smootharea), so a change to any of them compiles afresh.
MODEL_SOURCES = ("model.py", "bym2_combined.py", "covariates.py", "frequentist.py", "graph.py",
                 "problems.py", "quick.py", "recipes.py", "study.py", "compiled_cache.py")
_fingerprint: str | None = None


def _full_key(structure: str, model: pm.Model, jitter_rvs, var_names) -> str:
    global _fingerprint
    if _fingerprint is None:
        _fingerprint = environment_fingerprint()
    jittered = sorted(rv.name for rv in (jitter_rvs if jitter_rvs is not None else model.free_RVs))
    digest = hashlib.sha256(f"{_fingerprint}|{structure}|{jittered}|{var_names}".encode())
    return digest.hexdigest()


# ------------------------------------------------------------------- data swapping

def _with_model_data(template: Any, model: pm.Model) -> Any:
    """``template`` (compiled for another model of the same structure) with this model's
    shared data and coordinates."""
    from nutpie.compile_pymc import _prepare_dims_and_coords

    updates = {name: _shared_value(model, name) for name in template.shared_data}
    compiled = template.with_data(**updates)
    dims, coords = _prepare_dims_and_coords(model, compiled.shape_info)
    return dataclasses.replace(compiled, dims=dims, _coords=coords)


def _shared_value(model: pm.Model, name: str) -> np.ndarray:
    return np.asarray(model[name].get_value())


# ---------------------------------------------------------------------- disk cache

@contextlib.contextmanager
def _capture_callback_results() -> Iterator[list]:
    """Record numba's CompileResult of each C callback compiled inside the block."""
    from numba.core import ccallback

    captured: list = []
    original = ccallback.CFunc._compile_uncached

    def recording(self):
        result = original(self)
        captured.append((self, result))
        return result

    ccallback.CFunc._compile_uncached = recording
    try:
        yield captured
    finally:
        ccallback.CFunc._compile_uncached = original


@contextlib.contextmanager
def _copying_wrappers() -> Iterator[None]:
    """Inside the block nutpie builds its two C callbacks with :func:`_logp_wrapper` and
    :func:`_expand_wrapper`: nutpie's own (0.16) write the result with ``out[...] = values``,
    for which numba compiles the error message of a mismatched slice assignment (string
    formatting) anew in every process, 1.7-3.1 s of an 11-12 s compile on the 3,024-cell grid;
    and they read the shared arrays in a ``literal_unroll`` loop
    (:func:`_straight_line_extraction`)."""
    from nutpie import compile_pymc

    names = ("_make_c_logp_func", "_make_c_expand_func")
    originals = [getattr(compile_pymc, name, None) for name in names]
    if None in originals or not hasattr(compile_pymc, "address_as_void_pointer"):
        yield  # another nutpie layout: leave its callbacks alone
        return
    compile_pymc._make_c_logp_func = _logp_wrapper
    compile_pymc._make_c_expand_func = _expand_wrapper
    try:
        yield
    finally:
        for name, original in zip(names, originals):
            setattr(compile_pymc, name, original)


def _logp_wrapper(n_dim, logp_fn, user_data, shared_logp, shared_data):
    """nutpie's log-density callback (same signature and return codes: -1 wrong size,
    3 gradient not finite, 4 log density not finite, 1 error), copying element by element."""
    import numba

    extract = _straight_line_extraction(logp_fn, shared_data, shared_logp, user_data.dtype)
    double = numba.types.CPointer(numba.types.double)
    signature = numba.types.int64(numba.types.uint64, double, double, double, numba.types.voidptr)

    def logp_numba(dim, x_, out_, logp_, user_data_):
        if dim != n_dim:
            return -1
        try:
            x = numba.carray(x_, (n_dim,))
            out = numba.carray(out_, (n_dim,))
            logp = numba.carray(logp_, ())
            logp_val, grad = extract(x, user_data_)
            logp[()] = logp_val
            finite = True
            for i in range(n_dim):
                out[i] = grad[i]
                finite = finite and np.isfinite(grad[i])
            if not finite:
                return 3
            if not np.isfinite(logp_val):
                return 4
        except Exception:  # noqa: BLE001 - reported to the sampler as a code
            return 1
        return 0

    return logp_numba, signature


def _expand_wrapper(n_dim, n_expanded, expand_fn, user_data, shared_vars, shared_data):
    """nutpie's expansion callback (return codes -1 wrong size, -2 error), copying element by
    element."""
    import numba

    extract = _straight_line_extraction(expand_fn, shared_data, shared_vars, user_data.dtype)
    double = numba.types.CPointer(numba.types.double)
    signature = numba.types.int64(numba.types.uint64, numba.types.uint64, double, double,
                                  numba.types.voidptr)

    def expand_numba(dim, expanded, x_, out_, user_data_):
        if dim != n_dim or expanded != n_expanded:
            return -1
        try:
            x = numba.carray(x_, (n_dim,))
            out = numba.carray(out_, (n_expanded,))
            (values,) = extract(x, user_data_)
            for i in range(n_expanded):
                out[i] = values[i]
        except Exception:  # noqa: BLE001 - reported to the sampler as a code
            return -2
        return 0

    return expand_numba, signature


def _straight_line_extraction(inner, shared_data: dict, names: list[str], record_dtype):
    """``extract(x, user_data)`` = ``inner(x, *shared arrays)``, reading each array's address,
    size and shape from nutpie's user-data record as nutpie's own ``make_extraction_fn`` does,
    but written out one statement per array. nutpie loops over the arrays with numba's
    ``literal_unroll``, whose compiler pass is slow: on the 3,024-cell grid the log-density
    callback compiled in 3.9-5.0 s this way against 5.7-7.1 s (three alternating pairs).
    Generated source, because numba reads a record field only by a literal name."""
    import numba
    from nutpie.compile_pymc import address_as_void_pointer

    namespace = {"numba": numba, "inner": inner, "pointer": address_as_void_pointer,
                 "record_dtype": record_dtype}
    lines = ["def extract(x, user_data_):",
             "    shared = numba.carray(user_data_, (), record_dtype)['shared']"]
    for index, name in enumerate(names):
        namespace[f"dtype{index}"] = np.dtype(shared_data[name].dtype)
        shape = "".join(f"int(shared['shape'][{name!r}][{axis}]), "
                        for axis in range(shared_data[name].ndim))
        lines.append(f"    array{index} = numba.carray(pointer(shared['data'][{name!r}][()]), "
                     f"int(shared['size'][{name!r}][()]), dtype{index}).reshape(({shape}))")
    arguments = "".join(f", array{index}" for index in range(len(names)))
    lines.append(f"    return inner(x{arguments})")
    source = "\n".join(lines)
    exec(compile(source, f"<extraction of {len(names)} shared arrays>", "exec"), namespace)
    return numba.njit(inline="always")(namespace["extract"])


def _entry_path(key: str) -> Path | None:
    folder = cache_dir()
    return None if folder is None else folder / f"{key}.pkl"


def _save_to_disk(key: str, compiled: Any, captured: list) -> None:
    path = _entry_path(key)
    if path is None:
        return
    from numba.core import serialize

    results = {id(cfunc): result for cfunc, result in captured}
    try:
        logp = results[id(compiled.compiled_logp_func)]
        expand = results[id(compiled.compiled_expand_func)]
        payload = {
            "format": CACHE_FORMAT,
            "logp": serialize.dumps(logp._reduce()),
            "expand": serialize.dumps(expand._reduce()),
            "n_dim": compiled.n_dim,
            "n_expanded": compiled.n_expanded,
            "shape_info": compiled.shape_info,
            "shared_names": list(compiled.shared_data),
            "user_data_dtype": compiled.user_data.dtype,
        }
        path.parent.mkdir(parents=True, exist_ok=True)
        handle, temporary = tempfile.mkstemp(dir=path.parent, prefix=".partial-", suffix=".pkl")
        with os.fdopen(handle, "wb") as stream:
            pickle.dump(payload, stream, protocol=pickle.HIGHEST_PROTOCOL)
        os.replace(temporary, path)
        _prune(path.parent)
    except Exception:  # noqa: BLE001 - a cache that cannot be written only costs time
        return


def _prune(folder: Path) -> None:
    entries = sorted(folder.glob("*.pkl"), key=lambda p: p.stat().st_mtime, reverse=True)
    for stale in entries[_MAX_DISK_ENTRIES:]:
        stale.unlink(missing_ok=True)


def _load_from_disk(key: str, model: pm.Model, options: dict) -> Any | None:
    path = _entry_path(key)
    if path is None or not path.is_file():
        return None
    try:
        with path.open("rb") as stream:
            payload = pickle.load(stream)
        if payload.get("format") != CACHE_FORMAT:
            return None
        compiled = _rebuild(payload, model, options)
        path.touch()
        return compiled
    except Exception:  # noqa: BLE001 - unreadable or stale entry: compile afresh
        return None


class _LoadedCallback:
    """Stands in for numba's CFunc: nutpie only reads ``address``."""

    def __init__(self, result: Any):
        self._result = result  # keeps the loaded code alive
        self.address = result.library.get_pointer_to_function(
            result.fndesc.llvm_cfunc_wrapper_name)


def _load_callback(blob: bytes) -> _LoadedCallback:
    from numba.core import compiler
    from numba.core.registry import cpu_target

    reduced = pickle.loads(blob)
    return _LoadedCallback(compiler.CompileResult._rebuild(cpu_target.target_context, *reduced))


def _rebuild(payload: dict, model: pm.Model, options: dict) -> Any:
    """A CompiledPyMCModel from cached machine code and the current model's data."""
    from nutpie.compile_pymc import (CompiledPyMCModel, _prepare_dims_and_coords,
                                     _rv_dict_to_flat_array_wrapper, update_user_data)
    from pymc.initial_point import make_initial_point_fn

    names, _, shapes = payload["shape_info"]
    n_free = len(model.free_RVs)
    value_names = [model.rvs_to_values[rv].name for rv in model.free_RVs]
    if list(names[:n_free]) != value_names:
        raise ValueError("cached model does not match the free variables")
    jitter = options["jitter_rvs"]
    point = make_initial_point_fn(model=model, default_strategy="support_point",
                                  jitter_rvs=set(model.free_RVs) if jitter is None else jitter,
                                  return_transformed=True)
    initial_point = _rv_dict_to_flat_array_wrapper(_locked(point), names=value_names,
                                                   shapes=[tuple(s) for s in shapes[:n_free]])
    shared = {}
    for name in payload["shared_names"]:
        value = np.array(_shared_value(model, name), order="C", copy=True)
        value.flags.writeable = False
        shared[name] = value
    user_data = update_user_data(np.zeros((), dtype=payload["user_data_dtype"]), shared)
    dims, coords = _prepare_dims_and_coords(model, payload["shape_info"])
    return CompiledPyMCModel(
        _n_dim=payload["n_dim"], dims=dims, _coords=coords,
        _shapes={name: tuple(shape) for name, _, shape in zip(*payload["shape_info"])},
        compiled_logp_func=_load_callback(payload["logp"]),
        compiled_expand_func=_load_callback(payload["expand"]),
        initial_point_func=initial_point, shared_data=shared, user_data=user_data,
        n_expanded=payload["n_expanded"], shape_info=payload["shape_info"],
        logp_func=None, expand_func=None)


def _locked(function):
    lock = threading.Lock()

    def call(*args, **kwargs):
        with lock:
            return function(*args, **kwargs)
    return call
