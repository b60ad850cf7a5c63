"""Fixed-width plain-text reports.

Every line is at most :data:`WIDTH` characters, columns are aligned, numbers are printed
with a fixed number of significant digits, and nothing depends on the terminal.
"""

from __future__ import annotations

import math
import textwrap
from collections.abc import Sequence

from driftscreen import __version__
from driftscreen.results import NeutralityResult, ParameterEstimate, StatisticResult

WIDTH = 78
ALPHA = 0.05


def number(value: float, digits: int = 4) -> str:
    """A number in at most ``digits`` significant digits; '-' for missing."""
    if value is None or not math.isfinite(value):
        return "-"
    if value == 0:
        return "0"
    magnitude = abs(value)
    if magnitude >= 1e6 or magnitude < 1e-3:
        return f"{value:.{digits - 1}e}"
    return f"{value:.{digits}g}"


def pvalue_text(pvalue: float, replicates: int) -> str:
    """A p-value; at the resolution limit it is shown as '<= 1/(B+1)'."""
    if pvalue is None or not math.isfinite(pvalue):
        return "-"
    floor = 1.0 / (replicates + 1)
    if pvalue <= floor * (1 + 1e-9):
        return f"<={floor:.2g}"
    return f"{pvalue:.3f}" if pvalue >= 0.001 else f"{pvalue:.1e}"


def table(headers: Sequence[str], rows: Sequence[Sequence[str]],
          align: str | None = None) -> list[str]:
    """Aligned columns; ``align`` is one letter per column, 'l' or 'r' (default: l then r)."""
    align = align or "l" + "r" * (len(headers) - 1)
    widths = [max(len(str(cell)) for cell in column) for column in zip(headers, *rows)]

    def line(cells: Sequence[str]) -> str:
        return "  ".join(str(c).ljust(w) if a == "l" else str(c).rjust(w)
                         for c, w, a in zip(cells, widths, align)).rstrip()

    return [line(headers), line(["-" * w for w in widths])] + [line(row) for row in rows]


def heading(title: str, underline: str = "-") -> list[str]:
    return [title, underline * min(WIDTH, max(len(title), 20))]


def wrap(text: str, indent: str = "") -> list[str]:
    return textwrap.wrap(text, WIDTH, initial_indent=indent, subsequent_indent=indent) or [""]


def bullet_list(items: Sequence[str]) -> list[str]:
    lines: list[str] = []
    for item in items:
        lines += textwrap.wrap(item, WIDTH, initial_indent="  - ", subsequent_indent="    ")
    return lines


def key_values(pairs: Sequence[tuple[str, str]]) -> list[str]:
    width = max(len(k) for k, _ in pairs)
    return [f"{k.ljust(width)}  {v}" for k, v in pairs]


def parameter_rows(parameters: dict[str, ParameterEstimate]) -> list[list[str]]:
    return [[p.name, number(p.estimate), f"{number(p.low)} .. {number(p.high)}", p.unit]
            for p in parameters.values()]


def statistic_rows(statistics: dict[str, StatisticResult], replicates: int) -> list[list[str]]:
    return [[s.name, number(s.statistic), number(s.null_mean), number(s.null_sd),
             number(s.effect_size, 3), number(s.ratio_to_median, 3),
             pvalue_text(s.pvalue, replicates)]
            for s in statistics.values()]


def verdict(result: NeutralityResult, alpha: float = ALPHA) -> str:
    """One sentence a reader can quote: rejected or not, by the combined test."""
    combined = result.statistics["combined"]
    if not math.isfinite(combined.pvalue):
        return "No verdict: no statistic could be computed for this dataset."
    p_text = pvalue_text(combined.pvalue, result.replicates)
    if combined.pvalue <= alpha:
        strongest = max((s for k, s in result.statistics.items() if k != "combined"
                         and math.isfinite(s.effect_size)),
                        key=lambda s: abs(s.effect_size), default=None)
        extra = (f"; the largest departure is {strongest.name} "
                 f"({number(strongest.effect_size, 3)} null SDs)") if strongest else ""
        return f"Neutrality rejected at alpha = {alpha:g} (combined p = {p_text}){extra}."
    return (f"Neutrality not rejected at alpha = {alpha:g} (combined p = {p_text}); "
            "this is not evidence for neutrality unless the design had power to detect "
            "the niche structure of interest.")


def design_lines(result: NeutralityResult) -> list[str]:
    d = result.dataset
    design = (f"time series, {d.n_samples} samples over {number(d.span_days)} days"
              if d.time_series else f"snapshot, {d.n_samples} replicate communities")
    taxa = f"{d.n_taxa}" + (f" ({d.dropped_taxa} with no reads dropped)" if d.dropped_taxa else "")
    return key_values([
        ("Design", design),
        ("Taxa", taxa),
        ("Depth (reads)", f"min {d.depth_min:,}, median {d.depth_median:,.0f}, "
                          f"max {d.depth_max:,}"),
        ("Replicates", f"{result.replicates} (smallest p-value "
                       f"{number(result.pvalue_resolution, 2)})"),
        ("Seed", str(result.seed)),
    ])


def dataset_section(result: NeutralityResult) -> list[str]:
    """The per-dataset block shared by the single-dataset and the screen reports."""
    lines = design_lines(result) + [""]
    lines += heading("Fitted neutral null") + table(
        ["parameter", "estimate", "95% interval", "unit"],
        parameter_rows(result.parameters), "lrrl") + [""]
    lines += heading("Statistics") + table(
        ["statistic", "observed", "null mean", "null sd", "effect", "obs/median", "p-value"],
        statistic_rows(result.statistics, result.replicates)) + [""]
    lines += wrap(verdict(result))
    notes = list(result.dataset.notes) + list(result.notes) + [
        f"{s.name}: {s.note}" for s in result.statistics.values() if s.note]
    if notes:
        lines += [""] + heading("Notes") + bullet_list(notes)
    if result.dataset.warnings:
        lines += [""] + heading("Warnings") + bullet_list(result.dataset.warnings)
    return lines


def dataset_report(result: NeutralityResult) -> str:
    """The plain-text report of :meth:`NeutralityResult.summary`."""
    title = f"driftscreen {__version__}: neutrality test of dataset '{result.dataset.name}'"
    lines = heading(title, "=") + dataset_section(result)
    lines += [""] + heading("Reading this report") + wrap(
        "effect = (observed - null mean) / null sd; obs/median = observed over the median of "
        "the neutral replicates; p-values are parametric-bootstrap p-values from neutral "
        "communities simulated with this dataset's taxa, times and depths, re-fitted on "
        "every replicate.")
    return "\n".join(lines) + "\n"
