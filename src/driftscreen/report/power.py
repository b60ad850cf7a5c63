"""Fixed-width plain-text report of a power analysis (:class:`driftscreen.power.PowerResult`)."""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import TYPE_CHECKING

import numpy as np

from driftscreen.power import TARGET_POWER, wilson_interval
from driftscreen.report.format import heading, number, table, wrap, wrapped_pairs
from driftscreen.version import __version__

if TYPE_CHECKING:
    from driftscreen.power import NicheAlternative, PowerDesign, PowerResult


def days(value: float) -> str:
    """``1 day``, ``2.5 days``."""
    return f"{value:g} day" + ("" if value == 1 else "s")


def design_pairs(design: PowerDesign) -> list[tuple[str, str]]:
    """Design, taxa, depths and abundances as (key, value) pairs for the report."""
    if design.fixed is not None:
        fixed = design.fixed
        layout = (f"time series, {design.n_samples} samples over "
                  f"{number(float(fixed.times[-1] - fixed.times[0]))} days"
                  if fixed.is_time_series else
                  f"snapshot, {design.n_samples} replicate communities")
        depths = (f"min {fixed.depths.min():,}, median {design.median_depth:,.0f}, "
                  f"max {fixed.depths.max():,}")
        pairs = [("Design", f"{layout}, as in dataset '{design.source}'")]
    else:
        spec = design.spec
        if spec.interval is None:
            layout = f"snapshot, {spec.n_samples} replicate communities"
        elif spec.irregular:
            layout = (f"time series, {spec.n_samples} samples, gamma-distributed gaps "
                      f"with mean {days(spec.interval)} (drawn anew per dataset)")
        else:
            layout = (f"time series, {spec.n_samples} samples, one every "
                      f"{days(spec.interval)}")
        depths = (f"median {spec.depth:,}, log-sd {spec.depth_spread:g} (drawn anew per "
                  "dataset)" if spec.depth_spread > 0 else f"{spec.depth:,} in every sample")
        pairs = [("Design", layout)]
    return pairs + [("Taxa", str(design.n_taxa)), ("Depth (reads)", depths)]


def abundance_text(design: PowerDesign, alternative: NicheAlternative) -> str:
    """Where the carrying capacities of the niche model come from."""
    if design.profile is not None:
        return "pooled relative abundances of the dataset (carrying capacities)"
    return (f"carrying capacities log-uniform over {alternative.spread_decades:g} "
            "orders of magnitude, drawn per dataset (model default)")


def alternative_description(alternative: NicheAlternative) -> str:
    """What the alternative is and what its strength means, for the report."""
    if alternative.name == "logistic":
        return ("independent stochastic logistic taxa (Grilli 2020, Nat. Commun. "
                "11:4743), generation time "
                f"{days(alternative.timescale)}. strength = sigma, the environmental noise: each "
                "taxon fluctuates around its carrying capacity with a Gamma law of squared "
                "coefficient of variation sigma / (2 - sigma); sigma = 0 is a constant "
                "community, the neutral limit (theta -> infinity).")
    text = ("competitive Lotka-Volterra community (Stein et al. 2013, PLoS Comput. "
            f"Biol. 9:e1003388), generation time {days(alternative.timescale)}, environmental "
            f"noise {alternative.noise:g}. strength = mean competition coefficient C_ij: the "
            "fraction by which one other taxon at its carrying capacity reduces a "
            "taxon's growth")
    if alternative.noise == 0.0:
        return text + ("; without noise, strength 0 is a constant community, the "
                       "neutral limit (theta -> infinity).")
    return text + (f"; strength 0 is independent logistic taxa with sigma = "
                   f"{alternative.noise:g} (not neutral).")


def percent(value: float) -> str:
    return "-" if not math.isfinite(value) else f"{100.0 * value:.0f}"


def power_cell(power: float, low: float, high: float) -> str:
    """``84 (71-92)``: power and its interval in percent."""
    return f"{percent(power)} ({percent(low)}-{percent(high)})"


def column_labels(names: Sequence[str]) -> list[str]:
    """Short column headers: the first word of each name, the full name if that is ambiguous."""
    firsts = [name.split("_")[0] for name in names]
    return [first if firsts.count(first) == 1 else name for first, name in zip(firsts, names)]


def power_table(result: PowerResult) -> list[str]:
    """Strength x statistic table of power (%) with 95% Wilson intervals."""
    low, high = result.interval()
    power = result.power
    labels = column_labels(result.statistics)
    rows = []
    for i, strength in enumerate(result.strengths):
        mark = " *" if result.alternative.is_neutral_limit(float(strength)) else ""
        rows.append([f"{strength:g}{mark}"] + [power_cell(power[i, j], low[i, j], high[i, j])
                                               for j in range(len(result.statistics))])
    return table([result.alternative.strength_name] + labels, rows)


def strength_text(value: float, alternative: NicheAlternative) -> str:
    """``0.0023 (sigma; each taxon's abundance varies with a CV of 3.4%)``."""
    return f"{value:.2g} ({alternative.strength_meaning(value)})"


def detectable_sentence(result: PowerResult) -> str:
    """The minimum detectable strength of ``combined``, with how it was obtained."""
    mde, optimistic, pessimistic = result.minimum_detectable()
    alt, grid = result.alternative, result.strengths
    power = result.combined_power()
    target = f"{TARGET_POWER:.0%}"
    if math.isinf(mde):
        return (f"Not reached within the grid: combined power stays below {target} up to "
                f"strength {grid[-1]:g} ({percent(power[-1])}% there).")
    if mde == grid[0]:
        return (f"At or below {strength_text(mde, alt)}: combined power is already "
                f"{percent(power[0])}% at the smallest strength of the grid.")
    j = int(np.flatnonzero(power >= TARGET_POWER)[0])
    scale = "log(strength)" if grid[j - 1] > 0 else "strength"
    spread = (f"beyond {grid[-1]:g}" if math.isinf(pessimistic) else f"{pessimistic:.2g}")
    return (f"{strength_text(mde, alt)}, where combined power reaches {target}; "
            f"interpolated linearly in {scale} between {grid[j - 1]:g} "
            f"({percent(power[j - 1])}%) and {grid[j]:g} ({percent(power[j])}%). "
            f"Allowing for Monte Carlo error: {optimistic:.2g} to {spread} (where the "
            f"upper and the lower bounds of the 95% intervals reach {target}).")


def precision_sentence(n_datasets: int) -> str:
    """How precisely n datasets pin down a power of 50% and of 80%."""
    halves = []
    for share in (0.5, 0.8):
        low, high = wilson_interval(round(share * n_datasets), n_datasets)
        halves.append(float(high - low) / 2.0)
    return (f"Monte Carlo precision: with {n_datasets} datasets per strength, a power near "
            f"50% is known to about +-{100 * halves[0]:.0f} and near 80% to about "
            f"+-{100 * halves[1]:.0f} percentage points (half-widths of 95% Wilson "
            "intervals); more datasets per strength narrow them.")


def power_report(result: PowerResult) -> str:
    """The report of :meth:`driftscreen.power.PowerResult.summary`."""
    alt, settings = result.alternative, result.settings
    lines = heading(f"driftscreen {__version__}: power against the {alt.label} niche "
                    "alternative", "=")
    lines += wrapped_pairs(design_pairs(result.design) + [
        ("Abundances", abundance_text(result.design, alt)),
        ("Alternative", alternative_description(alt)),
        ("Datasets", f"{result.n_datasets} simulated per strength, each tested in full"),
        ("Calibration", f"B = {settings.replicates} neutral replicates, R = "
                        f"{settings.groupings} groupings, alpha = {result.alpha:g}"),
        ("Seed", str(settings.seed)),
    ]) + [""]
    lines += heading(f"Power (%) at alpha = {result.alpha:g}, with 95% Wilson intervals")
    lines += power_table(result)
    labels = column_labels(result.statistics)
    legend = [f"{label} = {name}" for label, name in zip(labels, result.statistics)
              if label != name]
    notes = []
    if legend:
        notes.append("Columns: " + ", ".join(legend) + ".")
    if any(alt.is_neutral_limit(float(s)) for s in result.strengths):
        notes.append("* neutral limit: its rejection rate is the false-positive rate, "
                     f"which should be near alpha = {result.alpha:g}.")
    lines += [""] + [line for note in notes for line in wrap(note)] + [""]
    lines += heading(f"Minimum detectable strength ({TARGET_POWER:.0%} power, combined)")
    lines += wrap(detectable_sentence(result)) + [""]
    if result.failures:
        lines += heading("Notes") + wrap(
            f"{len(result.failures)} simulated datasets could not be tested and count as "
            f"not rejected; the first: {result.failures[0]}") + [""]
    lines += heading("Reading this report") + wrap(
        "Power is the share of simulated niche communities, sampled with this design, in "
        f"which the calibrated test rejects neutrality at alpha = {result.alpha:g}: each "
        "simulated dataset is fitted, calibrated against its own neutral replicates and "
        "tested exactly as `driftscreen test` would. A strength below the minimum "
        "detectable one is niche structure that this design would usually miss.") + [""]
    lines += wrap(precision_sentence(result.n_datasets))
    return "\n".join(lines) + "\n"
