"""Maps and plots drawn from a real short run of the North Carolina SIDS job.

Data: Cressie (1993) SIDS counts via libpysal (see fixtures_runs.py).
"""
from __future__ import annotations

import math
import xml.etree.ElementTree as ElementTree

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
from PIL import Image
from scipy import stats

from fixtures_runs import nc_run_dir  # noqa: F401 - session fixture
from smootharea.maps import (DIVERGING_PALETTES, class_labels, diverging_colours,
                             exceedance_class_colours, exceedance_class_map, exceedance_classes,
                             read_run, relative_risk_map, symmetric_breaks)
from smootharea.plots import funnel_plot, poisson_funnel_limits, shrinkage_plot

pytestmark = pytest.mark.slow  # the shared fixture samples a model


# --- helpers -------------------------------------------------------------------------

def hex_to_rgb(colour: str) -> np.ndarray:
    colour = colour.lstrip("#")
    return np.array([int(colour[i:i + 2], 16) for i in (0, 2, 4)], dtype=float)


def cie_lightness(colour: str) -> float:
    """CIE 1976 L* of an sRGB colour (IEC 61966-2-1 linearisation; common practice)."""
    c = hex_to_rgb(colour) / 255
    linear = np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)
    y = float(linear @ np.array([0.2126, 0.7152, 0.0722]))
    f = y ** (1 / 3) if y > (6 / 29) ** 3 else y / (3 * (6 / 29) ** 2) + 4 / 29
    return 116 * f - 16


def pixel_at(png_path, fig, ax, point, dpi: int) -> np.ndarray:
    """Median RGB of the 3x3 block around a data point in a PNG saved from ``fig`` at ``dpi``."""
    x, y = ax.transData.transform((point.x, point.y)) * (dpi / fig.dpi)
    with Image.open(png_path) as image:
        pixels = np.asarray(image.convert("RGB"), dtype=float)
    row, col = int(round(pixels.shape[0] - y)), int(round(x))
    block = pixels[row - 1:row + 2, col - 1:col + 2].reshape(-1, 3)
    return np.median(block, axis=0)


def largest_unhatched_areas(run, count: int = 5) -> gpd.GeoDataFrame:
    shown = run.areas[~run.suppressed]
    order = shown.geometry.area.sort_values(ascending=False).index[:count]
    return shown.loc[order]


def bracket(label: str) -> tuple[float, float]:
    """Bounds of a legend label: 'below a', 'a to b', 'a or more'."""
    if label.startswith("below "):
        return 0.0, float(label.split()[1])
    if label.endswith(" or more"):
        return float(label.split()[0]), math.inf
    low, high = label.split(" to ")
    return float(low), float(high)


# --- classes and palettes (no run needed) ----------------------------------------------

def test_breaks_are_symmetric_on_the_log_scale():
    # Common practice for ratio maps: a class edge at r has its partner at 1/r.
    breaks = symmetric_breaks([0.4, 0.9, 1.3, 2.6])
    assert np.allclose(breaks * breaks[::-1], 1.0)
    assert breaks[len(breaks) // 2 - 1] < 1 < breaks[len(breaks) // 2]
    assert class_labels([1 / 1.5, 1 / 1.25, 1 / 1.1, 1.1, 1.25, 1.5]) == [
        "below 0.67", "0.67 to 0.8", "0.8 to 0.91", "0.91 to 1.1", "1.1 to 1.25",
        "1.25 to 1.5", "1.5 or more"]


@pytest.mark.parametrize("palette", sorted(DIVERGING_PALETTES))
def test_diverging_palettes_get_lighter_towards_the_centre(palette):
    # Readable in grey-scale: CIE L* rises monotonically from each end to the centre
    # (property of ColorBrewer diverging schemes, Harrower & Brewer 2003).
    lightness = [cie_lightness(c) for c in diverging_colours(palette, 9)]
    assert all(a < b for a, b in zip(lightness[:4], lightness[1:5]))
    assert all(a > b for a, b in zip(lightness[4:], lightness[5:]))
    assert lightness[4] > 85


def test_exceedance_classes_follow_the_decision_rule():
    # Richardson, Thomson, Best & Elliott (2004): above 0.8 higher, below 0.2 lower.
    assert list(exceedance_classes([0.05, 0.2, 0.5, 0.8, 0.81])) == [0, 1, 1, 1, 2]
    lightness = [cie_lightness(c) for c in exceedance_class_colours("purple-orange")]
    assert min(abs(a - b) for a in lightness for b in lightness if a != b) > 15  # grey-scale


# --- funnel limits ---------------------------------------------------------------------

@pytest.mark.parametrize("expected", [2.5, 20.0, 150.0])
@pytest.mark.parametrize("coverage", [0.95, 0.998])
def test_funnel_limits_are_interpolated_exact_poisson_quantiles(expected, coverage):
    # Spiegelhalter (2005, Statistics in Medicine 24): r_p = Poisson quantile of ratio*E,
    # alpha = (F(r_p) - p) / (F(r_p) - F(r_p - 1)), limit = (r_p - alpha) / E.
    # Reference quantiles and CDF from scipy.stats.poisson.
    ratio = 1.2
    lower, upper = poisson_funnel_limits(expected, ratio, coverage)
    for p, limit in (((1 - coverage) / 2, lower), ((1 + coverage) / 2, upper)):
        r = stats.poisson.ppf(p, ratio * expected)
        assert stats.poisson.cdf(r - 1, ratio * expected) < p <= stats.poisson.cdf(r, ratio * expected)
        f_r, f_below = stats.poisson.cdf([r, r - 1], ratio * expected)
        reference = (r - (f_r - p) / (f_r - f_below)) / expected
        assert float(limit) == pytest.approx(max(reference, 0.0), rel=1e-12, abs=1e-12)
        assert (r - 1) / expected <= float(limit) <= r / expected


def test_funnel_limits_approach_the_normal_approximation_for_large_counts():
    # For large E the Poisson limits tend to ratio +- z * sqrt(ratio / E) (common practice).
    expected, ratio = 40000.0, 1.0
    lower, upper = poisson_funnel_limits(expected, ratio, 0.95)
    half_width = stats.norm.ppf(0.975) * math.sqrt(ratio / expected)
    assert float(upper) == pytest.approx(ratio + half_width, abs=2e-4)
    assert float(lower) == pytest.approx(ratio - half_width, abs=2e-4)


# --- maps of the real run --------------------------------------------------------------

def test_relative_risk_map_colours_areas_by_their_class(nc_run_dir):
    # Read the rendered colour of an area's interior back from the PNG the run wrote.
    run = read_run(nc_run_dir)
    fig = relative_risk_map(run)
    ax = fig.axes[0]
    png = nc_run_dir / "maps" / "relative_risk.png"
    breaks = symmetric_breaks(run.areas["rr_mean"])
    colours = diverging_colours("purple-orange", len(breaks) + 1)
    labels = class_labels(breaks)
    checked = 0
    for _, area in largest_unhatched_areas(run).iterrows():
        risk = float(area["rr_mean"])
        expected_class = int(np.sum(breaks <= risk))  # edges belong to the class above
        low, high = bracket(labels[expected_class])
        assert low <= risk < high
        rgb = pixel_at(png, fig, ax, area.geometry.representative_point(), dpi=300)
        distances = [np.abs(rgb - hex_to_rgb(c)).max() for c in colours]
        assert int(np.argmin(distances)) == expected_class
        assert distances[expected_class] <= 3
        checked += 1
    assert checked == 5


def test_exceedance_map_colours_a_raised_area_as_raised(nc_run_dir, tmp_path):
    run = read_run(nc_run_dir)
    fig = exceedance_class_map(run, 1.0)
    png = tmp_path / "exceedance.png"
    fig.savefig(png, dpi=100)
    candidates = largest_unhatched_areas(run, count=len(run.areas))
    colours = exceedance_class_colours("purple-orange")
    for wanted, select in ((2, candidates["p_above_1"] > 0.8), (0, candidates["p_above_1"] < 0.2)):
        if not select.any():
            continue
        area = candidates[select].iloc[0]
        rgb = pixel_at(png, fig, fig.axes[0], area.geometry.representative_point(), dpi=100)
        distances = [np.abs(rgb - hex_to_rgb(c)).max() for c in colours]
        assert int(np.argmin(distances)) == wanted


def test_legend_reads_in_plain_numbers_with_units(nc_run_dir):
    run = read_run(nc_run_dir)
    fig = relative_risk_map(run)
    legend = fig.axes[1].get_legend()
    texts = [t.get_text() for t in legend.get_texts()]
    assert "Relative risk" in legend.get_title().get_text()
    assert any("not published" in t for t in texts)  # the hatch is explained
    assert not any("10^" in t or "e+" in t or "$" in t for t in texts)
    assert all(fig_text.get_text() for fig_text in fig.texts[:3])  # title, subtitle, data note


def test_maps_are_written_as_print_png_and_svg(nc_run_dir):
    maps = nc_run_dir / "maps"
    for stem in ("relative_risk", "exceedance_1", "exceedance_1_continuous",
                 "smr_vs_relative_risk", "interval_width", "caterpillar", "funnel", "shrinkage"):
        with Image.open(maps / f"{stem}.png") as image:
            assert image.info["dpi"][0] == pytest.approx(300, abs=1)
            assert image.width >= 2000
        root = ElementTree.parse(maps / f"{stem}.svg").getroot()
        assert root.tag.endswith("svg")


def test_results_gpkg_carries_the_same_fields_as_areas_csv(nc_run_dir):
    table = pd.read_csv(nc_run_dir / "areas.csv", dtype={"area_id": str})
    layer = gpd.read_file(nc_run_dir / "results.gpkg", layer="areas")
    assert list(layer.columns.drop("geometry")) == list(table.columns)
    layer["area_id"] = layer["area_id"].astype(str)
    for column in ("rr_mean", "rr_lower", "rr_upper", "p_above_1", "smr"):
        assert np.allclose(pd.to_numeric(layer[column]).to_numpy(dtype=float),
                           table[column].to_numpy(dtype=float), equal_nan=True)


def test_funnel_and_shrinkage_leave_out_suppressed_areas(nc_run_dir):
    run = read_run(nc_run_dir)
    shown = int((~run.suppressed).sum())
    assert 0 < shown < len(run.areas)  # NC SIDS 1974: many counties have fewer than 5 deaths
    for make in (funnel_plot, shrinkage_plot):
        fig = make(run)
        points = [c for c in fig.axes[0].collections if len(c.get_offsets())]
        assert sum(len(c.get_offsets()) for c in points) == shown
        assert f"{len(run.areas) - shown} area(s)" in fig.axes[0].get_title(loc="left")
