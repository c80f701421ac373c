"""report.html: one self-contained page per run, redrawn from the run folder alone.

The page embeds every figure as a base64 PNG and carries its own CSS; it loads no
script, font, stylesheet or image from anywhere, so it opens offline. Order: what was
estimated, the relative-risk map, the table of areas flagged higher, the other maps and
plots, the frequentist comparison, diagnostics, priors, provenance and cautions. A run
that did not converge, or an approximate run, says so at the very top.

Disclosure: tables show the masked published table (:mod:`smootharea.disclosure`); an
area flagged ``suppressed`` never has its count or SMR printed, even if a value is present.
"""
from __future__ import annotations

import base64
import html
import io
import math
from pathlib import Path
from typing import Any, Iterable, Sequence

import numpy as np
import pandas as pd

from .maps import (DEFAULT_PALETTE, PRINT_DPI, RunFiles, draw_maps, exceedance_column,
                   format_ratio, read_run, save_figure)
from .outputs import write_text_atomically
from .plots import draw_plots
from .summarise import SIGNAL_LOWER, SIGNAL_UPPER

REPORT_HTML = "report.html"
FIGURE_DIR = "maps"
EMBED_DPI = 110
ALL_AREAS_TABLE_MAX = 400
NOT_SHOWN = "not shown"
DASH = "&ndash;"

CAPTIONS = {
    "relative_risk": "Posterior mean relative risk of each area. Classes are symmetric on the "
                     "log scale around 1 (the rate expected from the area's population). "
                     "Hatched areas have a count below the disclosure threshold; their smoothed "
                     "estimate is still shown.",
    "smr_vs_relative_risk": "Left: the raw SMR (observed / expected), blank where the count is "
                            "suppressed. Right: the smoothed relative risk. Same classes in both "
                            "panels, so the pull towards the average is visible.",
    "interval_width": "Width of each area's credible interval for the relative risk. Wide "
                      "intervals mark areas where the data say little (small expected counts).",
    "caterpillar": "Areas ordered by posterior median relative risk, with credible intervals "
                   "(left) and the matching rank intervals (right). Overlapping rank intervals "
                   "mean the order between those areas is not settled.",
    "funnel": "Raw SMR against expected count with exact Poisson control limits around the "
              "overall ratio (Spiegelhalter 2005). Areas with a suppressed count are left out "
              "of this plot, because their SMR would reveal the count.",
    "shrinkage": "Raw SMR against the smoothed relative risk; larger points have larger "
                 "expected counts and move less. Areas with a suppressed count are left out "
                 "of this plot, because their SMR would reveal the count.",
    "hyperparameters": "Posterior distributions of the variance parameters; the solid line "
                       "is the median, dashed lines bound the credible interval.",
    "trace": "Sampled values of each chain (right) and their densities (left); chains that "
             "overlap without trends are wanted.",
    "rank": "Rank plots (Vehtari et al. 2021): histograms of the ranks of each chain's draws "
            "among all draws; roughly uniform bars in every chain are wanted.",
}

STYLE = """
:root { --ink:#1f2430; --muted:#5b6170; --rule:#d9dce3; --accent:#7a3e00; --alarm:#a40000; }
* { box-sizing: border-box; }
body { margin:0; color:var(--ink); background:#fbfbf9;
       font-family: system-ui, -apple-system, "Segoe UI", Roboto, "DejaVu Sans", sans-serif;
       font-size: 15px; line-height: 1.5; }
main { max-width: 980px; margin: 0 auto; padding: 1.2rem 1.4rem 3rem; }
header.top { border-bottom: 3px solid var(--accent); margin-bottom: 1rem; padding-bottom: .4rem; }
h1 { font-size: 1.55rem; margin: .2rem 0; }
h2 { font-size: 1.2rem; margin-top: 2.2rem; border-bottom: 1px solid var(--rule); }
h3 { font-size: 1.02rem; margin-top: 1.4rem; }
.kicker { color: var(--muted); font-size: .9rem; margin: 0; }
.alarm { border: 3px solid var(--alarm); background: #fff1f0; color: var(--alarm);
         padding: .7rem 1rem; margin: 1rem 0; font-weight: 600; }
.alarm ul { font-weight: 400; margin: .3rem 0 0; }
.approx { display: inline-block; background: #3b3b8f; color: white; font-weight: 700;
          letter-spacing: .04em; padding: .25rem .7rem; margin: .6rem 0; }
nav.contents { font-size: .88rem; color: var(--muted); }
nav.contents a { color: var(--muted); margin-right: .8rem; }
figure { margin: 1.2rem 0; background: white; border: 1px solid var(--rule); padding: .6rem; }
figure img { width: 100%; height: auto; display: block; }
figcaption { font-size: .86rem; color: var(--muted); margin-top: .4rem; }
table { border-collapse: collapse; font-size: .86rem; margin: .6rem 0 1rem; background: white; }
caption { text-align: left; font-size: .88rem; color: var(--muted); padding-bottom: .3rem; }
th, td { border-bottom: 1px solid var(--rule); padding: .25rem .6rem; text-align: right;
         vertical-align: top; white-space: nowrap; }
th { white-space: normal; background: #f0f1f4; }
th:first-child, td:first-child { text-align: left; }
td.text { text-align: left; }
.muted { color: var(--muted); }
.note { font-size: .86rem; color: var(--muted); }
code { font-size: .82rem; word-break: break-all; }
section#cautions { border-left: 4px solid var(--accent); padding-left: 1rem; }
"""


# --- small formatting helpers ----------------------------------------------------------

def esc(value: Any) -> str:
    return html.escape(str(value), quote=True)


def is_missing(value: Any) -> bool:
    if value is None or value is pd.NA:
        return True
    try:
        return not math.isfinite(float(value))
    except (TypeError, ValueError):
        return False


def number(value: Any, digits: int = 2) -> str:
    return DASH if is_missing(value) else f"{float(value):.{digits}f}"


def significant(value: Any, digits: int = 3) -> str:
    return DASH if is_missing(value) else f"{float(value):.{digits}g}"


def interval_text(low: Any, high: Any, digits: int = 2) -> str:
    return f"{number(low, digits)} to {number(high, digits)}"


def table_html(headers: Sequence[str], rows: Iterable[Sequence[str]], table_id: str | None = None,
               caption: str | None = None, text_columns: Sequence[int] = (0,)) -> str:
    """A table from already-escaped cell strings."""
    ident = f' id="{esc(table_id)}"' if table_id else ""
    parts = [f"<table{ident}>"]
    if caption:
        parts.append(f"<caption>{caption}</caption>")
    parts.append("<thead><tr>" + "".join(f"<th scope=\"col\">{h}</th>" for h in headers)
                 + "</tr></thead><tbody>")
    body = []
    for row in rows:
        cells = "".join(f'<td class="text">{c}</td>' if i in text_columns else f"<td>{c}</td>"
                        for i, c in enumerate(row))
        body.append(f"<tr>{cells}</tr>")
    if not body:
        body.append(f'<tr><td class="text" colspan="{len(headers)}">None.</td></tr>')
    parts += body
    parts.append("</tbody></table>")
    return "".join(parts)


def png_data_uri(fig, dpi: int = EMBED_DPI, printed: Path | None = None,
                 printed_dpi: int = PRINT_DPI) -> str:
    """The figure as a base64 PNG at screen resolution.

    When a print-resolution PNG was already written, it is scaled down (Pillow) instead of
    drawing the figure again, which halves the time a report takes.
    """
    buffer = io.BytesIO()
    if printed is not None and printed.is_file():
        from PIL import Image
        with Image.open(printed) as image:
            size = (max(1, round(image.width * dpi / printed_dpi)),
                    max(1, round(image.height * dpi / printed_dpi)))
            image.convert("RGB").resize(size, Image.Resampling.LANCZOS, reducing_gap=3.0).save(
                buffer, format="PNG", optimize=False)
    else:
        fig.savefig(buffer, format="png", dpi=dpi)
    return "data:image/png;base64," + base64.b64encode(buffer.getvalue()).decode("ascii")


def figure_html(stem: str, fig, caption: str, dpi: int = EMBED_DPI,
                printed: Path | None = None, printed_dpi: int = PRINT_DPI) -> str:
    source = png_data_uri(fig, dpi, printed, printed_dpi)
    return (f'<figure id="figure-{esc(stem)}"><img alt="{esc(caption)}" src="{source}">'
            f"<figcaption>{esc(caption)}</figcaption></figure>")


def figure_caption(stem: str, suppress_below: int) -> str:
    if stem in CAPTIONS:
        return CAPTIONS[stem]
    if stem.endswith("_continuous"):
        t = stem.removeprefix("exceedance_").removesuffix("_continuous")
        return (f"Probability that the relative risk exceeds {t}, on a continuous scale; "
                f"the colour bar marks the cut-offs {SIGNAL_LOWER:g} and {SIGNAL_UPPER:g}.")
    if stem.startswith("exceedance_"):
        t = stem.removeprefix("exceedance_")
        return (f"Probability that the relative risk exceeds {t}, in three classes: above "
                f"{SIGNAL_UPPER:g} the area is called higher, below {SIGNAL_LOWER:g} not higher, "
                f"in between unclear (Richardson et al. 2004).")
    return stem.replace("_", " ")


# --- disclosure-safe cells -------------------------------------------------------------

def count_cells(row: pd.Series) -> tuple[str, str]:
    """Observed count and SMR cells, never printed for a suppressed area."""
    if bool(row.get("suppressed", False)) or is_missing(row.get("observed")):
        return NOT_SHOWN, NOT_SHOWN
    return str(int(row["observed"])), number(row.get("smr"))


def area_label(row: pd.Series) -> str:
    """The area's id, with its name when the job gave a name column."""
    name = row.get("area_name")
    if isinstance(name, str) and name:
        return f"{esc(name)} <span class=\"note\">({esc(row['area_id'])})</span>"
    return esc(row["area_id"])


def flagged_table(run: RunFiles, thresholds: Sequence[float]) -> str:
    """Areas with P(RR > first threshold) above 0.8, most certain first."""
    first = thresholds[0]
    columns = {t: exceedance_column(run, t) for t in thresholds}
    table = run.areas
    flagged = table[table[columns[first]] > SIGNAL_UPPER]
    flagged = flagged.sort_values([columns[first], "rr_median"], ascending=False, kind="stable")
    level = f"{run.interval * 100:g}%"
    headers = (["Area", "Relative risk (median)", f"{level} credible interval"]
               + [f"P(RR &gt; {esc(format_ratio(t))})" for t in thresholds]
               + ["Median rank", f"{level} rank interval", "Expected", "Observed", "SMR"])
    rows = []
    for _, row in flagged.iterrows():
        observed, smr = count_cells(row)
        rows.append([area_label(row), number(row["rr_median"]),
                     interval_text(row["rr_lower"], row["rr_upper"])]
                    + [number(row[columns[t]]) for t in thresholds]
                    + [number(row["rank_median"], 0),
                       f"{int(row['rank_lower'])} to {int(row['rank_upper'])}",
                       number(row["expected"], 1), observed, smr])
    caption = (f"{len(flagged)} of {len(table)} areas have P(relative risk &gt; "
               f"{esc(format_ratio(first))}) above {SIGNAL_UPPER:g} (rank 1 = highest risk). "
               f"Counts below {run.suppress_below} are {NOT_SHOWN}.")
    return table_html(headers, rows, table_id="flagged-areas", caption=caption)


def all_areas_table(run: RunFiles, thresholds: Sequence[float]) -> str:
    if len(run.areas) > ALL_AREAS_TABLE_MAX:
        return (f'<p class="note">The table of all {len(run.areas)} areas is in '
                "<code>areas.csv</code> beside this report.</p>")
    columns = {t: exceedance_column(run, t) for t in thresholds}
    level = f"{run.interval * 100:g}%"
    headers = (["Area", "Expected", "Observed", "SMR", "RR (median)", f"{level} interval"]
               + [f"P(RR &gt; {esc(format_ratio(t))})" for t in thresholds]
               + ["Rank interval", "Signal"])
    rows = []
    for _, row in run.areas.sort_values("rr_median", ascending=False, kind="stable").iterrows():
        observed, smr = count_cells(row)
        rows.append([area_label(row), number(row["expected"], 1), observed, smr,
                     number(row["rr_median"]), interval_text(row["rr_lower"], row["rr_upper"])]
                    + [number(row[columns[t]]) for t in thresholds]
                    + [f"{int(row['rank_lower'])} to {int(row['rank_upper'])}",
                       esc(row["signal"])])
    return ("<details><summary>All areas (published table, small counts masked)</summary>"
            + table_html(headers, rows, table_id="all-areas", text_columns=(0, len(headers) - 1))
            + "</details>")


# --- frequentist comparison ------------------------------------------------------------

def true_counts(run: RunFiles) -> np.ndarray | None:
    """True counts from posterior.nc (internal; used only for aggregate statistics)."""
    if not run.has_posterior or "observed_data" not in run.idata.groups():
        return None
    counts = run.idata.observed_data["observed"]
    order = [str(a) for a in counts["area"].values]
    return pd.Series(counts.values, index=order).loc[run.areas["area_id"]].to_numpy(dtype=float)


def run_graph(run: RunFiles):
    """The run's neighbour graph: stored edges if model.json has them, else rebuilt contiguity."""
    from .graph import contiguity_edges, graph_from_edges
    ids = list(run.areas["area_id"])
    stored = (run.model.get("graph") or {}).get("edges")
    if stored:
        index = {a: i for i, a in enumerate(ids)}
        edges = np.array([[index[str(a)], index[str(b)]] for a, b in stored], dtype=np.int64)
        return graph_from_edges(ids, edges), "the run's neighbour graph"
    rule = (run.model.get("graph") or {}).get("rule", "queen")
    areas = run.areas[["area_id", "geometry"]]
    graph = graph_from_edges(ids, contiguity_edges(areas, rule))
    how = (f"{rule} contiguity rebuilt from the area geometry ({graph.n_links} links"
           f"; the run's graph had {(run.model.get('graph') or {}).get('links', 'an unknown number of')}"
           " links, including any link edits)")
    return graph, how


def smoothed_residual_morans_i(run: RunFiles) -> tuple[Any, str]:
    """Moran's I of Pearson residuals (O - E*RR) / sqrt(E*RR) against the posterior mean RR."""
    from .frequentist import morans_i
    observed = true_counts(run)
    if observed is None:
        return None, "posterior.nc holds no observed counts"
    fitted = run.areas["expected"].to_numpy(dtype=float) * run.areas["rr_mean"].to_numpy(dtype=float)
    residuals = (observed - fitted) / np.sqrt(fitted)
    graph, how = run_graph(run)
    return morans_i(residuals, graph, permutations=999, seed=int(run.model.get("seed") or 0)), how


def frequentist_section(run: RunFiles) -> str:
    reference = run.model.get("frequentist") or {}
    parts = ['<h2 id="frequentist">Frequentist comparison</h2>',
             '<p>The same counts and expected counts fitted by a Poisson regression with '
             'log(expected) as offset (statsmodels), beside the Bayesian model.</p>']
    glm = reference.get("glm") or {}
    effects = run.model.get("fixed_effects") or {}
    rows = []
    covariates = [name for name in glm if name != "intercept"]
    for name in glm:
        if name == "intercept" and covariates:
            continue  # the model centres covariates, so the two intercepts differ in meaning
        g = glm[name]
        if name == "intercept":
            post = (run.model.get("hyperparameters") or {}).get("intercept") or {}
            posterior = (f"{number(math.exp(post['median']))} "
                         f"({interval_text(math.exp(post['lower']), math.exp(post['upper']))})"
                         if post else DASH)
            label = "overall ratio (intercept)"
        else:
            post = effects.get(name) or {}
            posterior = (f"{number(post.get('rate_ratio_median'))} "
                         f"({interval_text(post.get('rate_ratio_lower'), post.get('rate_ratio_upper'))})"
                         if post else DASH)
            label = name
        glm_text = (f"{number(g.get('rate_ratio', math.exp(g.get('estimate', float('nan')))))} "
                    f"({interval_text(g.get('rate_ratio_low'), g.get('rate_ratio_high'))})")
        rows.append([esc(label), glm_text, posterior])
    level = f"{run.interval * 100:g}%"
    parts.append(table_html(["Term", "GLM rate ratio (95% CI)",
                             f"Posterior rate ratio, median ({level} interval)"], rows,
                            caption="Rate ratios: exp(coefficient)."))
    over = reference.get("overdispersion")
    nb = reference.get("negative_binomial") or {}
    eb = reference.get("empirical_bayes") or {}
    lines = [f"Pearson chi-square / residual df of the Poisson GLM: <strong>{number(over)}</strong>"
             + (" (above 1: more variation between areas than Poisson chance allows, "
                "which is what smoothing models)" if not is_missing(over) and over > 1.2 else "")]
    if nb:
        lines.append(f"Negative-binomial dispersion alpha: {significant(nb.get('alpha'))}")
    if eb:
        lines.append("Between-area variance of the global empirical Bayes estimator "
                     f"(Marshall 1991): {significant(eb.get('between_variance'))}")
    parts.append("<ul>" + "".join(f"<li>{line}</li>" for line in lines) + "</ul>")
    parts.append(morans_table(run, reference.get("morans_i")))
    return "\n".join(parts)


def morans_table(run: RunFiles, before: dict | None) -> str:
    try:
        after, how = smoothed_residual_morans_i(run)
    except Exception as error:  # a figure for the report, not a reason to fail the report
        after, how = None, f"could not be computed ({error})"
    rows = []
    if before:
        rows.append(["Poisson GLM, Pearson residuals (before smoothing)",
                     number(before.get("i"), 3), number(before.get("p_value"), 3)])
    if after is not None:
        rows.append(["Smoothed model, Pearson residuals against E x posterior mean RR",
                     number(after.i, 3), number(after.p_value, 3)])
    note = (f'<p class="note">After smoothing: computed on {esc(how)}; permutation p-values '
            "from 999 permutations (esda). Moran's I near its expectation (about 0) after "
            "smoothing means the model has absorbed the spatial pattern of the residuals.</p>")
    return (table_html(["Residuals", "Moran's I", "p-value"], rows,
                       caption="Moran's I (Moran 1950) of residuals on the neighbour graph.")
            + note)


# --- other sections --------------------------------------------------------------------

def status_banner(model: dict[str, Any]) -> str:
    parts = []
    diagnostics = model.get("diagnostics") or {}
    if diagnostics.get("converged") is False:  # None: an approximate run, no sampler verdict
        reasons = "".join(f"<li>{esc(r)}</li>" for r in diagnostics.get("reasons") or [])
        parts.append('<div class="alarm" role="alert" id="not-converged">The sampler did not '
                     "converge: these estimates are not reliable and must not be published. "
                     f"Run longer chains or revise the model.<ul>{reasons}</ul></div>")
    if model.get("approximate"):
        parts.append(f'<div class="approx" id="approximate">APPROXIMATE: '
                     f"{esc(model['approximate'])}</div>")
    return "\n".join(parts)


def what_was_estimated(run: RunFiles, thresholds: Sequence[float]) -> str:
    m = run.model
    recipe = m.get("recipe") or {}
    n = len(run.areas)
    level = f"{run.interval * 100:g}%"
    t_list = ", ".join(format_ratio(t) for t in thresholds)
    text = (
        f"This report estimates the relative risk of <strong>{esc(m.get('title') or m.get('job'))}"
        f"</strong> in {n} areas over the period {esc(m.get('period') or 'not stated')}. "
        f"Counts come from {esc(m.get('source') or 'an unstated source')}. Expected counts: "
        f"{esc(m.get('standardisation') or 'not stated')}. A relative risk of 1 means the area's "
        "rate equals the rate expected from its population; 1.5 means half as many cases again. "
        f"The model is {esc(recipe.get('title') or recipe.get('name') or 'not stated')}, a "
        "Poisson model with log(expected) as offset whose area effects borrow strength from "
        f"other areas; {fitting_sentence(m)}. Intervals are equal-tailed {level} credible "
        f"intervals; exceedance probabilities P(relative risk &gt; t) are given for t = {esc(t_list)}."
    )
    return f'<section id="estimated"><h2>What was estimated</h2><p>{text}</p></section>'


def fitting_sentence(model: dict[str, Any]) -> str:
    """How the posterior was obtained: MCMC settings, or the approximation used."""
    if model.get("approximate"):
        return f"it was approximated, not sampled ({esc(model['approximate'])})"
    sampling = model.get("sampling") or {}
    return (f"it was sampled by MCMC ({esc(sampling.get('chains', '?'))} chains of "
            f"{esc(sampling.get('draws', '?'))} draws after {esc(sampling.get('warmup', '?'))} "
            f"warm-up, seed {esc(model.get('seed'))})")


def diagnostics_section(model: dict[str, Any]) -> str:
    d = model.get("diagnostics") or {}
    if d.get("converged") is None and model.get("approximate"):
        verdict = "approximate preview: no sampler was run, so there is no convergence verdict"
    elif d.get("converged", False):
        verdict = "converged (every check passed)"
    else:
        verdict = "NOT converged"
    rows = [["Verdict", esc(verdict)],
            ["Largest R-hat (want below 1.01)", number(d.get("max_rhat"), 3)],
            ["Smallest bulk ESS (want 400 or more)", number(d.get("min_ess_bulk"), 0)],
            ["Smallest tail ESS (want 400 or more)", number(d.get("min_ess_tail"), 0)],
            ["Divergent transitions (want 0)", esc(d.get("divergences", DASH))],
            ["Smallest E-BFMI (want above 0.3)", number(d.get("min_bfmi"), 2)]]
    loo, waic = model.get("loo") or {}, model.get("waic") or {}
    if loo:
        rows.append(["PSIS-LOO elpd (SE)", f"{number(loo.get('elpd'), 1)} ({number(loo.get('se'), 1)})"])
        rows.append(["Pareto k above 0.7 (areas)",
                     esc(int(loo.get("pareto_k_bad", 0)) + int(loo.get("pareto_k_very_bad", 0)))])
    if waic:
        rows.append(["WAIC elpd (SE)", f"{number(waic.get('elpd'), 1)} ({number(waic.get('se'), 1)})"])
    reasons = "".join(f"<li>{esc(r)}</li>" for r in d.get("reasons") or [])
    return ('<h2 id="diagnostics">Sampler diagnostics</h2>'
            + table_html(["Check", "Value"], rows,
                         caption="Thresholds of Vehtari, Gelman, Simpson, Carpenter &amp; "
                                 "B&uuml;rkner (2021); model comparison by PSIS-LOO and WAIC "
                                 "(Vehtari, Gelman &amp; Gabry 2017).")
            + (f"<ul>{reasons}</ul>" if reasons else ""))


def priors_section(model: dict[str, Any]) -> str:
    recipe = model.get("recipe") or {}
    items = "".join(f"<li>{esc(p)}</li>" for p in model.get("priors") or []) or "<li>not recorded</li>"
    hyper = model.get("hyperparameters") or {}
    rows = [[esc(name), number(v.get("median"), 3), interval_text(v.get("lower"), v.get("upper"), 3)]
            for name, v in hyper.items()]
    return ('<h2 id="priors">Model and priors</h2>'
            f"<p>Recipe <code>{esc(recipe.get('name', '?'))}</code> "
            f"({esc(recipe.get('title', ''))}), structure <code>{esc(recipe.get('structure', '?'))}"
            f"</code>.</p><ul>{items}</ul>"
            + table_html(["Parameter", "Posterior median", "Interval"], rows,
                         caption="Posterior summaries of the intercept (log scale) and variance "
                                 "parameters."))


def provenance_section(run: RunFiles, figure_files: Sequence[Path]) -> str:
    from .provenance import utc_now
    m = run.model
    sampling = m.get("sampling") or {}
    facts = [["Job", esc(m.get("job", ""))], ["Run created", esc(m.get("created", ""))],
             ["Report drawn", esc(utc_now())], ["Random seed", esc(m.get("seed", ""))],
             ["Chains, draws, warm-up", esc(f"{sampling.get('chains')}, {sampling.get('draws')}, "
                                            f"{sampling.get('warmup')}")],
             ["Run folder", f"<code>{esc(run.run_dir.resolve())}</code>"]]
    for key, seconds in (m.get("timings") or {}).items():
        facts.append([esc(key.replace("_", " ")), number(seconds, 1)])
    hashes = [[f"<code>{esc(path)}</code>", f"<code>{esc(digest)}</code>"]
              for path, digest in (m.get("input_hashes") or {}).items()]
    versions = [[esc(name), esc(version)] for name, version in (m.get("package_versions") or {}).items()]
    warnings = "".join(f"<li>{esc(w)}</li>" for w in m.get("warnings") or [])
    files = ", ".join(f"<code>{esc(p.name)}</code>" for p in figure_files)
    return ('<h2 id="provenance">Provenance</h2>'
            + table_html(["Item", "Value"], facts, text_columns=(0, 1))
            + table_html(["Input file", "SHA-256"], hashes, caption="Input files",
                         text_columns=(0, 1))
            + table_html(["Package", "Version"], versions, caption="Package versions",
                         text_columns=(0, 1))
            + (f"<h3>Warnings raised while loading</h3><ul>{warnings}</ul>" if warnings else "")
            + (f'<p class="note">Figure files in <code>{FIGURE_DIR}/</code>: {files}</p>'
               if files else ""))


def cautions_section(run: RunFiles) -> str:
    n = run.suppress_below
    items = [
        ("Small numbers", "Where few cases are expected, one or two cases more or less move the "
         "raw SMR a long way. The smoothed estimates borrow strength from neighbouring areas "
         "and the whole study region, which steadies them but also pulls them towards the "
         "average: a truly unusual small area can be understated."),
        ("Areas, not people", "These are figures about areas. They do not give the risk of any "
         "person living in an area, and a link between area characteristics and area rates "
         "need not hold for individuals (the ecological fallacy)."),
        ("A raised area is a question, not an answer", "A high probability of exceeding the "
         "threshold says that an area's rate is probably above the reference, not why. "
         "Differences in diagnosis, recording, population estimates or chance across many "
         "areas can all produce raised areas. Treat them as prompts for investigation, not as "
         "evidence of a cause."),
        ("Suppressed counts", f"Counts below {n} are not published: they are blank in the "
         "tables, hatched on the maps and left out of the funnel and shrinkage plots. The model "
         "itself used the true counts. Do not publish totals or other figures from which a "
         "suppressed count could be worked out by subtraction."),
        ("No diagnosis of individuals", "Nothing in this report diagnoses, identifies or "
         "assesses any individual."),
        ("Local rules come first", "Follow your local public-health practice for looking into "
         "apparent clusters and the data-protection rules that apply to these data. The "
         f"suppression threshold used here ({n}) is a setting of this job and does not by itself "
         "guarantee compliance."),
    ]
    body = "".join(f"<li><strong>{esc(title)}.</strong> {esc(text)}</li>" for title, text in items)
    return f'<section id="cautions"><h2>Cautions</h2><ul>{body}</ul></section>'


# --- the page --------------------------------------------------------------------------

def write_report(run_dir: Path, *, thresholds: Sequence[float] | None = None,
                 palette: str = DEFAULT_PALETTE, formats: Sequence[str] = ("png", "svg"),
                 dpi: int = PRINT_DPI, embed_dpi: int = EMBED_DPI) -> Path:
    """Draw every map and plot of a finished run into ``run_dir/maps`` and write ``report.html``.

    Reads only the run's files; ``thresholds`` not in the job are computed from
    ``posterior.nc``. Returns the path of the report.
    """
    run_dir = Path(run_dir)
    run = read_run(run_dir)
    thresholds = [float(t) for t in (thresholds or run.thresholds)]
    figures = {**draw_maps(run, thresholds, palette), **draw_plots(run, palette)}
    figure_files: list[Path] = []
    for stem, fig in figures.items():
        if formats:
            figure_files += save_figure(fig, run_dir / FIGURE_DIR, stem, formats, dpi)
    printed = {p.stem: p for p in figure_files if p.suffix == ".png"}
    page = render_page(run, thresholds, figures, figure_files, embed_dpi, printed, dpi)
    path = run_dir / REPORT_HTML
    write_text_atomically(path, page)
    return path


def render_page(run: RunFiles, thresholds: Sequence[float], figures: dict[str, Any],
                figure_files: Sequence[Path], embed_dpi: int = EMBED_DPI,
                printed: dict[str, Path] | None = None, printed_dpi: int = PRINT_DPI) -> str:
    m = run.model
    printed = printed or {}
    title = m.get("title") or m.get("job") or "smootharea run"
    first = figures["relative_risk"]
    suppress_below = run.suppress_below

    def shown(stems: Iterable[str]) -> str:
        return "\n".join(figure_html(s, figures[s], figure_caption(s, suppress_below), embed_dpi,
                                     printed.get(s), printed_dpi)
                         for s in stems if s in figures)

    map_stems = [s for s in figures if s.startswith("exceedance_")] + [
        "smr_vs_relative_risk", "interval_width"]
    plot_stems = ["caterpillar", "funnel", "shrinkage", "hyperparameters", "trace", "rank"]
    contents = "".join(f'<a href="#{a}">{esc(t)}</a>' for a, t in (
        ("estimated", "Estimated"), ("flagged", "Flagged areas"), ("maps", "Maps"),
        ("plots", "Plots"), ("frequentist", "Frequentist"), ("diagnostics", "Diagnostics"),
        ("priors", "Priors"), ("provenance", "Provenance"), ("cautions", "Cautions")))
    first_t = format_ratio(thresholds[0])
    body = [
        '<header class="top">',
        f'<p class="kicker">smootharea report &middot; {esc(m.get("job", ""))} &middot; '
        f'{esc(m.get("period", ""))}</p>',
        f"<h1>{esc(title)}</h1>",
        status_banner(m),
        f'<nav class="contents">{contents}</nav>',
        "</header>",
        what_was_estimated(run, thresholds),
        figure_html("relative_risk", first, figure_caption("relative_risk", suppress_below),
                    embed_dpi, printed.get("relative_risk"), printed_dpi),
        f'<section id="flagged"><h2>Areas flagged higher</h2><p>An area is flagged higher when '
        f"the posterior probability that its relative risk exceeds {esc(first_t)} is above "
        f"{SIGNAL_UPPER:g} (decision rule of Richardson, Thomson, Best &amp; Elliott 2004). "
        "The rank interval shows how settled its place in the order is.</p>",
        flagged_table(run, thresholds),
        all_areas_table(run, thresholds),
        "</section>",
        f'<section id="maps"><h2>Maps</h2>{shown(map_stems)}</section>',
        f'<section id="plots"><h2>Plots</h2>{shown(plot_stems)}</section>',
        frequentist_section(run),
        diagnostics_section(m),
        priors_section(m),
        provenance_section(run, figure_files),
        cautions_section(run),
    ]
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            '<meta name="viewport" content="width=device-width, initial-scale=1">'
            '<link rel="icon" href="data:,">'
            f"<title>{esc(title)} &ndash; smootharea report</title>"
            f"<style>{STYLE}</style></head><body><main>\n"
            + "\n".join(body) + "\n</main></body></html>\n")
