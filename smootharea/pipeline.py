"""The one path data takes: load -> graph -> (references) -> model -> sample -> summarise.

``check`` stops before the model; ``fit`` goes all the way and returns
everything in memory; :mod:`smootharea.outputs` writes it to disk.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import arviz as az
import geopandas as gpd
import numpy as np
import pandas as pd

from .diagnostics import Verdict
from .frequentist import FrequentistReferences, fit_references
from .graph import NeighbourGraph, build_graph
from .job import Job, threshold_label
from .load import load_study
from .provenance import package_versions, utc_now
from .study import StudyData
from .summarise import (area_table, fixed_effects, hyperparameters, model_comparison,
                        ranking_table, relative_risk_values)

if TYPE_CHECKING:  # PyMC is heavy; `check` never needs it.
    from .recipes import Recipe


@dataclass(frozen=True)
class PreparedStudy:
    """Validated data, its neighbour graph and the frequentist references."""

    job: Job
    study: StudyData
    graph: NeighbourGraph
    references: FrequentistReferences


@dataclass
class FitResult:
    """Everything one estimation produced, before it is written anywhere."""

    prepared: PreparedStudy
    recipe: "Recipe"
    idata: az.InferenceData
    verdict: Verdict
    areas: gpd.GeoDataFrame
    ranking: pd.DataFrame
    model_info: dict[str, Any]
    timings: dict[str, float] = field(default_factory=dict)

    @property
    def converged(self) -> bool:
        return self.verdict.converged


def prepare(job: Job) -> PreparedStudy:
    """Load and validate inputs, build the graph, fit the frequentist references."""
    study = load_study(job)
    graph = build_graph(study.areas, job.neighbours)
    references = fit_references(study.observed, study.expected, study.covariates, graph)
    return PreparedStudy(job=job, study=study, graph=graph, references=references)


def check_summary(prepared: PreparedStudy) -> dict[str, Any]:
    """The ``smootharea check --json`` object."""
    study, graph, references = prepared.study, prepared.graph, prepared.references
    summary = graph.summary()
    sizes = list(summary["components"])
    factors = [float(s) for s in graph.scaling_factors if np.isfinite(s)]
    refs = references.to_dict()
    return {
        "job": prepared.job.description.name,
        "areas": int(study.n_areas),
        "links": int(summary["links"]),
        "mean_neighbours": float(summary["mean_neighbours"]),
        "max_neighbours": int(summary["max_neighbours"]),
        "islands": [str(i) for i in summary["islands"]],
        "components": [int(s) for s in sizes],
        "scaling_factors": factors,
        "observed_total": int(study.observed.sum()),
        "expected_total": float(study.expected.sum()),
        "standardisation": study.standardisation,
        "overdispersion": refs["overdispersion"],
        "morans_i": refs["morans_i"],
        "glm": refs["glm"],
        "negative_binomial": refs.get("negative_binomial"),
        "warnings": list(study.warnings),
    }


def fit(job: Job, progress: bool | None = None, prepared: PreparedStudy | None = None,
        quick: bool = False) -> FitResult:
    """Run the whole estimation in memory and summarise it.

    ``quick``: the approximate preview of :mod:`smootharea.quick` (Laplace approximation,
    hyperparameters on a grid) instead of the sampler; the result carries the label in
    ``model_info["approximate"]`` and an approximation record in place of a verdict.
    """
    from .recipes import load_recipe

    timings: dict[str, float] = {}
    started = time.perf_counter()
    prepared = prepared or prepare(job)
    timings["prepare_seconds"] = time.perf_counter() - started
    recipe = load_recipe(job.model.recipe, base_dir=job.base_dir)

    started = time.perf_counter()
    if quick:
        from .quick import approximation_verdict, fit_quick
        idata = fit_quick(prepared, recipe, job.sampling)
        timings["approximation_seconds"] = time.perf_counter() - started
        result = summarise_fit(prepared, recipe, idata, approximation_verdict(idata), timings,
                               approximate=str(idata.attrs["approximate"]))
        result.ranking["estimate"] = "APPROXIMATE"  # ranking.csv travels without model.json
        attrs = idata.attrs
        result.model_info["sampling"] = {  # what was done, not the job's sampler settings
            "method": "approximate (no sampler)", "chains": int(attrs["chains"]),
            "draws": int(attrs["draws"]), "warmup": 0,
            **{k: attrs[k] for k in ("grid_points", "laplace_evaluations", "hyperparameter_mode")
               if k in attrs}}
        return result

    from .sampling import run_verdict, sample_study
    idata = sample_study(prepared.study, prepared.graph, recipe, job.sampling, progress=progress)
    timings["model_seconds"] = time.perf_counter() - started
    timings.update({f"sampler_{key}": float(idata.attrs[key])
                    for key in ("compile_seconds", "sampling_seconds") if key in idata.attrs})

    return summarise_fit(prepared, recipe, idata, run_verdict(idata), timings)


def summarise_fit(prepared: PreparedStudy, recipe: "Recipe", idata: az.InferenceData,
                  verdict: Verdict, timings: dict[str, float] | None = None,
                  approximate: str | None = None) -> FitResult:
    """Turn a posterior into the per-area table, the ranking and the model record."""
    job, study = prepared.job, prepared.study
    draws = relative_risk_values(idata)
    thresholds = job.report.thresholds
    table = area_table(study.area_ids, study.observed, study.expected, draws,
                       thresholds, job.report.interval)
    first = thresholds[0]
    if "area_name" in study.areas:
        table["area_name"] = study.areas["area_name"].to_numpy()
    ranking = ranking_table(table, table[f"p_above_{threshold_label(first)}"], first)
    areas = gpd.GeoDataFrame(table, geometry=study.areas.geometry.values, crs=study.areas.crs)
    model_info = model_record(prepared, recipe, idata, verdict, approximate)
    model_info["timings"] = dict(timings or {})
    return FitResult(prepared=prepared, recipe=recipe, idata=idata, verdict=verdict,
                     areas=areas, ranking=ranking, model_info=model_info,
                     timings=dict(timings or {}))


def model_record(prepared: PreparedStudy, recipe: "Recipe", idata: az.InferenceData,
                 verdict: Verdict, approximate: str | None = None) -> dict[str, Any]:
    """The content of ``model.json``."""
    job, study = prepared.job, prepared.study
    interval = job.report.interval
    return {
        "job": job.description.name,
        "title": job.description.title,
        "period": job.description.period,
        "source": job.description.source,
        "created": utc_now(),
        "approximate": approximate,
        "recipe": recipe.to_dict(),
        "priors": recipe.describe_priors(),
        "standardisation": study.standardisation,
        "interval": interval,
        "thresholds": list(job.report.thresholds),
        "suppress_below": job.report.suppress_below,
        "fixed_effects": fixed_effects(idata, interval),
        "hyperparameters": hyperparameters(idata, interval),
        "diagnostics": verdict.to_dict(),
        **model_comparison(idata),
        "sampling": sampling_settings(job, idata),
        "seed": job.sampling.seed,
        "graph": graph_record(prepared),
        "frequentist": prepared.references.to_dict(),
        "package_versions": package_versions(),
        "input_hashes": dict(study.input_hashes),
        "warnings": list(study.warnings),
    }


def graph_record(prepared: PreparedStudy) -> dict[str, Any]:
    """Graph summary plus the links themselves (as id pairs), so reports can reuse the graph."""
    summary = {k: v for k, v in check_summary(prepared).items()
               if k in ("areas", "links", "islands", "components", "scaling_factors")}
    graph = prepared.graph
    ids = graph.area_ids
    summary["rule"] = prepared.job.neighbours.rule
    summary["edges"] = [[ids[i], ids[j]] for i, j in graph.edges.tolist()]
    return summary


def sampling_settings(job: Job, idata: az.InferenceData) -> dict[str, Any]:
    """The job's sampler settings and what the sampler actually did (draws kept, why it stopped)."""
    settings = {"chains": job.sampling.chains, "draws": job.sampling.draws,
                "warmup": job.sampling.warmup, "max_draws": job.sampling.max_draws}
    if "draws_kept" in idata.attrs or "stop_reason" in idata.attrs:
        from .sampling import sampling_record
        settings.update(sampling_record(idata))
    return settings
