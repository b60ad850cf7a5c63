"""Figures of a neutrality test, as PNG files (optional: needs the ``plot`` extra, matplotlib).

Every figure is drawn from a :class:`~driftscreen.results.NeutralityResult` alone, from its
null distributions and its diagnostic tables, never by recomputing a statistic. Drawing
goes through matplotlib's Agg canvas directly (no pyplot), so no display and no global
state are involved. Per dataset, in a folder:

* ``<dataset>_null.png``: the null distribution of every statistic (histogram of the
  neutral replicates) with the observed value marked and the p-value in the title;
* ``<dataset>_taylor.png``: mean against variance of every taxon's relative abundance
  (log-log) with the neutral expectation p (1 - p)/(1 + theta) and the fitted Taylor line
  (Taylor 1961, Nature 189:732);
* ``<dataset>_volatility.png`` (time series): the volatility of random groups of taxa
  against their fitted abundance, 1 being neutral (after Washburne et al. 2016, PLoS
  Comput. Biol. 12:e1005124);
* ``<dataset>_taxa.png``: occupancy against mean relative abundance of every taxon (or
  pool of rare taxa) of the per-taxon scan, with the neutral expectation, the 95% band of
  the re-fitted replicates and the taxa at q <= 0.05 marked by direction (after Sloan et
  al. 2006, Environ. Microbiol. 8:732); colours and markers stay apart for colour-blind
  readers (blue circles, orange upward and purple downward triangles, black diamonds,
  grey band).

Files are written through a temporary file and a rename, so a final name never holds half
a figure.
"""

from __future__ import annotations

import hashlib
import io
import math
import os
import re
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from driftscreen.errors import InputError
from driftscreen.files import atomic_write_bytes
from driftscreen.report.format import number, pvalue_text
from driftscreen.report.text import volatility_classes
from driftscreen.statistics.registry import COMBINED, statistic_class

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.axis import Axis
    from matplotlib.figure import Figure

    from driftscreen.results import NeutralityResult, StatisticResult

#: What the value of ``combined`` is.
COMBINED_AXIS = "-log10 of the harmonic mean p-value"
DPI = 120
OBSERVED_COLOUR = "#c0392b"
NULL_COLOUR = "#8fb3d9"
NEUTRAL_COLOUR = "#555555"
SUFFIXES = ("null", "taylor", "volatility", "taxa")
#: The per-taxon figure: within the band, above and below the neutral occupancy.
TAXON_COLOURS = {"within": "#2b6cb0", "above": "#e08a00", "below": "#7b3294",
                 "other": "#1a1a1a"}
BAND_COLOUR = "#cccccc"
#: Tick positions offered on the per-taxon figure's abundance axis (log scale).
SHARE_TICKS = (1e-5, 1e-4, 1e-3, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1.0)
TAXA_COLUMNS = ("mean_abundance", "occupancy", "expected_occupancy", "occupancy_low",
                "occupancy_high", "q_value", "direction")
#: Tick positions offered on the volatility figure's axes (shown when inside the data range).
ABUNDANCE_TICKS = (1e-5, 1e-4, 1e-3, 0.01, 0.1, 0.5, 0.9, 0.99, 0.999, 0.9999, 0.99999)
#: Columns each diagnostic figure reads (a table without them gets no figure).
TAYLOR_COLUMNS = ("mean", "variance", "neutral_variance", "used", "slope", "intercept")
VOLATILITY_COLUMNS = ("mean_abundance", "volatility", "weight")
VOLATILITY_TICKS = (0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1.0, 2.0, 5.0, 10.0, 20.0, 50.0, 100.0)


def require_matplotlib() -> None:
    """Refuse figures early when matplotlib is not installed.

    Raises
    ------
    InputError
        One line naming the option and the install command.
    """
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        raise InputError("figures need matplotlib", parameter="figures",
                         fix="pip install 'driftscreen[plot]'") from None


def figure_stem(name: str) -> str:
    """A safe file-name stem for dataset ``name``; a hash is added when characters changed."""
    slug = re.sub(r"[^A-Za-z0-9._-]+", "_", name).strip("._")[:60] or "dataset"
    if slug == name:
        return slug
    return f"{slug}-{hashlib.sha256(name.encode('utf-8')).hexdigest()[:8]}"


def figure_paths(folder: str | os.PathLike, name: str) -> dict[str, Path]:
    """Where the figures of dataset ``name`` go, by kind (null, taylor, volatility)."""
    stem = figure_stem(name)
    return {suffix: Path(folder) / f"{stem}_{suffix}.png" for suffix in SUFFIXES}


def write_figures(result: NeutralityResult, folder: str | os.PathLike) -> list[Path]:
    """Write the figures of ``result`` into ``folder`` (created if needed); their paths.

    The Taylor figure needs the fluctuation-scaling diagnostics, the volatility figure
    those of regrouping invariance (time series only); figures without data are skipped.
    """
    require_matplotlib()
    paths = figure_paths(folder, result.dataset.name)
    figures = {"null": null_figure(result), "taylor": taylor_figure(result),
               "volatility": volatility_figure(result), "taxa": taxa_figure(result)}
    return [save_png(figure, paths[kind]) for kind, figure in figures.items()
            if figure is not None]


# ----------------------------------------------------------------------------- drawing
def new_figure(width: float, height: float) -> Figure:
    """An empty figure on an Agg canvas (no pyplot)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    figure = Figure(figsize=(width, height), dpi=DPI, layout="constrained")
    FigureCanvasAgg(figure)
    return figure


def pvalue_label(statistic: StatisticResult, replicates: int) -> str:
    """'p = 0.012', 'p \u2264 0.001' at the resolution limit, or why there is none."""
    text = pvalue_text(statistic.pvalue, replicates)
    if text == "-":
        return "no p-value (see the report's notes)"
    return f"p \u2264 {text[2:]}" if text.startswith("<=") else f"p = {text}"


def statistic_axis(name: str) -> str:
    """What a statistic's value is, for the axis of its null distribution."""
    if name == COMBINED:
        return COMBINED_AXIS
    cls = statistic_class(name)
    return name if cls is None else cls.unit


def null_panel(axes: Axes, statistic: StatisticResult, replicates: int) -> None:
    """Histogram of one statistic's null distribution with the observed value marked."""
    null = statistic.null_distribution
    observed = statistic.statistic
    sided = (" (two-sided)" if statistic.alternative == "two-sided"
             and math.isfinite(statistic.pvalue) else "")
    axes.set_title(f"{statistic.name}\nobserved {number(observed)}, "
                   f"{pvalue_label(statistic, replicates)}{sided}", fontsize=10)
    axes.set_xlabel(statistic_axis(statistic.name), fontsize=8)
    axes.set_ylabel("neutral replicates", fontsize=8)
    axes.tick_params(labelsize=8)
    if null.size:
        bins = int(np.clip(np.sqrt(null.size), 10, 40))
        axes.hist(null, bins=bins, color=NULL_COLOUR, edgecolor="white", linewidth=0.5,
                  label="neutral replicates (re-fitted)")
    if math.isfinite(observed):
        axes.axvline(observed, color=OBSERVED_COLOUR, linewidth=2, label="observed value")
        values = np.append(null, observed)
        low, high = float(values.min()), float(values.max())
        margin = 0.05 * (high - low) if high > low else max(abs(high), 1.0) * 0.05
        axes.set_xlim(low - margin, high + margin)


def null_figure(result: NeutralityResult) -> Figure:
    """Every statistic's null distribution in one figure, two or three panels a row."""
    statistics = list(result.statistics.values())
    columns = 2 if len(statistics) == 4 else min(len(statistics), 3)
    rows = math.ceil(len(statistics) / columns)
    figure = new_figure(4.3 * columns, 3.4 * rows + 0.4)
    grid = figure.subplots(rows, columns, squeeze=False)
    for axes, statistic in zip(grid.ravel(), statistics):
        null_panel(axes, statistic, result.replicates)
    for axes in grid.ravel()[len(statistics):]:
        axes.set_visible(False)
    handles, labels = grid[0, 0].get_legend_handles_labels()
    figure.legend(handles, labels, loc="outside lower center", ncols=2, frameon=False,
                  fontsize=9)
    figure.suptitle(f"Dataset '{result.dataset.name}': null distributions from "
                    f"{result.replicates} neutral replicates", fontsize=11)
    return figure


def diagnostic_table(result: NeutralityResult, name: str, columns: Sequence[str]
                     ) -> pd.DataFrame | None:
    """The diagnostic table of statistic ``name`` if it holds ``columns``, else None."""
    table = result.diagnostics.get(name)
    if table is None or not set(columns) <= set(table.columns):
        return None
    return table


def line_over(means: np.ndarray, intercept: float, slope: float) -> tuple[np.ndarray,
                                                                          np.ndarray]:
    """The line variance = exp(intercept) mean^slope over the range of ``means``."""
    x = np.geomspace(means.min(), means.max(), 50)
    return x, np.exp(intercept + slope * np.log(x))


def taylor_figure(result: NeutralityResult) -> Figure | None:
    """Mean against variance of the taxa (log-log), neutral expectation and Taylor line."""
    diagnosis = diagnostic_table(result, "fluctuation_scaling", TAYLOR_COLUMNS)
    if diagnosis is None or not diagnosis["used"].any():
        return None
    used = diagnosis[diagnosis["used"].to_numpy(dtype=bool)]
    means = used["mean"].to_numpy(dtype=np.float64)
    first = diagnosis.iloc[0]
    figure = new_figure(6.4, 4.8)
    axes = figure.subplots()
    axes.set_xscale("log")
    axes.set_yscale("log")
    axes.scatter(means, used["variance"], s=18, color="#1f5a96", label="taxa (observed)",
                 zorder=3)
    axes.scatter(means, used["neutral_variance"], s=14, facecolors="none",
                 edgecolors=NEUTRAL_COLOUR, label="neutral expectation p(1-p)/(1+theta)",
                 zorder=2)
    if "neutral_slope" in diagnosis and math.isfinite(first.neutral_slope):
        axes.plot(*line_over(means, first.neutral_intercept, first.neutral_slope),
                  color=NEUTRAL_COLOUR, linestyle="--", linewidth=1.2,
                  label=f"neutral line, b = {number(first.neutral_slope)}")
    if math.isfinite(first.slope):
        axes.plot(*line_over(means, first.intercept, first.slope), color=OBSERVED_COLOUR,
                  linewidth=2, label=f"fitted Taylor line, b = {number(first.slope)}")
    across = "over time" if result.dataset.time_series else "across samples"
    axes.set_xlabel("mean relative abundance of the taxon (fraction of reads)")
    axes.set_ylabel(f"variance of relative abundance {across}\n(sampling-corrected)")
    axes.legend(fontsize=8, frameon=False, loc="upper left")
    subtitle = taylor_subtitle(result.statistics.get("fluctuation_scaling"), result.replicates)
    axes.set_title(f"Dataset '{result.dataset.name}': Taylor's law, {len(used)} of "
                   f"{len(diagnosis)} taxa" + subtitle, fontsize=10)
    return figure


def taylor_subtitle(statistic: StatisticResult | None, replicates: int) -> str:
    """'\\nneutral replicates: b = m +- s; p = ...', or '' without replicates."""
    if statistic is None or not statistic.null_distribution.size:
        return ""
    return (f"\nneutral replicates: b = {number(statistic.null_mean)} \u00b1 "
            f"{number(statistic.null_sd, 2)}; {pvalue_label(statistic, replicates)}")


def class_segments(axes: Axes, classes: Sequence[tuple[float, float, float, int]]) -> None:
    """The mean volatility of every abundance class as a horizontal segment."""
    for index, (low, high, mean, _) in enumerate(classes):
        axes.plot([low, high], [mean, mean], color="black", linewidth=2.5,
                  label="class mean (weighted)" if index == 0 else None, zorder=4)


def volatility_figure(result: NeutralityResult) -> Figure | None:
    """Volatility of random groups of taxa against their fitted abundance (time series)."""
    diagnosis = diagnostic_table(result, "regrouping_invariance", VOLATILITY_COLUMNS)
    if diagnosis is None:
        return None
    kept: pd.DataFrame = diagnosis[diagnosis["weight"] > 0]
    if kept.empty:
        return None
    figure = new_figure(6.4, 4.8)
    axes = figure.subplots()
    axes.set_xscale("logit")
    axes.set_yscale("log")
    weights = kept["weight"].to_numpy(dtype=np.float64)
    axes.scatter(kept["mean_abundance"], kept["volatility"], s=10 + 20 * weights,
                 alpha=0.6, color="#1f5a96", edgecolors="none",
                 label="random groups of taxa (size: weight)", zorder=3)
    axes.axhline(1.0, color=NEUTRAL_COLOUR, linestyle="--", linewidth=1.2,
                 label="neutral expectation (1)")
    class_segments(axes, volatility_classes(diagnosis))
    plain_ticks(axes.xaxis, kept["mean_abundance"].to_numpy(dtype=np.float64), ABUNDANCE_TICKS)
    plain_ticks(axes.yaxis, kept["volatility"].to_numpy(dtype=np.float64), VOLATILITY_TICKS)
    axes.set_xlabel("fitted abundance of the group (fraction of reads, logit scale)")
    axes.set_ylabel("volatility: squared changes between samples\n"
                    "over their neutral expectation")
    axes.legend(fontsize=8, frameon=False, loc="best")
    statistic = result.statistics.get("regrouping_invariance")
    subtitle = "" if statistic is None else \
        f"\n{pvalue_label(statistic, result.replicates)} (spread of log volatility)"
    axes.set_title(f"Dataset '{result.dataset.name}': volatility of {len(kept)} random "
                   "groups of taxa" + subtitle, fontsize=10)
    return figure


def taxa_figure(result: NeutralityResult) -> Figure | None:
    """Occupancy against mean abundance, neutral expectation and band, departing taxa marked."""
    scan = result.taxa
    if scan is None or not len(scan) or not set(TAXA_COLUMNS) <= set(scan.columns):
        return None
    scan = scan.sort_values("mean_abundance", kind="stable")
    scan = scan[scan["mean_abundance"].to_numpy(dtype=np.float64) > 0]
    if scan.empty:
        return None
    mean = scan["mean_abundance"].to_numpy(dtype=np.float64)
    flagged = scan["q_value"].to_numpy(dtype=np.float64) <= 0.05
    direction = scan["direction"].astype(str)
    above = flagged & direction.str.contains("more frequent").to_numpy()
    below = flagged & direction.str.contains("less frequent").to_numpy()
    figure = new_figure(6.4, 4.8)
    axes = figure.subplots()
    axes.set_xscale("log")
    axes.fill_between(mean, scan["occupancy_low"], scan["occupancy_high"], color=BAND_COLOUR,
                      alpha=0.7, linewidth=0, label="95% of re-fitted neutral replicates")
    axes.plot(mean, scan["expected_occupancy"], color=NEUTRAL_COLOUR, linewidth=1.2,
              label="neutral expectation")
    groups = {"within": (~flagged, "o", "taxa"),
              "above": (above, "^", "departing (q <= 0.05): more frequent"),
              "below": (below, "v", "departing (q <= 0.05): less frequent"),
              "other": (flagged & ~above & ~below, "D",
                        "departing (q <= 0.05): variability or persistence")}
    for kind, (chosen, marker, label) in groups.items():
        if chosen.any():
            axes.scatter(mean[chosen], scan["occupancy"].to_numpy()[chosen], marker=marker,
                         s=16 if kind == "within" else 40, color=TAXON_COLOURS[kind],
                         label=label, zorder=3)
    axes.set_ylim(-0.03, 1.03)
    plain_ticks(axes.xaxis, mean, SHARE_TICKS)
    axes.set_xlabel("mean relative abundance (fraction of reads; rare taxa in pools)")
    axes.set_ylabel("occupancy: share of samples with reads")
    axes.legend(fontsize=8, frameon=False, loc="lower right")
    axes.set_title(f"Dataset '{result.dataset.name}': occupancy of {len(scan)} taxa and "
                   f"pools, {int(flagged.sum())} departing", fontsize=10)
    return figure


def plain_ticks(axis: Axis, values: np.ndarray, offered: Sequence[float]) -> None:
    """Ticks at the ``offered`` positions within the range of ``values``, as plain decimals.

    The logit and log scales' own labels (powers of ten, "1 - 10^-2") are hard to read.
    """
    from matplotlib.ticker import FixedFormatter, FixedLocator, NullLocator

    low, high = float(np.min(values)), float(np.max(values))
    ticks = [t for t in offered if low / 1.5 <= t <= high * 1.5]
    axis.set_major_locator(FixedLocator(ticks))
    axis.set_major_formatter(FixedFormatter([f"{t:g}" for t in ticks]))
    axis.set_minor_locator(NullLocator())


# ----------------------------------------------------------------------------- files
def save_png(figure: Figure, path: Path) -> Path:
    """Render ``figure`` as PNG and write it to ``path`` via a temporary file and a rename."""
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=DPI)
    atomic_write_bytes(path, buffer.getvalue())
    return path
