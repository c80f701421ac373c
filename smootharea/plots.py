"""Plots of one finished run: caterpillar with rank intervals, funnel, shrinkage, hyperparameters,
trace and rank plots.

Disclosure: the funnel and shrinkage plots show SMRs, from which a count can be read back
(O = SMR x E), so areas whose count is suppressed are left out of both, and each plot says
how many were left out. The caterpillar plot shows only posterior quantities.
"""
from __future__ import annotations

from typing import Any, Sequence

import matplotlib
import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from scipy import stats

from .maps import (DEFAULT_PALETTE, NOTE_COLOUR, RunFiles, data_note, exceedance_class_colours,
                   palette_colormap, stamp_status, status_label)
from .summarise import SIGNAL_LOWER, SIGNAL_UPPER

FUNNEL_COVERAGES = (0.95, 0.998)
HYPERPARAMETERS = ("sigma", "phi", "sigma_spatial", "sigma_unstructured", "sigma_icar")
CHAIN_VARIABLES = ("intercept", "beta", "sigma", "phi", "sigma_spatial", "sigma_unstructured",
                   "sigma_icar")
LABELLED_AREAS_MAX = 60


# --- funnel limits ---------------------------------------------------------------------

def poisson_funnel_limits(expected: Sequence[float] | float, ratio: float = 1.0,
                          coverage: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Exact Poisson control limits for an SMR with expected count E around ``ratio``.

    Spiegelhalter (2005, Statistics in Medicine 24), funnel plots for Poisson counts: with
    O ~ Poisson(ratio * E) and p = (1 - coverage) / 2 (then 1 - p), take the quantile
    r_p = smallest r with F(r) >= p, interpolate
    alpha = (F(r_p) - p) / (F(r_p) - F(r_p - 1)), and plot the limit (r_p - alpha) / E.
    (The interpolation step is restated from memory of the paper's appendix; the tests
    rebuild it from scipy's Poisson quantiles.)
    """
    expected = np.asarray(expected, dtype=float)
    mean = ratio * expected
    limits = []
    for p in ((1 - coverage) / 2, (1 + coverage) / 2):
        quantile = stats.poisson.ppf(p, mean)
        at = stats.poisson.cdf(quantile, mean)
        below = stats.poisson.cdf(quantile - 1, mean)
        alpha = np.where(at > below, (at - p) / np.where(at > below, at - below, 1.0), 0.0)
        limits.append(np.maximum(quantile - alpha, 0.0) / expected)
    return limits[0], limits[1]


def overall_ratio(run: RunFiles) -> float:
    """Sum of observed over sum of expected, from the true counts in ``posterior.nc``.

    Only the total is used; it is an aggregate, and equals 1 under internal standardisation.
    """
    if run.has_posterior and "observed_data" in run.idata.groups():
        counts = run.idata.observed_data["observed"]
        order = [str(a) for a in counts["area"].values]
        observed = pd.Series(counts.values, index=order).loc[run.areas["area_id"]].to_numpy()
        return float(observed.sum() / run.areas["expected"].sum())
    return 1.0


# --- figure furniture ------------------------------------------------------------------

def plot_figure(title: str, model: dict[str, Any], width: float = 8.0, height: float = 5.0,
                rows: int = 1, cols: int = 1, **subplot_kw) -> tuple[Figure, np.ndarray]:
    fig = Figure(figsize=(width, height))
    top = 1 - 1.0 / height
    axes = fig.subplots(rows, cols, squeeze=False, gridspec_kw={
        "left": 0.1, "right": 0.97, "top": top, "bottom": 0.55 / height + 0.07,
        "hspace": 0.45, "wspace": 0.25, **subplot_kw})
    fig.text(0.02, 1 - 0.12 / height, title, fontsize=13, fontweight="bold", va="top")
    fig.text(0.02, 1 - 0.42 / height, model.get("title") or model.get("job") or "",
             fontsize=9.5, va="top", color=NOTE_COLOUR)
    fig.text(0.02, 0.1 / height, data_note(model), fontsize=7, va="bottom", color=NOTE_COLOUR)
    label = status_label(model)
    if label:
        stamp_status(fig, label, 1 - 0.42 / height)
    return fig, axes


def light_axes(ax) -> None:
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.grid(True, color="#e6e6e6", linewidth=0.6)
    ax.set_axisbelow(True)


def ratio_axis(axis) -> None:
    """Log scale with ticks at powers of 2 around 1, labelled in plain numbers."""
    from matplotlib.ticker import FixedLocator, FuncFormatter, NullFormatter
    axis.set_major_locator(FixedLocator([2.0 ** k for k in range(-6, 7)]))
    axis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
    axis.set_minor_formatter(NullFormatter())


def plain_log_axis(axis) -> None:
    from matplotlib.ticker import FuncFormatter
    axis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))


def signal_colours(palette: str) -> dict[str, str]:
    from matplotlib.colors import to_hex
    cmap = matplotlib.colormaps[palette_colormap(palette)]
    return {"lower": to_hex(cmap(0.12)), "unclear": "#8c8c8c", "higher": to_hex(cmap(0.9))}


# --- the plots -------------------------------------------------------------------------

def caterpillar_plot(run: RunFiles, palette: str = DEFAULT_PALETTE) -> Figure:
    """Relative risks with credible intervals, areas ordered by posterior median, beside rank intervals."""
    table = run.areas.sort_values("rr_median", kind="stable").reset_index(drop=True)
    n = len(table)
    height = min(max(4.5, 0.12 * n + 1.8), 12.0)
    level = f"{run.interval * 100:g}%"
    fig, axes = plot_figure("Relative risks ranked, with intervals", run.model, width=9.0,
                            height=height, cols=2, width_ratios=[3, 2])
    risk_ax, rank_ax = axes[0]
    position = np.arange(n)
    colours = signal_colours(palette)
    point_colours = [colours.get(s, "#8c8c8c") for s in table["signal"]]
    thin = 0.6 if n > 150 else 1.0
    risk_ax.hlines(position, table["rr_lower"], table["rr_upper"], color=point_colours,
                   linewidth=thin)
    risk_ax.scatter(table["rr_median"], position, c=point_colours, s=8 if n > 150 else 14,
                    zorder=3)
    risk_ax.axvline(1.0, color="black", linewidth=0.8)
    risk_ax.set_xscale("log")
    ratio_axis(risk_ax.xaxis)
    risk_ax.set_xlabel(f"Relative risk: posterior median and {level} credible interval")
    rank_ax.hlines(position, table["rank_lower"], table["rank_upper"], color=point_colours,
                   linewidth=thin)
    rank_ax.scatter(table["rank_median"], position, c=point_colours, s=8 if n > 150 else 14,
                    zorder=3)
    rank_ax.set_xlabel(f"Rank (1 = highest): median, {level} interval")
    rank_ax.invert_xaxis()
    for ax in (risk_ax, rank_ax):
        light_axes(ax)
        ax.set_ylim(-1, n)
    if n <= LABELLED_AREAS_MAX:
        risk_ax.set_yticks(position, table["area_id"], fontsize=7)
    else:
        risk_ax.set_yticks([])
        risk_ax.set_ylabel(f"{n} areas, ordered by posterior median")
    rank_ax.set_yticks([])
    first = run.thresholds[0]
    legend = [Line2D([], [], color=colours[k], marker="o", linewidth=1, label=label)
              for k, label in (("higher", f"P(RR > {first:g}) above {SIGNAL_UPPER:g}"),
                               ("unclear", "unclear"),
                               ("lower", f"P(RR > {first:g}) below {SIGNAL_LOWER:g}"))]
    risk_ax.legend(handles=legend, loc="lower right", fontsize=7.5, frameon=True)
    return fig


def visible_smr(run: RunFiles) -> pd.DataFrame:
    """Areas whose SMR may be shown (count not suppressed), with SMR, E and posterior mean."""
    smr = pd.to_numeric(run.areas["smr"], errors="coerce")
    keep = ~run.suppressed & smr.notna().to_numpy()
    return pd.DataFrame({"area_id": run.areas["area_id"][keep].to_numpy(),
                         "smr": smr[keep].to_numpy(dtype=float),
                         "expected": run.areas["expected"][keep].to_numpy(dtype=float),
                         "rr_mean": run.areas["rr_mean"][keep].to_numpy(dtype=float)})


def left_out_note(run: RunFiles) -> str:
    hidden = int(run.suppressed.sum())
    if not hidden:
        return "All areas shown."
    return (f"{hidden} area(s) with a count below {run.suppress_below} are left out "
            "(their SMR would reveal the count).")


def funnel_plot(run: RunFiles, palette: str = DEFAULT_PALETTE) -> Figure:
    """SMR against expected count with exact Poisson 95% and 99.8% limits (Spiegelhalter 2005)."""
    shown = visible_smr(run)
    ratio = overall_ratio(run)
    fig, axes = plot_figure("Funnel plot: SMR against expected count", run.model, height=5.4)
    ax = axes[0, 0]
    expected_all = run.areas["expected"].to_numpy(dtype=float)
    grid = np.geomspace(max(expected_all.min() * 0.8, 1e-3), expected_all.max() * 1.2, 300)
    cmap = matplotlib.colormaps[palette_colormap(palette)]
    styles = {0.95: ("--", cmap(0.8)), 0.998: ("-", cmap(0.97))}
    for coverage in FUNNEL_COVERAGES:
        lower, upper = poisson_funnel_limits(grid, ratio, coverage)
        style, colour = styles[coverage]
        ax.plot(grid, upper, style, color=colour, linewidth=1.2,
                label=f"{coverage * 100:g}% limits")
        ax.plot(grid, lower, style, color=colour, linewidth=1.2)
    ax.axhline(ratio, color="black", linewidth=0.8, label=f"overall ratio {ratio:.2f}")
    ax.scatter(shown["expected"], shown["smr"], s=16, color="#404040", zorder=3,
               label="area (SMR)")
    ax.set_xscale("log")
    plain_log_axis(ax.xaxis)
    ax.set_xlabel("Expected count E (log scale)")
    ax.set_ylabel("SMR = observed / expected")
    ax.set_ylim(bottom=0)
    light_axes(ax)
    ax.legend(fontsize=8, loc="upper right")
    ax.set_title(left_out_note(run), fontsize=8, loc="left", color=NOTE_COLOUR)
    return fig


def shrinkage_plot(run: RunFiles, palette: str = DEFAULT_PALETTE) -> Figure:
    """Raw SMR against smoothed relative risk, point area proportional to expected count."""
    shown = visible_smr(run)
    fig, axes = plot_figure("Shrinkage: raw SMR against smoothed relative risk", run.model,
                            height=5.6)
    ax = axes[0, 0]
    floor = 0.05
    smr = np.maximum(shown["smr"].to_numpy(), floor)  # SMR 0 cannot sit on a log axis
    sizes = 12 + 120 * shown["expected"] / max(shown["expected"].max(), 1e-9)
    colour = exceedance_class_colours(palette)[2]
    ax.scatter(smr, shown["rr_mean"], s=sizes, color=colour, alpha=0.65, edgecolor="#404040",
               linewidth=0.4, zorder=3)
    values = np.concatenate([smr, shown["rr_mean"].to_numpy(), [0.5, 2.0]])
    low, high = values.min() * 0.8, values.max() * 1.25
    ax.plot([low, high], [low, high], color="black", linewidth=0.8, label="no shrinkage (y = x)")
    ax.axhline(1.0, color="#8c8c8c", linewidth=0.6)
    ax.set_xscale("log")
    ax.set_yscale("log")
    ratio_axis(ax.xaxis)
    ratio_axis(ax.yaxis)
    ax.set_xlim(low, high)
    ax.set_ylim(low, high)
    ax.set_xlabel("Raw SMR (log scale)")
    ax.set_ylabel("Smoothed relative risk, posterior mean (log scale)")
    light_axes(ax)
    ax.legend(handles=[Line2D([], [], color="black", linewidth=0.8, label="no shrinkage (y = x)"),
                       Line2D([], [], marker="o", linestyle="", color=colour,
                              label="area; larger point = larger expected count")],
              fontsize=8, loc="upper left")
    ax.set_title(left_out_note(run), fontsize=8, loc="left", color=NOTE_COLOUR)
    return fig


def hyperparameter_names(run: RunFiles) -> list[str]:
    posterior = run.idata.posterior
    return [n for n in HYPERPARAMETERS if n in posterior and posterior[n].ndim == 2]


def hyperparameter_plot(run: RunFiles, palette: str = DEFAULT_PALETTE) -> Figure | None:
    """Posterior histograms of sigma and phi (BYM2) or the model's SD parameters."""
    names = hyperparameter_names(run)
    if not names:
        return None
    descriptions = {"sigma": "sigma: SD of the area effects (log scale)",
                    "phi": "phi: share of that variance that is spatial",
                    "sigma_spatial": "SD of the spatial (ICAR) effect",
                    "sigma_unstructured": "SD of the unstructured effect",
                    "sigma_icar": "SD of the ICAR effect"}
    fig, axes = plot_figure("Posterior of the model's variance parameters", run.model,
                            width=4.2 * len(names) + 1, height=4.2, cols=len(names))
    low, high = (1 - run.interval) / 2, (1 + run.interval) / 2
    colour = matplotlib.colormaps[palette_colormap(palette)](0.2)
    for ax, name in zip(axes[0], names):
        draws = run.idata.posterior[name].values.ravel()
        ax.hist(draws, bins=40, color=colour, alpha=0.8, density=True)
        for q in np.quantile(draws, [low, high]):
            ax.axvline(q, color="black", linestyle="--", linewidth=0.8)
        ax.axvline(np.median(draws), color="black", linewidth=1.0)
        ax.set_xlabel(descriptions.get(name, name), fontsize=8.5)
        ax.set_yticks([])
        light_axes(ax)
        ax.set_title(f"median {np.median(draws):.3g}, {run.interval * 100:g}% interval "
                     f"{np.quantile(draws, low):.3g} to {np.quantile(draws, high):.3g}",
                     fontsize=8, loc="left")
    return fig


def chain_variables(run: RunFiles) -> list[str]:
    posterior = run.idata.posterior
    names = []
    for name in CHAIN_VARIABLES:
        if name in posterior and np.ptp(posterior[name].values) > 0:
            names.append(name)
    return names


def panel_count(run: RunFiles, names: Sequence[str]) -> int:
    posterior = run.idata.posterior
    return int(sum(np.prod([posterior[n].sizes[d] for d in posterior[n].dims
                            if d not in ("chain", "draw")] or [1]) for n in names))


def trace_plot(run: RunFiles) -> Figure | None:
    """ArviZ trace plot of the intercept, covariate effects and variance parameters."""
    import arviz as az
    names = chain_variables(run)
    if not names:
        return None
    fig = Figure(figsize=(9.0, 1.9 * len(names) + 1.0))
    axes = fig.subplots(len(names), 2, squeeze=False,
                        gridspec_kw={"top": 1 - 0.6 / (1.9 * len(names) + 1.0), "hspace": 0.7})
    az.plot_trace(run.idata, var_names=names, axes=axes, compact=True, show=False)
    fig.text(0.02, 0.995, "Trace plots: chains should overlap and show no trend",
             fontsize=12, fontweight="bold", va="top")
    return fig


def rank_plot(run: RunFiles) -> Figure | None:
    """ArviZ rank plot (Vehtari et al. 2021): flat histograms mean the chains agree."""
    import arviz as az
    names = chain_variables(run)
    if not names:
        return None
    panels = panel_count(run, names)
    cols = min(panels, 3)
    rows = int(np.ceil(panels / cols))
    height = 2.4 * rows + 1.1
    fig = Figure(figsize=(3.3 * cols, height))
    axes = fig.subplots(rows, cols, squeeze=False,
                        gridspec_kw={"top": 1 - 0.7 / height, "bottom": 0.55 / height,
                                     "hspace": 0.7, "wspace": 0.35})
    az.plot_rank(run.idata, var_names=names, ax=axes.ravel()[:panels], show=False)
    for ax in axes.ravel()[panels:]:
        ax.set_visible(False)
    fig.text(0.02, 0.995, "Rank plots: roughly flat bars in every chain are wanted",
             fontsize=12, fontweight="bold", va="top")
    return fig


def draw_plots(run: RunFiles, palette: str = DEFAULT_PALETTE) -> dict[str, Figure]:
    """Every plot of a run, keyed by file stem; posterior-based plots need ``posterior.nc``."""
    figures: dict[str, Figure | None] = {
        "caterpillar": caterpillar_plot(run, palette),
        "funnel": funnel_plot(run, palette),
        "shrinkage": shrinkage_plot(run, palette),
    }
    if run.has_posterior:
        figures["hyperparameters"] = hyperparameter_plot(run, palette)
        figures["trace"] = trace_plot(run)
        figures["rank"] = rank_plot(run)
    return {name: fig for name, fig in figures.items() if fig is not None}
