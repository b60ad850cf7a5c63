"""Fixed-width plain-text reports.

Every line is at most :data:`WIDTH` characters, columns are aligned, numbers are printed
with a fixed number of significant digits, and nothing depends on the terminal.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from driftscreen.calibrate import MIN_CORRELATION_TIMES
from driftscreen.influence import CANDIDATES, LEVEL
from driftscreen.neutral.model import NullOptions
from driftscreen.progress import duration_text
from driftscreen.report.format import (ALPHA, WIDTH, bullet_list, heading, key_values, number,
                                       percent, pvalue_text, qvalue_text, sentence, shorten,
                                       table, taxon_table, verdict_word, wrap, wrapped_pairs)
from driftscreen.report.taxa import TAXA_LEGEND, TAXA_METHODS, screen_taxa_lines, taxa_lines
from driftscreen.results import from_technical_replicates
from driftscreen.statistics.registry import COMBINED, reported_only, statistic_class
from driftscreen.version import __version__

if TYPE_CHECKING:
    from driftscreen.results import (DatasetSummary, NeutralityResult, ParameterEstimate,
                                     StatisticResult)
    from driftscreen.screen import ScreenResult


def parameter_rows(parameters: dict[str, ParameterEstimate]) -> list[list[str]]:
    """Rows of the fitted null; an infinite read precision (no technical noise) reads 'inf'."""
    def value(x: float) -> str:
        return "inf" if x == math.inf else number(x)

    return [[p.name, value(p.estimate), f"{value(p.low)} .. {value(p.high)}", p.unit]
            for p in parameters.values()]


def statistic_rows(result: NeutralityResult) -> list[list[str]]:
    """Rows of the statistics table, from :meth:`NeutralityResult.to_frame`."""
    return [[row.statistic, number(row.observed), number(row.null_mean), number(row.null_sd),
             number(row.effect_size, 3), number(row.ratio_to_median, 3),
             pvalue_text(row.p_value, result.replicates)]
            for row in result.to_frame().itertuples(index=False)]


def verdict(result: NeutralityResult, alpha: float = ALPHA) -> str:
    """One sentence a reader can quote: rejected or not, by the combined test."""
    combined = result.statistics[COMBINED]
    if not math.isfinite(combined.pvalue):
        return "No verdict: no statistic could be computed for this dataset."
    p_text = pvalue_text(combined.pvalue, result.replicates)
    if result.rejected(alpha):
        strongest = max((s for k, s in result.statistics.items() if k != COMBINED
                         and math.isfinite(s.effect_size)),
                        key=lambda s: abs(s.effect_size), default=None)
        extra = (f"; the largest departure is {strongest.name} "
                 f"({number(strongest.effect_size, 3)} null SDs)") if strongest else ""
        return f"Neutrality rejected at alpha = {alpha:g} (combined p = {p_text}){extra}."
    return (f"Neutrality not rejected at alpha = {alpha:g} (combined p = {p_text}); "
            "this is not evidence for neutrality unless the design had power to detect "
            "the niche structure of interest.")


def influence_line(result: NeutralityResult) -> str:
    """The most influential sample, its outlyingness and the combined p-value without it."""
    influence = result.influence
    if influence is None:
        return ""
    change = ("verdict changes: not rejected without it" if influence.verdict_changes
              else "verdict unchanged")
    return (f"Most influential sample: {influence.sample} (outlyingness "
            f"{number(influence.score, 3)}); combined p without it "
            f"{pvalue_text(influence.pvalue, result.replicates)} ({change}).")


def influence_legend(screen: bool = False) -> str:
    """How the most influential sample is found; a screen's rule says p, not q."""
    rule = f"combined p{', not q,' if screen else ''} <= {LEVEL:g}"
    return (f"Most influential sample (datasets with {rule}): of the {CANDIDATES} samples "
            "furthest from the fitted null (outlyingness: squared deviation of the sample's "
            "relative abundances from the fitted composition and, for a time series, of its "
            "changes from its neighbours, over the neutral variance and averaged over taxa; "
            "about 1 for a neutral sample), the one whose removal leaves the weakest "
            "evidence; the dataset is tested again without it with the same settings, and "
            f"the verdict is judged at alpha = {LEVEL:g}.")


def summary_pairs(d: DatasetSummary) -> list[tuple[str, str]]:
    """Design, taxa and depths of a dataset as (key, value) pairs."""
    design = (f"time series, {d.n_samples} samples over {number(d.span_days)} days"
              if d.time_series else f"snapshot, {d.n_samples} replicate communities")
    taxa = f"{d.n_taxa}" + (f" ({d.dropped_taxa} with no reads dropped)" if d.dropped_taxa else "")
    return [
        ("Design", design),
        ("Taxa", taxa),
        ("Depth (reads)", f"min {d.depth_min:,}, median {d.depth_median:,.0f}, "
                          f"max {d.depth_max:,}"),
    ]


def design_lines(result: NeutralityResult) -> list[str]:
    return key_values(summary_pairs(result.dataset) + [
        ("Replicates", f"{result.replicates} (smallest p-value "
                       f"{number(result.pvalue_resolution, 2)})"),
        ("Seed", str(result.seed)),
    ])


# ----------------------------------------------------------------------------- diagnostics
#: Rows shown in the per-taxon diagnostic tables.
TOP_TAXA = 5
#: Classes of group abundance in the regrouping diagnostics.
ABUNDANCE_CLASSES = 4
#: Columns each diagnostic block reads (a table without them gets no block).
BLOCK_COLUMNS = {
    "stationary_divergence": ("taxon", "p", "observed_zero_fraction",
                              "expected_zero_fraction", "contribution", "direction"),
    "regrouping_invariance": ("mean_abundance", "volatility", "weight"),
    "fluctuation_scaling": ("used", "slope", "intercept"),
    "dispersion_heterogeneity": ("taxon", "p", "theta_taxon", "theta_common", "at_grid_edge",
                                 "lr_contribution"),
}


def stationary_block(diagnosis: pd.DataFrame) -> list[str]:
    """The taxa (or pools of rare taxa) contributing most to stationary_divergence."""
    top = diagnosis.head(TOP_TAXA)
    members = top["members"].tolist() if "members" in top else [1] * len(top)
    rows = [[number(row.p), percent(row.observed_zero_fraction),
             percent(row.expected_zero_fraction), number(row.contribution, 3), row.direction]
            for row in top.itertuples()]
    lines = wrap("Stationary divergence: taxa contributing most")
    return lines + taxon_table(["taxon", "p", "zero obs", "zero exp", "part", "variability"],
                               top["taxon"].tolist(), members, rows, "lrrrrl")


def fluctuation_block(diagnosis: pd.DataFrame, statistic: StatisticResult | None) -> list[str]:
    """The fitted Taylor line next to the neutral expectation and the replicates' exponent."""
    first = diagnosis.iloc[0]
    used = int(diagnosis["used"].sum())
    rows = [["observed taxa", number(first.slope), number(first.intercept)]]
    if "neutral_slope" in diagnosis:
        rows.append(["neutral expectation, same taxa", number(first.neutral_slope),
                     number(first.neutral_intercept)])
    if statistic is not None and statistic.null_distribution.size:
        rows.append(["neutral replicates, mean +- sd",
                     f"{number(statistic.null_mean)} +- {number(statistic.null_sd, 2)}", "-"])
    lines = wrap(f"Fluctuation scaling: Taylor's law variance = exp(c) mean^b over {used} of "
                 f"{len(diagnosis)} taxa")
    return lines + table(["line", "exponent b", "intercept c"], rows, "lrr")


def volatility_classes(diagnosis: pd.DataFrame, n_classes: int = ABUNDANCE_CLASSES
                       ) -> list[tuple[float, float, float, int]]:
    """Groupings with weight in ``n_classes`` equal-size classes of mean abundance.

    Per class: lowest and highest abundance, volatility weighted as in the statistic,
    number of groupings.
    """
    kept = diagnosis[diagnosis["weight"] > 0].sort_values("mean_abundance", kind="stable")
    classes = []
    for part in np.array_split(np.arange(len(kept)), min(n_classes, len(kept))):
        rows = kept.iloc[part]
        weights = rows["weight"].to_numpy()
        classes.append((float(rows["mean_abundance"].min()), float(rows["mean_abundance"].max()),
                        float(np.average(rows["volatility"], weights=weights)), len(rows)))
    return classes


def regrouping_block(diagnosis: pd.DataFrame) -> list[str]:
    """Volatility of random groupings of taxa by class of group abundance."""
    classes = volatility_classes(diagnosis)
    rows = [[f"{number(low, 2)} .. {number(high, 2)}", str(count), number(mean, 3)]
            for low, high, mean, count in classes]
    lines = wrap("Regrouping invariance: volatility of random groups of taxa (1 = neutral)")
    return lines + table(["group abundance", "groups", "volatility"], rows, "lrr")


def dispersion_block(diagnosis: pd.DataFrame) -> list[str]:
    """The taxa with the largest share of the dispersion-heterogeneity likelihood ratio."""
    top = diagnosis.head(TOP_TAXA)
    total = float(diagnosis["lr_contribution"].sum())
    rows = [[number(row.p), number(row.theta_taxon) + ("*" if row.at_grid_edge else " "),
             number(row.theta_common), number(row.lr_contribution, 3),
             percent(row.lr_contribution / total) if total > 0 else "-"]
            for row in top.itertuples()]
    lines = wrap("Dispersion heterogeneity: taxa with the largest part of the LR statistic")
    return lines + taxon_table(["taxon", "p", "own theta", "common theta", "LR part", "share"],
                               top["taxon"].tolist(), [1] * len(top), rows, "lrrrrr")


def diagnostic_tables(result: NeutralityResult) -> dict[str, pd.DataFrame]:
    """The result's non-empty diagnostic tables that hold what their block reads."""
    return {name: table for name, table in result.diagnostics.items()
            if len(table) and set(BLOCK_COLUMNS.get(name, ())) <= set(table.columns)}


def diagnostics_legend(names: Sequence[str]) -> list[str]:
    """How to read the diagnostics blocks of the given statistics, one paragraph each."""
    lines = wrap("What drives each statistic in the observed data (descriptive; the tests "
                 "are the p-values).")
    for name in names:
        cls = statistic_class(name)
        if cls is not None:
            lines += [""] + wrap(f"{cls.title}. "
                                 + cls.how_to_read.format(abundance_classes=ABUNDANCE_CLASSES))
    return lines


def diagnostics_lines(result: NeutralityResult, legend: bool = True) -> list[str]:
    """The 'Diagnostics' block: one table per statistic that was run (none if none),
    followed by how to read them unless ``legend`` is False (the screen report gives the
    legend once for all datasets)."""
    tables = diagnostic_tables(result)
    blocks = {}
    if "stationary_divergence" in tables:
        blocks["stationary_divergence"] = stationary_block(tables["stationary_divergence"])
    if "regrouping_invariance" in tables and (tables["regrouping_invariance"]["weight"] > 0).any():
        blocks["regrouping_invariance"] = regrouping_block(tables["regrouping_invariance"])
    if "fluctuation_scaling" in tables:
        blocks["fluctuation_scaling"] = fluctuation_block(
            tables["fluctuation_scaling"], result.statistics.get("fluctuation_scaling"))
    if "dispersion_heterogeneity" in tables:
        blocks["dispersion_heterogeneity"] = dispersion_block(tables["dispersion_heterogeneity"])
    if not blocks:
        return []
    lines = heading("Diagnostics")
    for block in blocks.values():
        lines += block + [""]
    if legend:
        lines += diagnostics_legend(list(blocks))
    return lines[:-1] if lines[-1] == "" else lines


def dataset_section(result: NeutralityResult, legend: bool = True) -> list[str]:
    """The per-dataset block shared by the single-dataset and the screen reports."""
    lines = design_lines(result) + [""]
    lines += heading("Fitted neutral null") + table(
        ["parameter", "estimate", "95% interval", "unit"],
        parameter_rows(result.parameters), "lrrl") + [""]
    lines += heading("Statistics") + table(
        ["statistic", "observed", "null mean", "null sd", "effect", "obs/med", "p-value"],
        statistic_rows(result)) + [""]
    lines += wrap(verdict(result))
    if result.influence is not None:
        lines += wrap(influence_line(result))
    diagnostics = diagnostics_lines(result, legend)
    if diagnostics:
        lines += [""] + diagnostics
    taxa = taxa_lines(result, legend)
    if taxa:
        lines += [""] + taxa
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
    reading = ("effect = (observed - null mean) / null sd; obs/med = observed over the median "
               "of the neutral replicates; p-values are parametric-bootstrap p-values from "
               "neutral communities simulated with this dataset's taxa, times and depths, "
               "re-fitted on every replicate.")
    if result.influence is not None:
        reading += " " + influence_legend()
    lines += [""] + heading("Reading this report") + wrap(reading)
    return "\n".join(lines) + "\n"


# ----------------------------------------------------------------------------- screen report


#: How the most influential samples were found, for the methods paragraph.
INFLUENCE_METHODS = (
    f"For each dataset with a combined p-value of at most {LEVEL:g}, the {CANDIDATES} samples "
    "furthest from the fitted null (mean over taxa of the squared standardised deviation of "
    "their relative abundances and, for time series, of their changes from neighbouring "
    "samples) were each left out in turn; the one whose removal left the weakest evidence "
    "(harmonic mean of the normal-tail p-values of its statistics against the full-data "
    "null distributions) was taken as the most influential sample, and the dataset was "
    "tested again without it with the same settings. ")


def intake_text(intake: Mapping[str, Any]) -> str:
    """The intake options that were given (not at their defaults), as options."""
    given = []
    for key, value in intake.items():
        if value is None or value == "auto" or value == [] or value == ():
            continue
        text = ",".join(map(str, value)) if isinstance(value, (list, tuple)) else str(value)
        given.append(f"--{key.replace('_', '-')} {text}")
    return ", ".join(given) or "defaults"


def combined_qvalue(run: ScreenResult, index: int) -> float:
    return run.qvalue(index, COMBINED)


def n_tested(run: ScreenResult) -> int:
    values = run.qvalues.get(COMBINED)
    return 0 if values is None else int(sum(math.isfinite(v) for v in values))


def screen_header(run: ScreenResult, provenance: Mapping[str, Any], run_seconds: float,
                  date: str) -> list[str]:
    """Title, date, run time, settings, and the input files with their checksums."""
    n = len(run.outcomes)
    analysed = sum(o.analysed for o in run.outcomes)
    settings = run.settings
    lines = heading(f"driftscreen {provenance['driftscreen_version']}: neutrality screen of "
                    f"{n} datasets", "=")
    lines += wrapped_pairs([
        ("Date", date),
        ("Run time", duration_text(run_seconds)
         + (f" ({run.reused} datasets reused from an earlier run)" if run.reused else "")),
        ("Datasets", f"{n}: {analysed} analysed, {n - analysed} not analysed"),
        ("Replicates", f"B = {settings.replicates} per dataset (smallest p-value "
                       f"{number(1.0 / (settings.replicates + 1), 2)})"),
        ("Groupings", f"R = {settings.groupings} (regrouping_invariance, time series only)"),
        ("Seed", str(settings.seed)),
        ("Intake", intake_text(provenance["intake"])),
    ]) + [""]
    lines += heading("Input files")
    for role, entry in provenance["inputs"].items():
        lines += wrap(f"{role.replace('_', ' ')}: {entry['path']}")
        lines.append(f"  sha256 {entry['sha256']}")
    return lines


def summary_row(run: ScreenResult, index: int) -> list[str]:
    outcome = run.outcomes[index]
    result = outcome.result
    parameters = {} if result is None else result.parameters
    estimate = {k: number(parameters[k].estimate) if k in parameters else "-"
                for k in ("theta", "rate")}
    pvalue = "-" if result is None else pvalue_text(result.pvalue, result.replicates)
    q = combined_qvalue(run, index)
    return [str(index + 1), outcome.name, str(outcome.summary.n_samples),
            str(outcome.summary.n_taxa), estimate["theta"], estimate["rate"], pvalue,
            qvalue_text(q), verdict_word(q)]


def summary_table(run: ScreenResult) -> list[str]:
    """Datasets sorted by combined q-value, then p-value (untested last); names cut to fit."""
    headers = ["#", "dataset", "samples", "taxa", "theta", "rate", "p", "q", "verdict"]

    def by_qvalue(index: int) -> tuple[bool, float, float, str]:
        q, outcome = combined_qvalue(run, index), run.outcomes[index]
        tested = math.isfinite(q)
        p = outcome.pvalue(COMBINED) if tested else 0.0
        return (not tested, q if tested else 0.0, p, outcome.name)

    rows = [summary_row(run, i) for i in sorted(range(len(run.outcomes)), key=by_qvalue)]
    others = sum(max(len(h), *(len(r[c]) for r in rows)) if rows else len(h)
                 for c, h in enumerate(headers) if c != 1)
    name_width = max(len(headers[1]), WIDTH - others - 2 * (len(headers) - 1))
    for row in rows:
        row[1] = shorten(row[1], name_width)
    return table(headers, rows, "rlrrrrrrl")


def any_technical_replicates(run: ScreenResult) -> bool:
    """Whether the read precision of any analysed dataset came from technical replicates."""
    return any(o.result is not None and "precision" in o.result.parameters
               and from_technical_replicates(o.result.parameters["precision"])
               for o in run.outcomes)


def any_influence(run: ScreenResult) -> bool:
    return any(o.result is not None and o.result.influence is not None for o in run.outcomes)


def summary_lines(run: ScreenResult) -> list[str]:
    tested = n_tested(run)
    lines = heading("Summary, sorted by combined q-value") + summary_table(run) + [""]
    legend = (f"p: combined p-value of the dataset (harmonic mean p-value of its statistics, "
              f"calibrated on the neutral replicates); q: its Benjamini-Hochberg q-value "
              f"across the {tested} tested datasets; verdict: neutrality rejected when "
              f"q <= {ALPHA:g}. theta: immigration parameter; rate: relaxation rate per "
              f"day (time series only). # refers to the dataset sections below, where "
              "effect = (observed - null mean) / null sd and obs/med = observed over the "
              "median of the neutral replicates.")
    if any_influence(run):
        legend += " " + influence_legend(screen=True)
    return lines + wrap(legend)


def outcome_section(run: ScreenResult, index: int) -> list[str]:
    """One dataset's section: the single-dataset block plus its q-value, or why not."""
    outcome = run.outcomes[index]
    lines = heading(f"[{index + 1}] Dataset '{outcome.name}'", "=")
    if outcome.result is None:
        summary = outcome.summary
        lines += key_values(summary_pairs(summary)) + [""] + wrap(sentence(outcome.note))
        if summary.notes:
            lines += [""] + heading("Notes") + bullet_list(summary.notes)
        if summary.warnings:
            lines += [""] + heading("Warnings") + bullet_list(summary.warnings)
        return lines
    q = combined_qvalue(run, index)
    lines += dataset_section(outcome.result, legend=False) + [""]
    lines += wrap(f"Across the screen: combined q-value {qvalue_text(q)} (Benjamini-Hochberg "
                  f"over {n_tested(run)} tested datasets); verdict: neutrality {verdict_word(q)}"
                  f" at FDR {ALPHA:g}.")
    return lines


def statistics_used(run: ScreenResult) -> list[str]:
    names: list[str] = []
    for outcome in run.outcomes:
        if outcome.result is not None:
            names += [n for n in outcome.result.statistics if n != COMBINED and n not in names]
    return names


TECHNICAL_METHODS = (
    "Where biological samples had been sequenced more than once, the deepest sequenced "
    "sample of each was analysed and the precision of that dataset (time series and "
    "snapshots alike) was estimated from its pairs of technical replicates, whose squared "
    "differences exceed those of multinomial sampling by the technical noise alone "
    "(Dirichlet-multinomial moments, Mosimann 1962); every neutral replicate carried "
    "technical replicates read from the same simulated communities at the same depths, "
    "re-estimated in the same way. ")


def null_reads_text(options: NullOptions) -> str:
    """How the methods paragraph describes the reads of the null."""
    if options.noise == "off":
        return "multinomial. "
    if options.noise == "estimate":
        return ("Dirichlet-multinomial (Mosimann 1962, Biometrika 49:65) with a precision "
                "estimated for time series from the variance between successive samples that "
                "drift cannot explain (multinomial for snapshots). ")
    return (f"Dirichlet-multinomial (Mosimann 1962, Biometrika 49:65) with precision "
            f"{options.noise:g}. ")


def null_start_text(options: NullOptions) -> str:
    """How the methods paragraph describes the start of time-series replicates."""
    if not options.conditioned:
        return "Time-series replicates started from the stationary law. "
    return ("Time-series replicates were conditioned on the observed first sample (started "
            "from the posterior of the community given its reads) and relaxed towards the "
            "metacommunity at the shared rate, whose composition was estimated as the point "
            "every taxon relaxes to, so that a neutral community recovering from a "
            "disturbance is not taken for a non-neutral one. ")


def withheld_below(options: NullOptions) -> str:
    return f"{MIN_CORRELATION_TIMES[options.start]:.3g}"


def any_taxon_scan(run: ScreenResult) -> bool:
    return any(o.result is not None and o.result.taxa is not None for o in run.outcomes)


def combined_statistics_text() -> str:
    """Which statistics enter ``combined``: all, or all but those reported only."""
    left_out = [cls.title.lower() for cls in reported_only()]
    if not left_out:
        return "all statistics"
    return f"all statistics but {' and '.join(left_out)} (reported, not combined)"


def statistic_methods(name: str, groupings: int) -> str:
    """What statistic ``name`` measures, for the methods paragraph (its name if unknown)."""
    cls = statistic_class(name)
    return name if cls is None else cls.methods.format(groupings=groupings)


def methods_paragraph(run: ScreenResult, version: str) -> list[str]:
    """A paragraph for a manuscript, with B, R, the seed and the version actually used."""
    settings = run.settings
    described = [statistic_methods(name, settings.groupings) for name in statistics_used(run)]
    if len(described) > 1:
        statistics = "; ".join(described[:-1]) + "; and " + described[-1]
    else:
        statistics = described[0] if described else "none (no dataset could be analysed)"
    analysed = sum(o.analysed for o in run.outcomes)
    left_out = len(run.outcomes) - analysed
    text = (
        f"Each of {analysed} community datasets was tested against the neutral "
        "model of community ecology (Hubbell 2001, The Unified Neutral Theory of "
        "Biodiversity and Biogeography; Etienne 2005, Ecol. Lett. 8:253), in which the "
        "relative abundances of taxa follow a Wright-Fisher diffusion with immigration from "
        "a metacommunity and every sample is a draw of its sequencing depth, "
        + null_reads_text(settings.null)
        + (TECHNICAL_METHODS if any_technical_replicates(run) else "") +
        "The metacommunity composition, the immigration parameter theta and, for time "
        "series, the relaxation rate were estimated by sampling-corrected moment methods, "
        "and theta and the rate were corrected for the median bias of these estimators "
        "measured on 64 pilot neutral replicates. "
        + null_start_text(settings.null) +
        f"For each dataset, B = {settings.replicates} neutral replicate datasets with the "
        "dataset's own sampling times and sequencing depths were simulated from the fitted "
        "model through the lines-of-descent representation of the diffusion's transition "
        "law (Griffiths 1980, Theor. Popul. Biol. 17:37; Jenkins & Spano 2017, Ann. Appl. "
        "Probab. 27:1478), exactly wherever its series converges numerically and otherwise "
        "with a skewness-corrected normal law for the number of lines; the model was "
        "re-fitted to every replicate and every statistic recomputed (parametric bootstrap "
        "with re-fitting; Davison & Hinkley 1997, Bootstrap Methods and their "
        "Application), and p-values were (1 + number of replicates at least as extreme) / "
        f"(B + 1). The statistics were {statistics}. Statistics that compare each taxon's "
        "abundance distribution with the stationary law were given no p-value for time "
        f"series spanning fewer than {withheld_below(settings.null)} correlation times "
        "(fitted rate x span), where their calibration is unreliable. Per dataset, the "
        f"p-values of {combined_statistics_text()} "
        "were combined by their harmonic mean p-value (Wilson 2019, Proc. Natl. Acad. Sci. USA "
        "116:1195), calibrated against the replicates' leave-one-out p-values, and q-values "
        "were computed per statistic across datasets by the Benjamini-Hochberg procedure "
        "(Benjamini & Hochberg 1995, J. R. Stat. Soc. B 57:289). "
        + (INFLUENCE_METHODS if any_influence(run) else "")
        + (TAXA_METHODS if any_taxon_scan(run) else "")
        + f"Analyses used driftscreen {version} with master random seed {settings.seed}.")
    if left_out:
        text += (f" {left_out} further {'dataset' if left_out == 1 else 'datasets'} could "
                 "not be analysed (too few samples or taxa, or a failed fit; see the "
                 "dataset sections).")
    return heading("Methods") + wrap(text)


def screen_report(run: ScreenResult, provenance: Mapping[str, Any], *, run_seconds: float,
                  date: str) -> str:
    """The screen's ``report.txt``: header, summary, one section per dataset, methods.

    ``provenance`` is the settings fingerprint of :func:`driftscreen.store.settings_fingerprint`.
    """
    lines = screen_header(run, provenance, run_seconds, date) + [""] + summary_lines(run)
    for index in range(len(run.outcomes)):
        lines += [""] + outcome_section(run, index)
    across = screen_taxa_lines(run)
    if across:
        lines += [""] + across
    used = statistics_used(run)
    if any(outcome.result is not None and outcome.result.diagnostics
           for outcome in run.outcomes):
        lines += [""] + heading("Reading the diagnostics") + diagnostics_legend(used)
    if across:
        lines += [""] + wrap(TAXA_LEGEND)
    lines += [""] + methods_paragraph(run, provenance["driftscreen_version"])
    return "\n".join(lines) + "\n"
