"""Result records of a neutrality test, in the style of scipy.stats hypothesis tests.

A :class:`NeutralityResult` holds, per statistic, a :class:`StatisticResult` with
``statistic``, ``pvalue`` and ``null_distribution`` (the bootstrap replicates), effect
sizes, and the fitted null with bootstrap intervals; ``diagnostics`` holds, per statistic,
a table of what drives it on the observed data (per taxon, pool of rare taxa or grouping).
``influence`` names, for a rejected dataset, the single sample the rejection rests on most
(:mod:`driftscreen.influence`). ``summary()`` renders the fixed-width plain-text report of
:mod:`driftscreen.report.text`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from driftscreen.limits import GROUPINGS, READ_PRECISION, REPLICATES, SEED
from driftscreen.neutral.model import NeutralModel, NullOptions
from driftscreen.statistics.registry import COMBINED
from driftscreen.version import __version__

#: Columns of :meth:`NeutralityResult.to_frame`, one row per statistic. In Python a
#: statistic's p-value is ``pvalue`` (as in scipy.stats); in tables it is ``p_value``.
STATISTIC_COLUMNS = ("statistic", "alternative", "observed", "null_mean", "null_sd",
                     "null_median", "effect_size", "ratio_to_median", "p_value", "note")
#: Level at which :meth:`NeutralityResult.rejected` rejects by default.
ALPHA = 0.05


def rejected(pvalue: float, alpha: float = ALPHA) -> bool:
    """Whether a combined p-value (or q-value) rejects neutrality at ``alpha`` (NaN never does)."""
    return bool(np.isfinite(pvalue) and pvalue <= alpha)


@dataclass(frozen=True)
class CalibrationSettings:
    """Settings of one calibration run; part of every result's provenance."""

    replicates: int = 999
    groupings: int = 200
    seed: int = 0
    null: NullOptions = NullOptions()

    def __post_init__(self) -> None:
        REPLICATES.check("replicates", self.replicates)
        GROUPINGS.check("groupings", self.groupings)
        SEED.check("seed", self.seed)
        if not isinstance(self.null.noise, str):
            READ_PRECISION.check("a fixed read precision", self.null.noise)




@dataclass(frozen=True)
class StatisticResult:
    """One calibrated statistic.

    Attributes
    ----------
    name:
        Stable identifier (e.g. ``"stationary_divergence"``, ``"combined"``).
    statistic:
        Observed value (NaN if undefined for this dataset).
    pvalue:
        Parametric-bootstrap p-value ``(1 + #replicates at least as extreme) / (B + 1)``
        (Davison & Hinkley 1997, eq. 4.11); NaN if the statistic is undefined.
    null_distribution:
        The statistic on the B re-fitted neutral replicates (undefined ones dropped).
    alternative:
        ``"greater"`` or ``"two-sided"`` (distance from the null median).
    note:
        Plain text for the report (e.g. replicates where the statistic was undefined).
    """

    name: str
    statistic: float
    pvalue: float
    null_distribution: np.ndarray
    alternative: str
    note: str = ""

    @property
    def null_mean(self) -> float:
        return float(np.mean(self.null_distribution)) if self.null_distribution.size else np.nan

    @property
    def null_sd(self) -> float:
        if self.null_distribution.size < 2:
            return np.nan
        return float(np.std(self.null_distribution, ddof=1))

    @property
    def null_median(self) -> float:
        return float(np.median(self.null_distribution)) if self.null_distribution.size else np.nan

    @property
    def effect_size(self) -> float:
        """Standardized effect size: (observed - null mean) / null standard deviation."""
        sd = self.null_sd
        if not np.isfinite(sd) or sd == 0:
            return np.nan
        return (self.statistic - self.null_mean) / sd

    @property
    def ratio_to_median(self) -> float:
        """Observed value over the null median (NaN when the median is 0)."""
        median = self.null_median
        if not np.isfinite(median) or median == 0:
            return np.nan
        return self.statistic / median


@dataclass(frozen=True)
class ParameterEstimate:
    """A fitted null parameter with its parametric-bootstrap 95% interval.

    The interval is the basic bootstrap interval on the log scale (Davison & Hinkley 1997,
    section 5.2): ``[estimate^2 / q(0.975), estimate^2 / q(0.025)]`` of the re-fitted
    replicates, which stays positive and corrects the estimator's bias.
    """

    name: str
    estimate: float
    low: float
    high: float
    unit: str = ""


def technical_source(pairs: int) -> str:
    """The unit column of a read precision estimated from ``pairs`` technical replicate pairs."""
    return f"from {pairs} technical replicate {'pair' if pairs == 1 else 'pairs'}"


def from_technical_replicates(estimate: ParameterEstimate) -> bool:
    """Whether a read precision was estimated from technical replicates."""
    return estimate.unit.endswith(("technical replicate pair", "technical replicate pairs"))


@dataclass(frozen=True)
class DatasetSummary:
    """What the report needs to know about the dataset that was tested."""

    name: str
    n_samples: int
    n_taxa: int
    dropped_taxa: int
    time_series: bool
    span_days: float
    depth_min: int
    depth_median: float
    depth_max: int
    notes: tuple[str, ...] = ()
    warnings: tuple[str, ...] = ()


@dataclass(frozen=True)
class SampleInfluence:
    """The most influential single sample of a rejected dataset (see :mod:`driftscreen.influence`).

    Attributes
    ----------
    sample:
        The sample's id.
    index:
        Its position among the dataset's samples (0-based, time order for a time series).
    score:
        Its outlyingness under the fitted neutral null (about 1 for a neutral sample).
    pvalue:
        Combined p-value of the dataset without this sample (a full parametric bootstrap
        with the same settings).
    pvalues:
        Every other statistic's p-value without this sample, by name (NaN where none).
    verdict_changes:
        Whether leaving the sample out changes the verdict at the level the influence was
        computed for (rejected with it, not rejected without it).
    """

    sample: str
    index: int
    score: float
    pvalue: float
    pvalues: dict[str, float]
    verdict_changes: bool


@dataclass(frozen=True)
class NeutralityResult:
    """Outcome of :func:`driftscreen.neutrality_test` for one dataset.

    ``diagnostics`` maps a statistic's name to the table its ``diagnose`` gives on the
    observed data, made storable by :func:`driftscreen.calibrate.storable_table` (taxon
    ids instead of column indices, numbers in 6 significant digits); empty if none.
    ``influence`` is the most influential sample of a rejected dataset, ``None`` when the
    dataset was not rejected or the influence was not computed. ``taxa`` is the calibrated
    per-taxon scan (:mod:`driftscreen.taxon_scan`), one row per taxon or pool of rare
    taxa, made storable like the diagnostics; ``None`` where it was not computed.

    Its provenance: ``settings`` (replicates, groupings, seed and the null's options),
    ``statistic_options`` (every statistic that was run, with its options, as its repr) and
    the driftscreen ``version`` that computed it.
    """

    dataset: DatasetSummary
    model: NeutralModel
    statistics: dict[str, StatisticResult]
    parameters: dict[str, ParameterEstimate]
    settings: CalibrationSettings
    notes: tuple[str, ...] = field(default=())
    diagnostics: dict[str, pd.DataFrame] = field(default_factory=dict)
    influence: SampleInfluence | None = None
    taxa: pd.DataFrame | None = None
    statistic_options: tuple[str, ...] = ()
    version: str = __version__

    def __getitem__(self, name: str) -> StatisticResult:
        return self.statistics[name]

    @property
    def replicates(self) -> int:
        """The number B of neutral replicates."""
        return self.settings.replicates

    @property
    def seed(self) -> int:
        """The master seed."""
        return self.settings.seed

    def rejected(self, alpha: float = ALPHA) -> bool:
        """Whether the combined test rejects neutrality at ``alpha`` (p-value <= alpha)."""
        return rejected(self.pvalue, alpha)

    def to_frame(self) -> pd.DataFrame:
        """One row per statistic (``combined`` last), columns :data:`STATISTIC_COLUMNS`.

        The one table behind the report's statistics, ``results.tsv`` and ``results.json``.
        """
        rows = [(s.name, s.alternative, s.statistic, s.null_mean, s.null_sd, s.null_median,
                 s.effect_size, s.ratio_to_median, s.pvalue, s.note)
                for s in self.statistics.values()]
        return pd.DataFrame(rows, columns=list(STATISTIC_COLUMNS))

    @property
    def pvalue(self) -> float:
        """The combined p-value (calibrated harmonic mean p-value of all statistics)."""
        return self.statistics[COMBINED].pvalue

    @property
    def pvalue_resolution(self) -> float:
        """The smallest attainable p-value, 1 / (B + 1)."""
        return 1.0 / (self.replicates + 1)

    def summary(self) -> str:
        """Fixed-width plain-text report for this dataset."""
        from driftscreen.report.text import dataset_report

        return dataset_report(self)
