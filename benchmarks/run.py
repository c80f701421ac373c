"""Benchmark smootharea's sampler, the documentation-style PyMC baseline and ``--quick``.

    python benchmarks/run.py [--sizes small|full] [--out benchmarks/results/table.csv]
                             [--skip-baseline] [--skip-cached-rerun] [--skip-reference]
                             [--whole-run]
                             [--cases NAME ...]

Each method on each map runs in its own child process, so peak memory is per case.
See benchmarks/README.md for the columns. Times depend on the machine and its load.
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(HERE))

EXAMPLES = {"north_carolina": ROOT / "example_regions" / "north_carolina" / "job.toml",
            "demo": ROOT / "example_regions" / "tarvossia" / "job.toml"}
SYNTHETIC = {"grid_3000": ("grid", 3000), "voronoi_3000": ("voronoi", 3000),
             "grid_30000": ("grid", 30000), "voronoi_30000": ("voronoi", 30000)}
SIZES = {"small": ["north_carolina", "demo", "grid_3000"],
         "full": ["north_carolina", "demo", "grid_3000", "voronoi_3000", "grid_30000",
                  "voronoi_30000"]}
HYPERPARAMETERS = ("sigma", "phi", "sigma_spatial", "sigma_unstructured")
COLUMNS = ["case", "areas", "method", "prepare_s", "build_s", "compile_s", "sampling_s",
           "total_s", "cached_rerun_s", "peak_mb", "min_ess_bulk", "min_ess_tail", "max_rhat",
           "divergences", "ess_per_s", "ess_per_s_vs_baseline", "quick_max_rel_diff_mean_rr",
           "quick_max_abs_diff_exceedance", "quick_max_rel_diff_mean_rr_vs_long",
           "quick_max_abs_diff_exceedance_vs_long", "note"]
# The long NUTS reference for --quick's accuracy: draws per chain, and the largest map it runs on.
# Why: the timed NUTS row stops at about 400 bulk ESS, where its own Monte Carlo error in an
# exceedance probability (about 0.025 at p = 0.5) is half of --quick's 0.05 target.
REFERENCE_DRAWS = 5000
REFERENCE_MAX_AREAS = 10_000


# ----------------------------------------------------------------- workers (child processes)

def peak_megabytes() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # Linux: kilobytes


def sampler_quality(idata) -> dict:
    """Smallest bulk/tail ESS and largest R-hat over relative risks and hyperparameters."""
    from smootharea.diagnostics import assess_convergence
    names = ["relative_risk"] + [n for n in HYPERPARAMETERS if n in idata.posterior]
    verdict = assess_convergence(idata, var_names=names)
    divergences = (verdict.divergences
                   if "sample_stats" in idata.groups() and "diverging" in idata.sample_stats else None)
    return {"min_ess_bulk": verdict.min_ess_bulk, "min_ess_tail": verdict.min_ess_tail,
            "max_rhat": verdict.max_rhat, "divergences": divergences}


def save_summary(idata, threshold: float, path: Path) -> None:
    """Posterior mean and exceedance per area, one chain at a time: xarray's mean over a
    boolean or NaN-skipping array copies it whole (measured 7.0 GB peak at 30,000 areas)."""
    draws = idata.posterior["relative_risk"].transpose("chain", "draw", ...).values
    total, above = np.zeros(draws.shape[2:]), np.zeros(draws.shape[2:])
    for chain in draws:
        total += chain.sum(axis=0)
        above += (chain > threshold).sum(axis=0)
    count = draws.shape[0] * draws.shape[1]
    np.savez(path, mean=total / count, exceedance=above / count)


def detect_cache() -> str | None:
    """Name of smootharea's compiled-model cache module, if this version has one."""
    import importlib.util
    for name in ("smootharea.compiled_cache",):
        if importlib.util.find_spec(name) is not None:
            return name
    return None


def prepare_timed(job_path: Path):
    """Load and prepare a job, timing the preparation: (job, prepared, result row)."""
    from smootharea.job import load_job
    from smootharea.pipeline import prepare

    job = load_job(job_path)
    clock = time.perf_counter()
    prepared = prepare(job)
    return job, prepared, {"prepare_s": time.perf_counter() - clock, "areas": prepared.study.n_areas}


def worker_nuts(job_path: Path, summary: Path) -> dict:
    """smootharea's own path: prepare, build_model, sample_posterior (compile + sample)."""
    import nutpie

    from smootharea.model import build_model
    from smootharea.recipes import load_recipe
    from smootharea.sampling import sample_posterior

    job, prepared, result = prepare_timed(job_path)
    recipe = load_recipe(job.model.recipe, base_dir=job.base_dir)
    clock = time.perf_counter()
    model = build_model(prepared.study, prepared.graph, recipe)
    result["build_s"] = time.perf_counter() - clock

    # Where sample_posterior does not record its compile time, time nutpie's compiler.
    compile_times: list[float] = []
    original = nutpie.compile_pymc_model

    def timed_compile(*args, **kwargs):
        start = time.perf_counter()
        try:
            return original(*args, **kwargs)
        finally:
            compile_times.append(time.perf_counter() - start)

    nutpie.compile_pymc_model = timed_compile
    try:
        clock = time.perf_counter()
        idata = sample_posterior(model, job.sampling, recipe, progress=False)
        total = time.perf_counter() - clock
    finally:
        nutpie.compile_pymc_model = original
    attrs = idata.attrs
    if "compile_seconds" in attrs and "sampling_seconds" in attrs:
        compile_seconds, sampling_seconds = attrs["compile_seconds"], attrs["sampling_seconds"]
    else:
        compile_seconds = compile_times[0] if compile_times else None
        sampling_seconds = total - (compile_seconds or 0.0)
    result.update(compile_s=compile_seconds, sampling_s=sampling_seconds,
                  total_s=result["prepare_s"] + result["build_s"] + total,
                  **sampler_quality(idata))
    result["note"] = (f"sampler {attrs.get('sampler', '?')}; {idata.posterior.sizes['chain']} "
                      f"chains x {idata.posterior.sizes['draw']} draws"
                      + (f" ({attrs['stop_reason']})" if "stop_reason" in attrs else "")
                      + (f"; compiled model from: {attrs['compiled_from']}"
                         if "compiled_from" in attrs else ""))
    save_summary(idata, job.report.thresholds[0], summary)
    return result


def worker_quick(job_path: Path, summary: Path) -> dict:
    from smootharea.quick import fit_quick
    from smootharea.recipes import load_recipe

    job, prepared, result = prepare_timed(job_path)
    recipe = load_recipe(job.model.recipe, base_dir=job.base_dir)
    clock = time.perf_counter()
    idata = fit_quick(prepared, recipe, job.sampling)
    result["sampling_s"] = time.perf_counter() - clock
    result["total_s"] = result["prepare_s"] + result["sampling_s"]
    result["note"] = (f"{idata.attrs.get('grid_points')} grid points, "
                      f"{idata.attrs.get('laplace_evaluations')} Laplace fits; "
                      f"mode {idata.attrs.get('hyperparameter_mode')}")
    save_summary(idata, job.report.thresholds[0], summary)
    return result


def worker_baseline(job_path: Path, summary: Path) -> dict:
    from baseline import baseline_skip_reason, build_baseline_model, sample_baseline


    job, prepared, result = prepare_timed(job_path)
    reason = baseline_skip_reason(prepared.graph)
    if reason:
        return {**result, "note": reason}
    clock = time.perf_counter()
    study = prepared.study
    model = build_baseline_model(study.observed, study.expected, prepared.graph,
                                 study.covariates.to_numpy(dtype=float).reshape(study.n_areas, -1))
    result["build_s"] = time.perf_counter() - clock
    clock = time.perf_counter()
    idata = sample_baseline(model, job.sampling.seed)
    result["sampling_s"] = time.perf_counter() - clock  # includes PyMC's compilation
    result["total_s"] = result["prepare_s"] + result["build_s"] + result["sampling_s"]
    result.update(sampler_quality(idata))
    result["note"] = ("pm.ICAR (dense W) BYM2, pm.sample defaults; compile time is inside "
                      "sampling_s; documentation priors (see baseline.py)")
    save_summary(idata, job.report.thresholds[0], summary)
    return result


def worker_reference(job_path: Path, summary: Path) -> dict:
    """NUTS with REFERENCE_DRAWS draws per chain and another seed: the yardstick for --quick.
    Its ESS per second is left blank: it loads the compiled model and runs 5x longer, so the
    rate compares with no other row."""
    import dataclasses

    from smootharea.model import build_model
    from smootharea.recipes import load_recipe
    from smootharea.sampling import sample_posterior

    job, prepared, result = prepare_timed(job_path)
    recipe = load_recipe(job.model.recipe, base_dir=job.base_dir)
    sampling = dataclasses.replace(job.sampling, draws=REFERENCE_DRAWS, seed=job.sampling.seed + 1)
    clock = time.perf_counter()
    idata = sample_posterior(build_model(prepared.study, prepared.graph, recipe), sampling, recipe,
                             progress=False, max_draws=REFERENCE_DRAWS)
    result.update(sampling_s=time.perf_counter() - clock, ess_per_s=None, **sampler_quality(idata))
    result["note"] = (f"{idata.posterior.sizes['chain']} chains x {idata.posterior.sizes['draw']} "
                      f"draws, seed {sampling.seed}; only the yardstick for --quick's *_vs_long "
                      "columns, not timed against the baseline")
    save_summary(idata, job.report.thresholds[0], summary)
    return result


def worker_whole_run(job_path: Path, summary: Path) -> dict:
    """A whole ``smootharea run`` (inputs to report, maps and history) into a scratch folder
    that is removed afterwards: the wall time and peak memory a nightly job sees."""
    from smootharea.job import load_job
    from smootharea.runner import run_job

    job = load_job(job_path)
    out_dir = summary.parent / "whole_run"
    shutil.rmtree(out_dir, ignore_errors=True)
    clock = time.perf_counter()
    try:
        outcome = run_job(job, out_dir, progress=False, echo=False)
        total = time.perf_counter() - clock
        model = outcome.result.model_info if outcome.result is not None else {}
    finally:
        shutil.rmtree(out_dir, ignore_errors=True)
    sampling = model.get("sampling", {})
    return {"areas": None if outcome.result is None else outcome.result.prepared.study.n_areas,
            "total_s": total,
            "note": (f"status {outcome.status}; {sampling.get('draws', '?')} draws per chain; "
                     f"compiled model from: {sampling.get('compiled_from', '?')}; "
                     "reading, checks, sampling, summaries, LOO/WAIC, posterior.nc, maps, report")}


WORKERS = {"nuts": worker_nuts, "nuts_cached": worker_nuts, "quick": worker_quick,
           "baseline": worker_baseline, "whole_run": worker_whole_run,
           "reference": worker_reference}
METHOD_NAMES = {"nuts": "smootharea NUTS", "nuts_cached": "smootharea NUTS, second run",
                "quick": "smootharea --quick",
                "baseline": "PyMC documentation baseline",
                "whole_run": "smootharea run (whole job)",
                "reference": f"smootharea NUTS, long reference ({REFERENCE_DRAWS} draws)"}


# ----------------------------------------------------------------- parent

def job_for(case: str, data_dir: Path) -> Path:
    if case in EXAMPLES:
        return EXAMPLES[case]
    from synthetic import write_synthetic_job
    kind, n = SYNTHETIC[case]
    return write_synthetic_job(kind, n, data_dir / case)


def run_worker(method: str, job: Path, scratch: Path, timeout: float | None = None) -> dict:
    """One method on one map in a child process; its result (or its failure) as a dict.

    The compiled-model cache of smootharea (if any) lives in ``scratch/compiled``, emptied
    before each map, so the first run compiles and the second ("nuts_cached", a new process
    as a nightly run would be) may reuse it."""
    result_path = scratch / f"{method}.json"
    command = [sys.executable, str(Path(__file__).resolve()), "--worker", method, "--job", str(job),
               "--result", str(result_path), "--summary", str(scratch / f"{method}.npz")]
    try:
        completed = subprocess.run(command, capture_output=True, text=True, timeout=timeout,
                                   env={**os.environ, "PYTHONWARNINGS": "ignore",
                                        "SMOOTHAREA_CACHE_DIR": str(scratch / "compiled")})
    except subprocess.TimeoutExpired:
        return {"note": f"stopped after the --timeout of {timeout:.0f} s"}
    if completed.returncode != 0 or not result_path.is_file():
        tail = (completed.stderr or completed.stdout).strip().splitlines()[-1:] or ["no output"]
        return {"note": f"failed (exit {completed.returncode}): {tail[0][:200]}"}
    return json.loads(result_path.read_text())


def compare_quick(scratch: Path) -> dict:
    """--quick's largest differences from the timed NUTS run and from the long reference."""
    quick = scratch / "quick.npz"
    result = {}
    for against, suffix in (("nuts", ""), ("reference", "_vs_long")):
        path = scratch / f"{against}.npz"
        if not (path.is_file() and quick.is_file()):
            continue
        a, b = np.load(path), np.load(quick)
        result[f"quick_max_rel_diff_mean_rr{suffix}"] = float(
            np.max(np.abs(b["mean"] / a["mean"] - 1)))
        result[f"quick_max_abs_diff_exceedance{suffix}"] = float(
            np.max(np.abs(b["exceedance"] - a["exceedance"])))
    return result


def reference_runs_on(case: str) -> bool:
    return case in EXAMPLES or SYNTHETIC[case][1] <= REFERENCE_MAX_AREAS


def benchmark(cases: list[str], skip_baseline: bool, data_dir: Path, scratch_root: Path,
              out: Path, timeout: float | None = None, rerun: bool = True,
              whole_run: bool = False, reference: bool = True) -> list[dict]:
    """Run every case; the CSV is rewritten after each case, so a long run leaves partial results."""
    rows = []
    for case in cases:
        job = job_for(case, data_dir)
        scratch = scratch_root / case
        scratch.mkdir(parents=True, exist_ok=True)
        for stale in scratch.glob("*.npz"):
            stale.unlink()
        shutil.rmtree(scratch / "compiled", ignore_errors=True)
        cache = detect_cache()
        methods = (["nuts"] + (["nuts_cached"] if cache and rerun else [])
                   + (["whole_run"] if whole_run else []) + ["quick"]
                   + (["reference"] if reference and reference_runs_on(case) else [])
                   + ([] if skip_baseline else ["baseline"]))
        results = {}
        for method in methods:
            print(f"[{time.strftime('%H:%M:%S')}] {case}: {METHOD_NAMES[method]} ...", flush=True)
            results[method] = run_worker(method, job, scratch, timeout)
        results["quick"].update(compare_quick(scratch))
        rerun = results.pop("nuts_cached", None)
        if rerun is not None:
            methods.remove("nuts_cached")
            seconds = [rerun.get(k) for k in ("compile_s", "sampling_s")]
            if None not in seconds:
                results["nuts"]["cached_rerun_s"] = sum(seconds)
            results["nuts"]["note"] = (results["nuts"].get("note", "") + f"; second run ({cache}): "
                                       + str(rerun.get("note", "")).split("; ")[-1]
                                       + f", compile {_seconds(rerun.get('compile_s'))}")
        elif cache is None:
            results["nuts"]["note"] = results["nuts"].get("note", "") + "; no compiled-model cache"
        baseline_rate = _ess_per_second(results.get("baseline", {}))
        for method in methods:
            row = {"case": case, "method": METHOD_NAMES[method], **results[method]}
            row.setdefault("ess_per_s", _ess_per_second(row))
            if method == "nuts" and baseline_rate and row["ess_per_s"]:
                row["ess_per_s_vs_baseline"] = row["ess_per_s"] / baseline_rate
            rows.append(row)
        if skip_baseline:
            rows.append({"case": case, "method": METHOD_NAMES["baseline"],
                         "areas": results["nuts"].get("areas"), "note": "skipped (--skip-baseline)"})
        write_csv(rows, out)
    return rows


def _seconds(value) -> str:
    return "?" if value is None else f"{value:.2f} s"


def _ess_per_second(row: dict) -> float | None:
    """Smallest bulk ESS per second of compile + sampling (what a user waits for)."""
    seconds = (row.get("compile_s") or 0.0) + (row.get("sampling_s") or 0.0)
    if row.get("min_ess_bulk") is None or not seconds:
        return None
    return row["min_ess_bulk"] / seconds


def print_table(rows: list[dict]) -> None:
    import pandas as pd
    table = pd.DataFrame(rows).reindex(columns=COLUMNS)
    with pd.option_context("display.max_columns", None, "display.width", 250,
                           "display.max_colwidth", 60):
        print(table.drop(columns="note").to_string(index=False, float_format=lambda v: f"{v:.3g}"))
        print()
        for row in rows:
            if row.get("note"):
                print(f"  {row['case']} / {row['method']}: {row['note']}")


def write_csv(rows: list[dict], path: Path) -> None:
    import pandas as pd
    path.parent.mkdir(parents=True, exist_ok=True)
    pd.DataFrame(rows).reindex(columns=COLUMNS).to_csv(path, index=False)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", choices=sorted(SIZES), default="small")
    parser.add_argument("--cases", nargs="+", choices=sorted(EXAMPLES) + sorted(SYNTHETIC),
                        help="run only these cases (overrides --sizes)")
    parser.add_argument("--out", type=Path, default=HERE / "results" / "table.csv")
    parser.add_argument("--skip-baseline", action="store_true")
    parser.add_argument("--skip-reference", action="store_true",
                        help=f"no long NUTS run ({REFERENCE_DRAWS} draws per chain) to judge --quick")
    parser.add_argument("--skip-cached-rerun", action="store_true",
                        help="do not repeat the NUTS run to time the compiled-model cache")
    parser.add_argument("--whole-run", action="store_true",
                        help="also time a whole `smootharea run` of each map (summaries, "
                             "outputs, maps, report) with its peak memory")
    parser.add_argument("--timeout", type=float, default=None,
                        help="stop any one method on one map after this many seconds")
    parser.add_argument("--data", type=Path, default=HERE / "results" / "data",
                        help="where synthetic maps are written (reused when present)")
    parser.add_argument("--worker", choices=sorted(WORKERS), help=argparse.SUPPRESS)
    parser.add_argument("--job", type=Path, help=argparse.SUPPRESS)
    parser.add_argument("--result", type=Path, help=argparse.SUPPRESS)
    parser.add_argument("--summary", type=Path, help=argparse.SUPPRESS)
    arguments = parser.parse_args(argv)

    if arguments.worker:
        result = WORKERS[arguments.worker](arguments.job, arguments.summary)
        result["peak_mb"] = peak_megabytes()
        arguments.result.write_text(json.dumps(result))
        return 0

    cases = arguments.cases or SIZES[arguments.sizes]
    started = time.perf_counter()
    rows = benchmark(cases, arguments.skip_baseline, arguments.data,
                     arguments.out.parent / "scratch", arguments.out, arguments.timeout,
                     not arguments.skip_cached_rerun, arguments.whole_run,
                     not arguments.skip_reference)
    print_table(rows)
    print(f"\nwritten {arguments.out}; {time.perf_counter() - started:.0f} s in all; "
          f"{os.cpu_count()} CPUs; load average {os.getloadavg()[0]:.2f} at the end")
    return 0


if __name__ == "__main__":
    sys.exit(main())
