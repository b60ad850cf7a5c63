"""Text of the per-taxon scan: the taxa that depart from neutrality, per dataset and across a screen.

Pure rendering of the tables :mod:`driftscreen.taxon_scan` computes (stored in the result).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import pandas as pd

from driftscreen.report.format import (ALPHA, bullet_list, heading, number, percent,
                                       qvalue_text, taxon_table, wrap)
from driftscreen.taxon_scan import across_datasets, departing

if TYPE_CHECKING:
    from driftscreen.results import NeutralityResult
    from driftscreen.screen import ScreenResult

TAXA_LEGEND = (
    "Taxa departing from neutrality. Every taxon is tested on its own against its "
    "re-fitted neutral replicates: occupancy (share of samples with reads) against the "
    "neutral detection probability at each sample's depth (Sloan et al. 2006, Environ. "
    "Microbiol. 8:732), sampling-corrected variance against the neutral one and, for time "
    "series, how much of its abundance it keeps between successive samples against the "
    "shared neutral rate. Its p-values are combined by their harmonic mean, calibrated on the replicates, "
    f"and q is the Benjamini-Hochberg q-value across the dataset's taxa; listed: q <= "
    f"{ALPHA:g}, with the share of reads, the occupancy observed and expected and the "
    "effects at p <= 0.05 ('combined only': none alone). Rare taxa (theta p < 1) are tested in pools, as the statistics pool them: "
    "'+N rare' is a pool of the taxon named and N rarer ones. Unlike the usual neutral "
    "occupancy-abundance curve with a binomial interval, these p-values include the "
    "estimation of the null and the testing of every taxon.")
TAXA_METHODS = (
    "Per dataset, every taxon (rare taxa pooled into groups of shape theta p >= 1) was "
    "tested against its own re-fitted neutral replicates for its occupancy against the "
    "neutral beta-binomial detection probability at each sample's depth (after Sloan et "
    "al. 2006, Environ. Microbiol. 8:732, and Burns et al. 2016, ISME J. 10:655), its "
    "sampling-corrected variance and, for time series, its persistence between successive "
    "samples (the last two relative to the dataset's other taxa); its two-sided "
    "randomised bootstrap p-values (ties broken at random; Habiger 2015, arXiv:1412.0561) "
    "were combined by their harmonic mean, calibrated against the replicates' "
    "leave-one-out combinations of all taxa, and adjusted across taxa by the "
    "Benjamini-Hochberg procedure; across datasets, each taxon's p-values were combined by "
    "the Cauchy combination (Liu & Xie 2020, J. Am. Stat. Assoc. 115:393) and adjusted "
    "across taxa. ")
ACROSS_LEGEND = (
    "Taxa departing across datasets: for each taxon tested on its own in at least one "
    "dataset, the Cauchy combination of its per-dataset combined p-values (Liu & Xie 2020, "
    "J. Am. Stat. Assoc. 115:393) and its Benjamini-Hochberg q-value across taxa; listed: "
    f"q <= {ALPHA:g}. tested: datasets where it was tested alone; departing: datasets with "
    f"its q <= {ALPHA:g} there, with their directions.")


def pools_text(table: pd.DataFrame) -> str:
    """How many pools of rare taxa the scan has, and how many taxa they hold."""
    members = table["members"].to_numpy()
    pools = members > 1
    if not pools.any():
        return "No taxon was rare enough to be pooled."
    return (f"{int(pools.sum())} pools hold {int(members[pools].sum())} rare taxa; "
            f"{int((~pools).sum())} taxa were tested alone.")


def departing_text(row: object) -> str:
    """'ID (5% of reads; in 40% of samples, 90% expected): less frequent; q 0.002'."""
    return (f"{row.taxon} ({percent(row.mean_abundance)} of reads; in "
            f"{percent(row.occupancy)} of samples, {percent(row.expected_occupancy)} "
            f"expected): {row.direction or 'combined only'}; q {qvalue_text(row.q_value)}")


def taxa_lines(result: NeutralityResult, legend: bool = True) -> list[str]:
    """The 'Taxa departing from neutrality' block of a dataset (none without a scan)."""
    scan = result.taxa
    if scan is None or not len(scan):
        return []
    lines = heading("Taxa departing from neutrality")
    chosen = departing(scan)
    if not len(chosen):
        smallest = scan["q_value"].min()
        lines += wrap(f"No taxon departs at q <= {ALPHA:g} ({len(scan)} taxa and pools "
                      f"tested; smallest q {qvalue_text(smallest)}). {pools_text(scan)}")
    else:
        lines += bullet_list([departing_text(row) for row in chosen.itertuples()])
        lines += wrap(f"{len(chosen)} of {len(scan)} taxa and pools at q <= {ALPHA:g}. "
                      + pools_text(scan))
    if legend:
        lines += [""] + wrap(TAXA_LEGEND)
    return lines


def across_lines(across: pd.DataFrame, n_datasets: int) -> list[str]:
    """The screen's 'Taxa departing across datasets' block."""
    lines = heading("Taxa departing across datasets")
    chosen = across[across["q_value"].to_numpy(dtype=float) <= ALPHA]
    if not len(chosen):
        smallest = across["q_value"].min() if len(across) else float("nan")
        return lines + wrap(f"No taxon departs consistently at q <= {ALPHA:g} ({len(across)} "
                            f"taxa over {n_datasets} datasets; smallest q "
                            f"{qvalue_text(smallest)}).") + [""] + wrap(ACROSS_LEGEND)
    rows = [[str(row.datasets), str(row.departing), number(row.combined_p, 3),
             qvalue_text(row.q_value)] for row in chosen.itertuples()]
    lines += taxon_table(["taxon", "tested", "departing", "p", "q"], chosen["taxon"].tolist(),
                         [1] * len(chosen), rows, "lrrrr")
    directions = [f"{row.taxon}: {row.directions}" for row in chosen.itertuples()
                  if row.directions]
    if directions:
        lines += [""] + wrap("Directions where they depart:") + bullet_list(directions)
    return lines + [""] + wrap(ACROSS_LEGEND)


def screen_taxa_lines(run: ScreenResult) -> list[str]:
    """The screen's across-datasets block, or none when no dataset has a scan."""
    tables = [o.result.taxa for o in run.outcomes
              if o.result is not None and o.result.taxa is not None]
    if not tables:
        return []
    return across_lines(across_datasets(tables), len(tables))
