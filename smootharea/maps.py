"""Maps of one finished run: relative risk, exceedance, raw SMR beside smoothed risk, uncertainty.

Everything is drawn from the run folder alone (``results.gpkg``, ``model.json`` and,
for thresholds the job did not ask for, ``posterior.nc``), so maps can be redrawn
without sampling again. Published tables are already masked for disclosure
(:mod:`smootharea.disclosure`); areas with a suppressed count are hatched on every map.

Palettes are ColorBrewer schemes (Brewer, Hatchard & Harrower 2003, Cartography and
Geographic Information Science 30; Harrower & Brewer 2003, The Cartographic Journal 40),
chosen among those marked colour-blind safe. The diverging schemes get lighter towards
their centre in both directions, so class order still reads in grey-scale.
Figures are built as :class:`matplotlib.figure.Figure` objects (no pyplot state).
"""
from __future__ import annotations

import json
import textwrap
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

import geopandas as gpd
import matplotlib
import numpy as np
import pandas as pd
from matplotlib.colors import to_hex
from matplotlib.figure import Figure
from matplotlib.patches import Patch

from .job import threshold_label
from .summarise import SIGNAL_LOWER, SIGNAL_UPPER, exceedance_from_posterior

# Diverging palettes for ratios: low end first, high (raised risk) end last.
DIVERGING_PALETTES = {
    "purple-orange": "PuOr_r",   # ColorBrewer PuOr
    "blue-red": "RdBu_r",        # ColorBrewer RdBu
    "teal-brown": "BrBG_r",      # ColorBrewer BrBG
}
DEFAULT_PALETTE = "purple-orange"
PROBABILITY_PALETTE = "YlOrBr"   # ColorBrewer sequential, colour-blind safe
UNCERTAINTY_PALETTE = "YlGnBu"   # ColorBrewer sequential, colour-blind safe

# Ratio steps above 1; each has its reciprocal below 1, so classes are symmetric in log.
RATIO_LADDER = (1.1, 1.25, 1.5, 2.0, 3.0, 5.0)
EDGE_COLOUR = "#5a5a5a"
HATCH_COLOUR = "#3a3a3a"
MISSING_COLOUR = "#ffffff"
NOTE_COLOUR = "#4d4d4d"
WARNING_COLOUR = "#b30000"
HATCH = "///"
PRINT_DPI = 300


@dataclass
class RunFiles:
    """A finished run folder, read once: the published area table with geometry and the model record."""

    run_dir: Path
    areas: gpd.GeoDataFrame
    model: dict[str, Any]
    _idata: Any = field(default=None, repr=False)

    @property
    def idata(self):
        """The posterior (``posterior.nc``), read on first use."""
        if self._idata is None:
            import arviz as az
            self._idata = az.from_netcdf(self.run_dir / "posterior.nc", engine="h5netcdf")
        return self._idata

    @property
    def has_posterior(self) -> bool:
        return self._idata is not None or (self.run_dir / "posterior.nc").is_file()

    @property
    def thresholds(self) -> list[float]:
        return [float(t) for t in self.model.get("thresholds") or [1.0]]

    @property
    def suppress_below(self) -> int:
        return int(self.model.get("suppress_below") or 0)

    @property
    def interval(self) -> float:
        return float(self.model.get("interval") or 0.95)

    @property
    def suppressed(self) -> np.ndarray:
        if "suppressed" not in self.areas:
            return np.zeros(len(self.areas), dtype=bool)
        return self.areas["suppressed"].fillna(False).astype(bool).to_numpy()


def read_run(run_dir: str | Path) -> RunFiles:
    """Read ``results.gpkg`` (layer ``areas``) and ``model.json`` from a finished run."""
    run_dir = Path(run_dir)
    model = json.loads((run_dir / "model.json").read_text(encoding="utf-8"))
    areas = gpd.read_file(run_dir / "results.gpkg", layer="areas", engine="pyogrio")
    areas["area_id"] = areas["area_id"].astype(str)
    return RunFiles(run_dir=run_dir, areas=areas, model=model)


def exceedance_column(run: RunFiles, threshold: float) -> str:
    """Name of the ``p_above_<t>`` column, computing it from ``posterior.nc`` if the job lacked it."""
    column = f"p_above_{threshold_label(threshold)}"
    if column not in run.areas:
        run.areas[column] = exceedance_from_posterior(run.idata, threshold, run.areas["area_id"])
    return column


# --- classes and colours -------------------------------------------------------------

def symmetric_breaks(values: Sequence[float], min_steps: int = 3, max_steps: int = 5) -> np.ndarray:
    """Class breaks symmetric on the log scale around 1, e.g. 1/1.5, 1/1.25, 1/1.1, 1.1, 1.25, 1.5.

    The number of steps each side grows with the most extreme ratio in ``values``.
    """
    values = np.asarray(values, dtype=float)
    values = values[np.isfinite(values) & (values > 0)]
    extreme = float(np.max(np.maximum(values, 1 / values))) if values.size else 1.0
    steps = int(np.sum(np.asarray(RATIO_LADDER) < extreme))
    steps = min(max(steps, min_steps), max_steps)
    upper = np.asarray(RATIO_LADDER[:steps])
    return np.concatenate([np.sort(1 / upper), upper])


def classify(values: Sequence[float], breaks: Sequence[float]) -> np.ndarray:
    """Class index per value (0 = below the first break); -1 for missing values.

    A value equal to a break falls in the class above it.
    """
    values = np.asarray(pd.to_numeric(pd.Series(values), errors="coerce"), dtype=float)
    classes = np.digitize(values, np.asarray(breaks, dtype=float), right=False)
    return np.where(np.isfinite(values), classes, -1)


def diverging_colours(palette: str, n_classes: int) -> list[str]:
    """``n_classes`` colours from a diverging palette, the middle one its light centre."""
    cmap = matplotlib.colormaps[palette_colormap(palette)]
    return [to_hex(cmap(p)) for p in np.linspace(0.04, 0.96, n_classes)]


def palette_colormap(palette: str) -> str:
    if palette not in DIVERGING_PALETTES:
        raise ValueError(f"unknown palette {palette!r}; choose one of {', '.join(DIVERGING_PALETTES)}")
    return DIVERGING_PALETTES[palette]


def format_ratio(value: float) -> str:
    """Plain number for a legend: 0.6667 -> '0.67', 1.10 -> '1.1', 2.0 -> '2'."""
    text = f"{value:.2f}".rstrip("0").rstrip(".")
    return text


def class_labels(breaks: Sequence[float]) -> list[str]:
    labels = [f"below {format_ratio(breaks[0])}"]
    labels += [f"{format_ratio(a)} to {format_ratio(b)}" for a, b in zip(breaks[:-1], breaks[1:])]
    labels.append(f"{format_ratio(breaks[-1])} or more")
    return labels


def exceedance_class_colours(palette: str) -> list[str]:
    """Three ordered colours (lower / unclear / higher) of clearly different lightness."""
    cmap = matplotlib.colormaps[palette_colormap(palette)]
    return [to_hex(cmap(0.3)), to_hex(cmap(0.5)), to_hex(cmap(0.9))]


def exceedance_classes(probability: Sequence[float]) -> np.ndarray:
    """0 below 0.2, 1 from 0.2 to 0.8, 2 above 0.8 (Richardson et al. 2004 decision rule)."""
    p = np.asarray(probability, dtype=float)
    return np.where(p > SIGNAL_UPPER, 2, np.where(p < SIGNAL_LOWER, 0, 1))


# --- figure furniture ----------------------------------------------------------------

def data_note(model: dict[str, Any], width: int = 150) -> str:
    """One line: period, model, source of counts (the source is shortened if the line is long)."""
    recipe = model.get("recipe") or {}
    parts = []
    if model.get("period"):
        parts.append(f"Period {model['period']}")
    parts.append(f"model: {recipe.get('title') or recipe.get('name') or 'not recorded'}")
    if model.get("source"):
        parts.append(f"counts: {model['source']}")
    return textwrap.shorten("; ".join(parts), width=width, placeholder=" ...")


def status_label(model: dict[str, Any]) -> str | None:
    """A warning stamped on figures of runs that did not converge or are approximate."""
    labels = []
    if (model.get("diagnostics") or {}).get("converged") is False:  # None: approximate run
        labels.append("NOT CONVERGED - do not publish")
    if model.get("approximate"):
        labels.append(f"APPROXIMATE ({model['approximate']})")
    return " | ".join(labels) or None


def map_figure(title: str, model: dict[str, Any], panels: int = 1,
               aspect: float = 0.55) -> tuple[Figure, list, Any]:
    """A figure with ``panels`` map axes, a legend column on the right, title and data note.

    ``aspect`` is the map's height over its width; the figure height follows from it so the
    frame hugs the map.
    """
    width = 8.0 if panels == 1 else 11.0
    top_inches, bottom_inches = 0.95 if panels == 1 else 1.2, 0.45
    ratios = [4.0] * panels + [1.7]
    map_width = width * 0.96 * 4.0 / sum(ratios)
    height = max(3.4 if panels == 1 else 4.6, map_width * aspect + top_inches + bottom_inches)
    fig = Figure(figsize=(width, height))
    grid = fig.add_gridspec(1, panels + 1, width_ratios=ratios, left=0.02, right=0.98,
                            top=1 - top_inches / height, bottom=bottom_inches / height, wspace=0.04)
    axes = [fig.add_subplot(grid[0, i]) for i in range(panels)]
    legend_ax = fig.add_subplot(grid[0, panels])
    legend_ax.set_axis_off()
    for ax in axes:
        clean_frame(ax)
    fig.text(0.02, 1 - 0.12 / height, title, fontsize=13, fontweight="bold", va="top", ha="left")
    subtitle = model.get("title") or model.get("job") or ""
    fig.text(0.02, 1 - 0.42 / height, subtitle, fontsize=9.5, va="top", ha="left", color=NOTE_COLOUR)
    fig.text(0.02, 0.1 / height, data_note(model), fontsize=7, va="bottom", ha="left",
             color=NOTE_COLOUR)
    label = status_label(model)
    if label:
        stamp_status(fig, label, 1 - 0.42 / height)
    return fig, axes, legend_ax


def stamp_status(fig: Figure, label: str, y: float) -> None:
    """The not-converged / approximate warning, right-aligned on the subtitle line."""
    fig.text(0.98, y, label, fontsize=9, fontweight="bold", va="top", ha="right", color="white",
             bbox={"facecolor": WARNING_COLOUR, "edgecolor": "none", "pad": 3})


def clean_frame(ax) -> None:
    """No ticks, no graticule, a thin light frame; no north arrow."""
    ax.set_xticks([])
    ax.set_yticks([])
    for spine in ax.spines.values():
        spine.set_color("#bdbdbd")
        spine.set_linewidth(0.6)


def geometry_aspect(areas: gpd.GeoDataFrame) -> float:
    minx, miny, maxx, maxy = areas.total_bounds
    height, width = maxy - miny, maxx - minx
    if areas.crs is not None and areas.crs.is_geographic:
        width *= np.cos(np.radians((miny + maxy) / 2))
    return float(np.clip(height / width, 0.3, 1.6)) if width > 0 else 1.0


def draw_areas(ax, areas: gpd.GeoDataFrame, colours: Sequence[str]) -> None:
    """Fill each area with its colour; thin grey borders."""
    areas.plot(ax=ax, color=list(colours), edgecolor=EDGE_COLOUR, linewidth=0.25)


def hatch_suppressed(ax, areas: gpd.GeoDataFrame, suppressed: np.ndarray) -> None:
    if suppressed.any():
        areas[suppressed].plot(ax=ax, facecolor="none", edgecolor=HATCH_COLOUR, hatch=HATCH,
                               linewidth=0.0)
        ax.collections[-1].set_hatch_linewidth(0.45)


def suppression_patch(suppress_below: int) -> Patch:
    return Patch(facecolor="white", edgecolor=HATCH_COLOUR, hatch=HATCH,
                 label=f"count below {suppress_below}:\nnot published (disclosure)")


def class_legend(legend_ax, colours: Sequence[str], labels: Sequence[str], title: str,
                 extra: Sequence[Patch] = ()) -> None:
    """Legend with the highest class on top, as a reader expects for a ratio."""
    patches = [Patch(facecolor=c, edgecolor=EDGE_COLOUR, linewidth=0.4, label=l)
               for c, l in zip(colours, labels)][::-1]
    legend_ax.legend(handles=patches + list(extra), title=title, loc="center left",
                     frameon=False, fontsize=8, title_fontsize=8.5, alignment="left",
                     handlelength=1.6, handleheight=1.1)


def finish_map_axes(ax, areas: gpd.GeoDataFrame) -> None:
    minx, miny, maxx, maxy = areas.total_bounds
    pad_x, pad_y = (maxx - minx) * 0.02, (maxy - miny) * 0.02
    ax.set_xlim(minx - pad_x, maxx + pad_x)
    ax.set_ylim(miny - pad_y, maxy + pad_y)
    ax.set_xlabel("")
    ax.set_ylabel("")
    ax.set_aspect(ax.get_aspect(), adjustable="box")  # the frame hugs the map
    clean_frame(ax)


def extra_patches(run: RunFiles) -> list[Patch]:
    return [suppression_patch(run.suppress_below)] if run.suppressed.any() else []


# --- the maps ------------------------------------------------------------------------

def relative_risk_map(run: RunFiles, palette: str = DEFAULT_PALETTE) -> Figure:
    """Posterior mean relative risk in classes symmetric on the log scale around 1."""
    values = run.areas["rr_mean"].to_numpy(dtype=float)
    breaks = symmetric_breaks(values)
    colours = diverging_colours(palette, len(breaks) + 1)
    fig, (ax,), legend_ax = map_figure("Smoothed relative risk (posterior mean)", run.model,
                                       aspect=geometry_aspect(run.areas))
    draw_areas(ax, run.areas, [colours[c] for c in classify(values, breaks)])
    hatch_suppressed(ax, run.areas, run.suppressed)
    finish_map_axes(ax, run.areas)
    class_legend(legend_ax, colours, class_labels(breaks),
                 "Relative risk\n(1 = expected rate)", extra_patches(run))
    return fig


def exceedance_class_map(run: RunFiles, threshold: float, palette: str = DEFAULT_PALETTE) -> Figure:
    """P(relative risk > threshold) in the three classes of the decision rule."""
    probability = run.areas[exceedance_column(run, threshold)].to_numpy(dtype=float)
    colours = exceedance_class_colours(palette)
    t = format_ratio(threshold)
    fig, (ax,), legend_ax = map_figure(f"Probability that the relative risk exceeds {t}",
                                       run.model, aspect=geometry_aspect(run.areas))
    draw_areas(ax, run.areas, [colours[c] for c in exceedance_classes(probability)])
    hatch_suppressed(ax, run.areas, run.suppressed)
    finish_map_axes(ax, run.areas)
    labels = [f"below {SIGNAL_LOWER:g}: likely not above {t}",
              f"{SIGNAL_LOWER:g} to {SIGNAL_UPPER:g}: unclear",
              f"above {SIGNAL_UPPER:g}: likely above {t}"]
    class_legend(legend_ax, colours, labels, f"P(relative risk > {t})\n(probability, 0 to 1)",
                 extra_patches(run))
    return fig


def exceedance_continuous_map(run: RunFiles, threshold: float) -> Figure:
    """P(relative risk > threshold) on a continuous scale, with the 0.2 and 0.8 cut-offs marked."""
    probability = run.areas[exceedance_column(run, threshold)].to_numpy(dtype=float)
    cmap = matplotlib.colormaps[PROBABILITY_PALETTE]
    t = format_ratio(threshold)
    fig, (ax,), legend_ax = map_figure(f"Probability that the relative risk exceeds {t} (continuous)",
                                       run.model, aspect=geometry_aspect(run.areas))
    draw_areas(ax, run.areas, [to_hex(cmap(p)) for p in probability])
    hatch_suppressed(ax, run.areas, run.suppressed)
    finish_map_axes(ax, run.areas)
    colourbar_legend(fig, legend_ax, cmap, 0.0, 1.0, f"P(relative risk > {t})",
                     ticks=[0, SIGNAL_LOWER, 0.5, SIGNAL_UPPER, 1], marks=[SIGNAL_LOWER, SIGNAL_UPPER])
    if run.suppressed.any():
        legend_ax.legend(handles=extra_patches(run), loc="lower left", frameon=False, fontsize=8)
    return fig


def colourbar_legend(fig: Figure, legend_ax, cmap, low: float, high: float, title: str,
                     ticks: Sequence[float] | None = None, marks: Sequence[float] = ()) -> None:
    """A vertical colour bar placed in the upper part of the legend column."""
    from matplotlib.cm import ScalarMappable
    from matplotlib.colors import Normalize
    box = legend_ax.get_position()
    bar_ax = fig.add_axes([box.x0 + 0.01, box.y0 + box.height * 0.35, 0.025, box.height * 0.55])
    bar = fig.colorbar(ScalarMappable(norm=Normalize(low, high), cmap=cmap), cax=bar_ax)
    bar.set_label(title, fontsize=8.5)
    bar.ax.tick_params(labelsize=8)
    if ticks is not None:
        bar.set_ticks(list(ticks))
    for mark in marks:
        bar.ax.axhline(mark, color="black", linewidth=0.8)


def smr_and_risk_map(run: RunFiles, palette: str = DEFAULT_PALETTE) -> Figure:
    """Raw SMR and smoothed relative risk side by side on one shared class scale."""
    smr = pd.to_numeric(run.areas["smr"], errors="coerce").to_numpy(dtype=float)
    risk = run.areas["rr_mean"].to_numpy(dtype=float)
    breaks = symmetric_breaks(np.concatenate([smr[np.isfinite(smr)], risk]))
    colours = diverging_colours(palette, len(breaks) + 1)
    fig, axes, legend_ax = map_figure("Raw SMR beside smoothed relative risk (same scale)",
                                      run.model, panels=2, aspect=geometry_aspect(run.areas))
    for ax, values, heading in ((axes[0], smr, "Raw SMR (observed / expected)"),
                                (axes[1], risk, "Smoothed relative risk (posterior mean)")):
        classes = classify(values, breaks)
        draw_areas(ax, run.areas, [colours[c] if c >= 0 else MISSING_COLOUR for c in classes])
        hatch_suppressed(ax, run.areas, run.suppressed)
        finish_map_axes(ax, run.areas)
        ax.set_title(heading, fontsize=10, loc="left")
    class_legend(legend_ax, colours, class_labels(breaks), "Ratio\n(1 = expected rate)",
                 extra_patches(run))
    return fig


def interval_width_map(run: RunFiles) -> Figure:
    """Width of the credible interval of the relative risk: where the map is least certain."""
    width = (run.areas["rr_upper"] - run.areas["rr_lower"]).to_numpy(dtype=float)
    cmap = matplotlib.colormaps[UNCERTAINTY_PALETTE]
    high = float(np.nanmax(width)) if np.isfinite(width).any() else 1.0
    level = f"{run.interval * 100:g}%"
    fig, (ax,), legend_ax = map_figure(f"Uncertainty: width of the {level} credible interval",
                                       run.model, aspect=geometry_aspect(run.areas))
    draw_areas(ax, run.areas, [to_hex(cmap(w / high)) for w in width])
    hatch_suppressed(ax, run.areas, run.suppressed)
    finish_map_axes(ax, run.areas)
    colourbar_legend(fig, legend_ax, cmap, 0.0, high,
                     "Interval width\n(relative-risk units)")
    if run.suppressed.any():
        legend_ax.legend(handles=extra_patches(run), loc="lower left", frameon=False, fontsize=8)
    return fig


def draw_maps(run: RunFiles, thresholds: Sequence[float] | None = None,
              palette: str = DEFAULT_PALETTE) -> dict[str, Figure]:
    """Every map of a run, keyed by file stem, in the order a report shows them."""
    thresholds = list(thresholds or run.thresholds)
    figures = {"relative_risk": relative_risk_map(run, palette)}
    for threshold in thresholds:
        label = threshold_label(threshold)
        figures[f"exceedance_{label}"] = exceedance_class_map(run, threshold, palette)
        figures[f"exceedance_{label}_continuous"] = exceedance_continuous_map(run, threshold)
    figures["smr_vs_relative_risk"] = smr_and_risk_map(run, palette)
    figures["interval_width"] = interval_width_map(run)
    return figures


def save_figure(fig: Figure, directory: Path, stem: str, formats: Sequence[str] = ("png", "svg"),
                dpi: int = PRINT_DPI) -> list[Path]:
    """Write one figure in each format (PNG at print resolution; SVG is vector)."""
    directory.mkdir(parents=True, exist_ok=True)
    paths = []
    for fmt in formats:
        path = directory / f"{stem}.{fmt}"
        fig.savefig(path, format=fmt, dpi=dpi, metadata=_metadata(fmt))
        paths.append(path)
    return paths


def _metadata(fmt: str) -> dict[str, Any] | None:
    # Leave out creation dates so the same run redraws to identical files.
    if fmt == "svg":
        return {"Date": None}
    if fmt == "pdf":
        return {"CreationDate": None}
    return None
