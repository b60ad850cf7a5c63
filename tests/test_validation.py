"""A small, fast version of the validation study: a broken calibration turns CI red.

Neutral datasets (exact and discrete Wright-Fisher generators, regular and irregular sampling,
snapshots, weak and strong immigration) must be rejected at about the nominal rate, and clear
niche datasets must be rejected. The full study is `python -m driftscreen.validation`.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy import stats

from driftscreen.validation import (Scenario, niche_scenarios, pvalue_columns, rejection_table,
                                    run_study)

REPLICATES = 19
LEVEL = 0.2  # a high level gives many expected rejections, so the bound is tight


def small_neutral_scenarios() -> list[Scenario]:
    """48 small neutral datasets, all series covering >= 15 correlation times."""
    levels = itertools.product(("exact", "wright-fisher"), (1.0, None), (False, True),
                               (20.0, 200.0), (0.5, 1.0), (0.0, 0.5))
    scenarios = []
    for index, (generator, interval, irregular, theta, rate, spread) in enumerate(levels):
        if generator == "wright-fisher" and interval is None:
            generator = "exact"  # the discrete reference simulates time series only
        scenarios.append(Scenario(f"check_{index:02d}", generator, n_taxa=20, n_samples=40,
                                  interval=interval, irregular=irregular, depth=3_000,
                                  depth_spread=spread, theta=theta, rate=rate))
    return scenarios


@pytest.fixture(scope="module")
def neutral_study():
    return run_study(small_neutral_scenarios(), replicates=REPLICATES, groupings=40, seed=11,
                     jobs=1)


@pytest.mark.slow
def test_false_positive_rate_within_binomial_bounds(neutral_study) -> None:
    # Under a calibrated test the number of rejections at LEVEL among n datasets is
    # Binomial(n, LEVEL) (p-values of a Monte Carlo test with B = 19 are uniform on
    # {1/20, ..., 1}; LEVEL = 0.2 is a multiple of 1/20). Bounds at the 0.0005 tails of that
    # binomial law (common practice for a two-sided check at about 0.001).
    table = rejection_table(neutral_study, LEVEL)
    for row in table.itertuples():
        low = stats.binom.ppf(0.0005, row.datasets, LEVEL)
        high = stats.binom.isf(0.0005, row.datasets, LEVEL)
        assert low <= row.rejected <= high, (row.statistic, row.rejected, row.datasets)


@pytest.mark.slow
def test_every_statistic_has_pvalues_on_long_series(neutral_study) -> None:
    for column in pvalue_columns(neutral_study):
        assert np.isfinite(neutral_study[column]).sum() >= 20, column


@pytest.mark.slow
def test_clear_niche_structure_is_rejected() -> None:
    scenarios = niche_scenarios(3, "logistic") + niche_scenarios(3, "lotka-volterra")
    study = run_study(scenarios, replicates=REPLICATES, groupings=40, seed=5, jobs=1)
    # smallest attainable p-value is 1/(B+1) = 0.05
    assert np.sum(study["p_combined"] <= 0.1) >= 5
