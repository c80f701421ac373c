"""Draw from the posterior with nutpie (PyMC's sampler only if nutpie is missing).

Adds the pointwise log-likelihood group ``observed`` (dims area) that
``arviz.loo``/``arviz.waic`` need, computed exactly in numpy from the draws of
``relative_risk``: log Poisson(O_i | E_i theta_i) (scipy.stats.poisson).
The same seed gives the same draws.

Draw count. ``[sampling] draws`` is the minimum per chain. When the convergence verdict
(:func:`smootharea.diagnostics.assess_convergence`) fails after those draws, the *same*
chains, past warm-up with their adapted step size and mass matrix, keep drawing and the
verdict is checked again every half of ``draws`` more, up to a cap (``max_draws``,
default 8 x ``draws``, :data:`MAX_DRAWS_FACTOR`). Sampling stops at the first check that
passes, at a check that finds divergent transitions (more draws cannot remove those), or
at the cap. This is a sequential stopping rule on effective sample size, as in Vats,
Flegal & Jones (2019, Biometrika 106) and Gong & Flegal (2016, J. Comput. Graph.
Statist. 25): it is sound because the chains are never restarted or selected and every
kept draw belongs to one continuous post-warm-up run; checks are spaced (not continuous)
to limit the optimism of stopping on the statistic being reported. The kept draws are
exactly those the last check judged, so that check's verdict is the run's verdict (kept in
``idata.attrs``, see :func:`run_verdict`); what was done is recorded there too (see
:func:`sampling_record`). Chains run in batches of as many as there are cores, one
batch at a time, each batch paused at every checkpoint until the others reach it and
while the draws are judged (:func:`_start_batches`, :func:`_advance`).
"""
from __future__ import annotations

import json
import os
import shutil
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Sequence

import arviz as az
import numpy as np
import pymc as pm
import xarray as xr
from scipy.stats import poisson

from .diagnostics import DEFAULT_VARIABLES, Verdict, assess_convergence, combine_verdicts
from .job import Sampling
from .model import LATENT_INTERNALS
from .recipes import Recipe

MAX_DRAWS_FACTOR = 8
_POLL_SECONDS = 0.25
# Attribute holding the verdict of the check that stopped sampling (JSON), see run_verdict.
VERDICT_ATTR = "convergence_verdict"


@dataclass(frozen=True)
class StopRule:
    """When to stop drawing: the verdict's thresholds, checked at spaced draw counts."""

    minimum: int
    cap: int
    step: int

    def checkpoints(self) -> list[int]:
        points = list(range(self.minimum, self.cap, self.step))
        return points + [self.cap]


def sample_posterior(model: pm.Model, sampling: Sampling, recipe: Recipe,
                     progress: bool | None = None, *, max_draws: int | None = None,
                     keep_latent: bool = False) -> az.InferenceData:
    """Sample ``model`` with nutpie: ``sampling.chains`` chains, ``sampling.warmup`` tuning
    steps, then at least ``sampling.draws`` draws, extended up to ``max_draws`` (default
    ``sampling.max_draws`` if the job sets it, else 8 x draws) until the convergence
    verdict passes. ``max_draws <= draws`` gives a fixed draw count. Target acceptance
    and mass matrix from the recipe. The compiled model is reused across calls of the
    same structure (:mod:`smootharea.compiled_cache`).

    ``progress`` None shows progress only when stderr is a terminal. The trace keeps the
    published variables (:func:`stored_variables`); ``keep_latent`` keeps the per-area
    internals (``u``, ``v``, ...) too, at several times the memory.
    """
    show_progress = sys.stderr.isatty() if progress is None else bool(progress)
    cap = draw_cap(sampling, max_draws)
    try:
        import nutpie
    except ImportError:  # pragma: no cover - nutpie is a declared dependency
        cores = sampling.cores or os.cpu_count() or 1
        idata = _sample_with_pymc(model, sampling, recipe, cores, show_progress)
        record = {"sampler": f"pymc {pm.__version__} NUTS", "draws_cap": sampling.draws,
                  "stop_reason": "fixed draw count (PyMC fallback)", "compiled_from": "pymc"}
    else:
        from .compiled_cache import compile_model
        from .model import UNJITTERED

        started = time.perf_counter()
        jittered = {rv for rv in model.free_RVs if rv.name not in UNJITTERED}
        compiled, source = compile_model(model, jitter_rvs=jittered,
                                         var_names=None if keep_latent else stored_variables(model))
        compile_seconds = time.perf_counter() - started
        started = time.perf_counter()
        options = dict(tune=sampling.warmup, chains=sampling.chains, seed=sampling.seed,
                       target_accept=recipe.sampler.target_accept,
                       low_rank=recipe.sampler.low_rank_mass_matrix, show_progress=show_progress)
        unread = () if keep_latent else LATENT_INTERNALS
        if cap > sampling.draws and sampling.chains >= 2:  # one chain can never pass R-hat
            rule = StopRule(minimum=sampling.draws, cap=cap, step=max(sampling.draws // 2, 50))
            idata, reason, checks, verdict = _sample_until_converged(compiled, rule, options,
                                                                     sampling, model, unread)
        else:
            cores = sampling.cores or os.cpu_count() or 1
            sampler = _start_sampler(compiled, draws=sampling.draws,
                                     cores=min(cores, sampling.chains), **options)
            idata = _collect_batches([sampler], sampling.draws, abort=False, unread=unread)
            reason, checks, verdict = "fixed draw count", 0, None
        record = {"sampler": f"nutpie {nutpie.__version__}", "draws_cap": int(cap),
                  "stop_reason": reason, "checks": int(checks), "compiled_from": source,
                  "compile_seconds": float(compile_seconds),
                  "sampling_seconds": float(time.perf_counter() - started)}
        if verdict is not None:  # the passing check judged exactly the kept draws
            record[VERDICT_ATTR] = json.dumps(verdict.to_dict())
    add_log_likelihood(idata, model)
    kept = int(idata.posterior.sizes["draw"])
    idata.attrs.update({"recipe": recipe.name, "seed": int(sampling.seed),
                        "chains": int(sampling.chains), "draws": kept,
                        "draws_minimum": int(sampling.draws), "warmup": int(sampling.warmup),
                        "parameterisation": getattr(model, "parameterisation", "non-centred"),
                        **record})
    return idata


def run_verdict(idata: az.InferenceData) -> Verdict:
    """The convergence verdict on these draws: the stopping check's, when sampling stopped at
    a passing check (it judged exactly these draws), else computed now."""
    if VERDICT_ATTR in idata.attrs:
        return Verdict.from_dict(json.loads(idata.attrs[VERDICT_ATTR]))
    return assess_convergence(idata)


def stored_variables(model: pm.Model) -> list[str]:
    """Variables nutpie computes for the trace besides the sampler's position: every one
    except the per-area internals of the random effect (:data:`LATENT_INTERNALS`), which
    no output reads. nutpie keeps the position (free parameters such as ``u_free`` and
    ``v``) in any case; :func:`sample_posterior` drops those from the result."""
    names = [variable.name for variable in model.free_RVs + model.deterministics]
    return [name for name in names if name not in LATENT_INTERNALS]


def draw_cap(sampling: Sampling, max_draws: int | None = None) -> int:
    """Most draws per chain: ``max_draws``, else ``sampling.max_draws``, else MAX_DRAWS_FACTOR x draws."""
    cap = max_draws if max_draws is not None else getattr(sampling, "max_draws", None)
    if cap is None:
        cap = MAX_DRAWS_FACTOR * sampling.draws
    return max(int(cap), int(sampling.draws))


def sampling_record(idata: az.InferenceData) -> dict[str, Any]:
    """What the sampler did, for model.json: draws kept per chain, the minimum and cap,
    why it stopped, and whether the compiled model was reused."""
    keys = ("sampler", "chains", "warmup", "draws", "draws_minimum", "draws_cap", "stop_reason",
            "checks", "compiled_from", "compile_seconds", "sampling_seconds", "parameterisation")
    return {key: idata.attrs[key] for key in keys if key in idata.attrs}


def sample_study(study, graph, recipe: Recipe, sampling: Sampling,
                 progress: bool | None = None) -> az.InferenceData:
    """Build the model and sample it, reusing a compiled model of the same structure."""
    from .model import build_model

    return sample_posterior(build_model(study, graph, recipe), sampling, recipe, progress=progress)


# ----------------------------------------------------------------- adaptive length

def _sample_until_converged(compiled, rule: StopRule, options: dict, sampling: Sampling,
                            model: pm.Model, unread: Sequence[str] = ()
                            ) -> tuple[az.InferenceData, str, int, Verdict | None]:
    """Sample in batches until a check passes or the cap; (draws, why it stopped, number of
    checks, the passing check's verdict on the kept draws or None)."""
    batches = _start_batches(compiled, rule.cap, sampling, options)
    judged = [name for name in DEFAULT_VARIABLES if name in model.named_vars]
    per_area = {name for name in judged if "area" in model.named_vars_to_dims.get(name, ())}
    checks, reason, kept, final = 0, "", rule.cap, None
    try:
        for checkpoint in rule.checkpoints():
            if not _advance(batches, checkpoint, rule.cap):
                reason = f"reached the cap of {rule.cap} draws per chain"
                break
            checks += 1
            batches[0].progress.note(f"checking convergence at {checkpoint} draws per chain")
            verdict = _verdict_at(batches, judged, per_area, checkpoint)
            if verdict.converged:
                kept, reason = checkpoint, f"converged at check {checks} ({checkpoint} draws per chain)"
                final = verdict
                break
            if verdict.divergences:
                kept = checkpoint
                reason = (f"stopped at {checkpoint} draws per chain: divergent transitions, "
                          "which more draws cannot remove")
                break
    except BaseException:
        _discard(batches)
        raise
    idata = _collect_batches(batches, kept, abort=kept < rule.cap, unread=unread)
    return idata, reason, checks, final


def _start_batches(compiled, cap: int, sampling: Sampling, options: dict) -> list:
    """The chains in batches of as many as there are cores, each batch one nutpie sampler;
    all but the first start paused (see :func:`_advance`).

    Why batches: with more threads than cores (four chains on two cores, all running so
    that they reach each checkpoint together) sampling took 1.7-2x as long for the same
    draws (measured: 3,024-cell grid 127 s against 64-77 s, North Carolina 5.3 s against
    2.9 s). Batch k > 0 draws its seed from (seed, k), so the draws stay reproducible.
    """
    threads = max(1, min(sampling.cores or os.cpu_count() or 1, sampling.chains))
    sizes = [min(threads, sampling.chains - start) for start in range(0, sampling.chains, threads)]
    peers: list[DrawCounter] = []
    batches = []
    on_disk = trace_bytes(compiled, sampling.chains, options["tune"] + cap) > DISK_TRACE_BYTES
    try:
        for index, size in enumerate(sizes):
            seed = options["seed"] if index == 0 else _batch_seed(options["seed"], index)
            batch = _start_sampler(compiled, draws=cap, cores=size,
                                   **{**options, "chains": size, "seed": seed}, peers=peers,
                                   on_disk=on_disk)
            if index > 0:
                batch.pause()
            batches.append(batch)
    except BaseException:
        _discard(batches)
        raise
    return batches


def _discard(batches: list) -> None:
    """Stop the batches still held and release them (progress line, disk trace)."""
    for batch in batches:
        if batch is not None:
            batch.cancel()
            _release(batch)


def _batch_seed(seed: int, index: int) -> int:
    return int(np.random.SeedSequence([seed, index]).generate_state(1)[0])


def _advance(batches: list, target: int, cap: int) -> bool:
    """Run the batches in turn until each has ``target`` post-warm-up draws per chain; False
    if one ended short of them or ``target`` is the cap. While the caller judges the draws,
    every batch stays paused unless a core is spare.

    Why paused: a batch uses every core, so a check running beside it slowed its chains, and
    each checkpoint waits for the slowest one. On the 3,024-cell grid (three checks, same
    draws) sampling took 20.1-24.4 s paused against 23.8-27.0 s with the first batch running.
    """
    spare_core = (os.cpu_count() or 1) > max(batch.progress.finished.size for batch in batches)
    reached = True
    for batch in batches:
        batch.resume()
        reached = _wait_for_draws(batch, target, cap) and reached
        batch.pause()
    if spare_core:
        batches[0].resume()
    return reached


def _verdict_at(batches: list, judged: list[str], per_area: set[str], checkpoint: int):
    """The convergence verdict on the first ``checkpoint`` draws of every chain.

    The verdict is a conjunction, so the scalar parameters (and the sampler statistics)
    are judged first, then the per-area variables :data:`AREA_BLOCK` areas at a time up to
    the first block that fails. A failing result
    describes only what was judged up to the failure (its ``converged`` and ``divergences``
    are what count); a passing one covers every judged variable and is the run's verdict
    (:func:`smootharea.diagnostics.combine_verdicts`). Why: on the 3,024-cell grid the checks
    that failed cost 4-6 s each (all areas' R-hat and ESS), as much as the sampling between
    them, and the final verdict took 37 s of a 30,000-area run.
    """
    scalars = [name for name in judged if name not in per_area]
    names = [name for name in judged if name in per_area]
    # From memory every variable is read at once: each read copies the batches' whole trace
    # (about 0.4 s per batch at 3,024 areas), while the areas' columns cost little more. A
    # disk trace is read a variable at a time, so there the areas wait for the scalars.
    at_once = batches[0].trace_dir is None
    first_read = judged if at_once else scalars
    draws = _batch_draws(batches, first_read, checkpoint) if first_read else None
    passed = []
    if scalars:
        verdict = assess_convergence(draws, var_names=scalars)
        if not verdict.converged:
            return verdict
        passed.append(verdict)
    if names and not at_once:
        draws = _batch_draws(batches, names, checkpoint)
    for name in names:
        variable = draws.posterior[name]
        dim = variable.dims[2]
        for start in range(0, variable.sizes[dim], AREA_BLOCK):
            block = draws.posterior[[name]].isel({dim: slice(start, start + AREA_BLOCK)})
            verdict = assess_convergence(az.InferenceData(posterior=block,
                                                          sample_stats=draws.sample_stats),
                                         var_names=[name])
            if not verdict.converged:
                return verdict
            passed.append(verdict)
    return combine_verdicts(passed)


# Areas judged together in a convergence check (see _verdict_at).
AREA_BLOCK = 256


def _batch_draws(batches: list, names: list[str], count: int) -> az.InferenceData:
    """The first ``count`` draws of every batch's chains, copied one chain at a time into
    arrays for all chains (so a large map holds the joined draws and one chain's array of
    one variable, not every batch's copy as well)."""
    chains = sum(batch.progress.finished.size for batch in batches)
    groups: dict[str, dict[str, np.ndarray]] = {"posterior": {}, "sample_stats": {}}
    offset = 0
    for batch in batches:
        for group, name, chain, rows in _draws_so_far(batch, names, count):
            if name not in groups[group]:
                groups[group][name] = np.empty((chains, count) + rows.shape[1:], dtype=rows.dtype)
            joined = groups[group][name]
            for start in range(0, count, _ROWS_PER_READ):  # bounded reads from the disk trace
                stop = min(start + _ROWS_PER_READ, count)
                joined[offset + chain, start:stop] = rows[start:stop]
        offset += batch.progress.finished.size
    return az.from_dict(posterior=groups["posterior"], sample_stats=groups["sample_stats"])


def _concat_chains(parts: list[az.InferenceData]) -> az.InferenceData:
    """One InferenceData, loaded into memory, with the chains of ``parts`` (which may still
    be on disk) numbered 0, 1, ... in order. Each variable is copied part by part into one
    array for all chains, one chain at a time, so the peak is the result plus one chain."""
    groups = {}
    for group in parts[0].groups():
        datasets = [getattr(part, group) for part in parts]
        first = datasets[0]
        if "chain" not in first.dims:
            groups[group] = first.load()
            continue
        chains = sum(data.sizes["chain"] for data in datasets)
        variables = {}
        for name, variable in first.data_vars.items():
            if "chain" not in variable.dims:
                variables[name] = variable.load()
                continue
            axis = variable.dims.index("chain")
            shape = list(variable.shape)
            shape[axis] = chains
            joined = np.empty(shape, dtype=variable.dtype)
            offset = 0
            for data in datasets:
                for chain in range(data.sizes["chain"]):
                    where = [slice(None)] * len(shape)
                    where[axis] = offset + chain
                    joined[tuple(where)] = data[name].isel(chain=chain).values
                offset += data.sizes["chain"]
            variables[name] = (variable.dims, joined, variable.attrs)
        coords = {key: value for key, value in first.coords.items() if key != "chain"}
        coords["chain"] = np.arange(chains)
        groups[group] = xr.Dataset(variables, coords=coords, attrs=first.attrs)
    joined = az.InferenceData(**groups)
    joined.attrs.update(parts[0].attrs)
    return joined


class DrawCounter:
    """Draws per chain (warm-up included) as nutpie reports them through its progress
    callback, so waiting for a checkpoint never copies the trace. With ``show`` it also
    writes one progress line to stderr."""

    TEMPLATE = "{% for chain in chains %}{{ chain.finished_draws }};{% endfor %}"

    def __init__(self, chains: int, warmup: int, total: int, show: bool,
                 peers: list["DrawCounter"] | None = None):
        self.finished = np.zeros(chains, dtype=np.int64)
        self.warmup, self.total, self.show = warmup, total, show
        self._shown = -1.0
        self._closed = False
        # Counters of the other batches of the same run: the progress line covers them all.
        self.peers = peers if peers is not None else []
        self.peers.append(self)

    def __call__(self, text: str) -> None:
        try:
            counts = [int(part) for part in text.split(";") if part.strip()]
        except ValueError:
            counts = []
        if len(counts) == self.finished.size:
            self.finished = np.asarray(counts, dtype=np.int64)
        if self.show and time.monotonic() - self._shown > 1.0:
            self._shown = time.monotonic()
            self.note(self._describe())

    def post_warmup(self) -> np.ndarray:
        return np.maximum(self.finished - self.warmup, 0)

    def note(self, message: str) -> None:
        if self.show:
            sys.stderr.write(f"\r  sampling: {message:<70}")
            sys.stderr.flush()

    def close(self) -> None:
        if self.show and not any(peer._closed for peer in self.peers):
            sys.stderr.write("\n")
        self._closed = True

    def _describe(self) -> str:
        finished = np.concatenate([peer.finished for peer in self.peers])
        slowest = int(finished.min())
        if slowest < self.warmup:
            return f"warm-up {slowest}/{self.warmup} per chain"
        return f"{int(max(slowest - self.warmup, 0))} draws per chain (at most {self.total})"


def _start_sampler(compiled, *, draws: int, tune: int, chains: int, cores: int, seed: int,
                   target_accept: float, low_rank: bool, show_progress: bool,
                   peers: list[DrawCounter] | None = None, on_disk: bool | None = None):
    """Start nutpie in the background with a :class:`DrawCounter` as its progress callback.

    Uses nutpie internals (pinned in pyproject.toml): its public ``sample`` offers a
    progress callback only inside notebooks, and the other way to learn how far the chains
    are, copying the whole trace, cost more than the sampling on large maps.

    The trace goes to a zarr store in a temporary folder on disk when it would take more
    than :data:`DISK_TRACE_BYTES` in memory (see :func:`trace_bytes`), else stays in memory;
    ``on_disk`` decides instead when given (for all batches of one run together).
    """
    from nutpie import _lib, zarr_store
    from nutpie.sample import _BackgroundSampler

    settings = (_lib.PyNutsSettings.LowRank if low_rank else _lib.PyNutsSettings.Diag)(seed)
    settings.num_tune, settings.num_draws, settings.num_chains = tune, draws, chains
    settings.target_accept = target_accept
    counter = DrawCounter(chains, tune, draws, show_progress, peers)
    if on_disk is None:
        on_disk = trace_bytes(compiled, chains, tune + draws) > DISK_TRACE_BYTES

    class CountingSampler(_BackgroundSampler):
        def __init__(self):  # the parent's __init__ would choose its own progress display
            self._settings, self._compiled_model = settings, compiled
            self._save_warmup, self._return_raw_trace, self._html = False, False, None
            self.trace_dir = _new_trace_dir() if on_disk else None
            if self.trace_dir is None:
                self._store = _lib.PyStorage.arrow()
            else:
                self._zarr_store = zarr_store.LocalStore(str(self.trace_dir))
                self._store = _lib.PyStorage.zarr(self._zarr_store)
            self.progress = counter
            callback = _lib.ProgressType.template_callback(250, DrawCounter.TEMPLATE, cores, counter)
            self._sampler = compiled._make_sampler(settings, np.zeros(compiled.n_dim), cores,
                                                   callback, self._store)

    return CountingSampler()


# Above this estimated size (at the draw cap; memory grows only with the draws actually
# taken) the trace is written to disk (zarr) instead of kept in memory. Measured on the
# 3,024-cell benchmark grid: sampling 1.3-1.4x slower on disk (113-123 s against 85 s for
# the same draws: zarr writes warm-up draws too and shares the cores). 2 GiB keeps maps of a
# few thousand areas in memory with the default cap (1.2 GB at 3,024 areas) and sends
# 30,000-area maps to disk (12 GB).
DISK_TRACE_BYTES = 2 * 2**30
_TRACE_PREFIX = "smootharea-trace-"


def _new_trace_dir() -> Path:
    """A fresh temporary folder named after this process; folders left by processes that
    no longer exist (a run killed with SIGKILL cannot clean up) are removed first."""
    remove_orphaned_traces(Path(tempfile.gettempdir()))
    return Path(tempfile.mkdtemp(prefix=f"{_TRACE_PREFIX}{os.getpid()}-"))


def remove_orphaned_traces(folder: Path) -> list[Path]:
    """Remove ``smootharea-trace-<pid>-*`` folders in ``folder`` whose process has ended."""
    removed = []
    for path in folder.glob(f"{_TRACE_PREFIX}*-*"):
        pid = path.name[len(_TRACE_PREFIX):].split("-", 1)[0]
        if pid.isdigit() and not _process_alive(int(pid)):
            shutil.rmtree(path, ignore_errors=True)
            removed.append(path)
    return removed


def _process_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # another user's process
        return True
    return True


def trace_bytes(compiled, chains: int, rows: int) -> int:
    """Memory nutpie's in-memory trace would take: every stored variable plus, per draw,
    the position and gradient (nutpie 0.16 keeps both whatever its store_* settings say),
    8 bytes each, warm-up included."""
    stored = sum(int(np.prod(shape)) for shape in (compiled.shapes or {}).values())
    return 8 * chains * rows * (stored + 2 * compiled.n_dim)


def _collect_batches(batches: list, kept: int, abort: bool,
                     unread: Sequence[str] = ()) -> az.InferenceData:
    """The first ``kept`` draws per chain of every batch, joined along the chain axis and
    loaded into memory, without the posterior variables named in ``unread``; disk traces
    are removed afterwards."""
    finished = []
    try:
        parts = []
        for index, batch in enumerate(batches):
            idata = batch.abort() if abort else batch.wait()
            finished.append(batch)
            batches[index] = None
            parts.append(_first_draws(_without_warmup_and_internals(idata, unread), kept))
        return _concat_chains(parts)
    finally:
        for batch in finished:
            _release(batch)
        _discard(batches)


def _release(sampler) -> None:
    """End the progress line and remove the disk trace, if any."""
    sampler.progress.close()
    if sampler.trace_dir is not None:
        shutil.rmtree(sampler.trace_dir, ignore_errors=True)


# Sampler statistics nutpie writes per draw that no output reads (each as long as the
# parameter vector); kept out of the result.
_UNREAD_STATS = ("unconstrained_draw", "gradient", "mass_matrix_inv", "divergence_start",
                 "divergence_start_gradient", "divergence_end", "divergence_momentum")


def _without_warmup_and_internals(idata: az.InferenceData,
                                  unread: Sequence[str] = ()) -> az.InferenceData:
    groups = {group: getattr(idata, group) for group in idata.groups()
              if not group.startswith("warmup")}
    if "posterior" in groups:
        posterior = groups["posterior"]
        groups["posterior"] = posterior.drop_vars([n for n in unread if n in posterior])
    if "sample_stats" in groups:
        stats = groups["sample_stats"]
        groups["sample_stats"] = stats.drop_vars([n for n in _UNREAD_STATS if n in stats])
    trimmed = az.InferenceData(**groups)
    trimmed.attrs.update(_storable_attrs(idata.attrs))
    return trimmed


def _storable_attrs(attrs: dict[str, Any]) -> dict[str, Any]:
    """Attributes netCDF can hold: nutpie's disk trace adds its settings as a dict, which
    ``posterior.nc`` could not store; dictionaries become JSON text."""
    return {key: json.dumps(value, default=str) if isinstance(value, dict) else value
            for key, value in attrs.items()}


def _wait_for_draws(sampler, target: int, cap: int) -> bool:
    """Block until every chain has ``target`` post-warm-up draws; False if sampling ended
    short of them or ``target`` is the cap."""
    while sampler.progress.post_warmup().min() < target:
        if _finished(sampler):  # the callback may not have reported the last draws
            return _recorded_draws(sampler) >= target and target < cap
        time.sleep(_POLL_SECONDS)
    return target < cap


def _finished(sampler) -> bool:
    try:
        return bool(sampler.is_finished)
    except TimeoutError:  # nutpie 0.16 raises instead of answering False while running
        return False


def _tuning_rows(stats_batch) -> int:
    return int(np.asarray(_column(stats_batch, "tuning"), dtype=bool).sum())


def _column(batch, name: str) -> np.ndarray:
    import pyarrow

    column = pyarrow.array(batch.column(name))
    if hasattr(column, "flatten"):
        rows = len(column)
        flat = column.flatten().to_numpy(zero_copy_only=False)
        return flat.reshape(rows, -1) if rows else flat.reshape(0, 0)
    return column.to_numpy(zero_copy_only=False)


def _recorded_draws(sampler) -> int:
    """Post-warm-up draws present in the trace for every chain (after a flush when on disk)."""
    if sampler.trace_dir is None:
        _, stats = sampler._sampler.inspect().get_arrow_trace()
        return min(batch.num_rows - _tuning_rows(batch) for batch in stats)
    sampler._sampler.flush()
    energy = _zarr_group(sampler)["sample_stats"]["energy"][...]
    return int(np.isfinite(energy).sum(axis=1).min())


def _zarr_group(sampler):
    import zarr

    return zarr.open_group(str(sampler.trace_dir), mode="r")


def _draws_so_far(sampler, names: list[str], count: int):
    """(group, name, chain, draws) for the first ``count`` post-warm-up draws of each judged
    variable and of the stats the verdict needs, one chain at a time: read from the disk
    trace, or from a copy of nutpie's arrow trace."""
    if sampler.trace_dir is not None:
        while _recorded_draws(sampler) < count:  # the last draws may still be in flight
            time.sleep(_POLL_SECONDS)
        trace = _zarr_group(sampler)
        for group, wanted in (("posterior", names), ("sample_stats", ("diverging", "energy"))):
            for name in wanted:
                stored = trace[group][name]
                for chain in range(stored.shape[0]):
                    yield group, name, chain, _ChainRows(stored, chain, count)
        return
    draws, stats = sampler._sampler.inspect().get_arrow_trace()
    starts = [_tuning_rows(stat_batch) for stat_batch in stats]
    for group, batches, wanted in (("posterior", draws, names),
                                   ("sample_stats", stats, ("diverging", "energy"))):
        for name in wanted:
            for chain, (batch, start) in enumerate(zip(batches, starts)):
                values = _column(batch, name)[start:start + count]
                yield group, name, chain, (values.reshape(count, -1) if values.ndim > 1 else values)


_ROWS_PER_READ = 128


class _ChainRows:
    """Rows (draws) of one chain of a zarr array, read only when sliced."""

    def __init__(self, stored, chain: int, count: int):
        self.stored, self.chain = stored, chain
        self.shape, self.dtype = (count,) + tuple(stored.shape[2:]), stored.dtype

    def __getitem__(self, rows: slice) -> np.ndarray:
        return self.stored[self.chain, rows]


def _first_draws(idata: az.InferenceData, count: int) -> az.InferenceData:
    """Keep draws 0..count-1 of every chain in every group that has a draw axis."""
    groups = {}
    for group in idata.groups():
        data = getattr(idata, group)
        if "draw" in data.dims and data.sizes["draw"] > count:
            data = data.isel(draw=slice(0, count))
        groups[group] = data
    trimmed = az.InferenceData(**groups)
    trimmed.attrs.update(idata.attrs)
    return trimmed


# ---------------------------------------------------------------------- fallbacks

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
    # float32: at 30,000 areas x 6,000 draws this array alone is 0.7 GB (1.4 GB in float64);
    # LOO and WAIC need far fewer digits than that.
    values = np.empty(theta.shape, dtype=np.float32)
    block = 200  # draws at a time: scipy's temporaries stay small at 30,000 areas
    for chain in range(theta.shape[0]):
        for start in range(0, theta.shape[1], block):
            rates = expected * theta.values[chain, start:start + block]
            values[chain, start:start + block] = poisson.logpmf(counts, rates)
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
