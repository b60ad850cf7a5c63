"""Limits written once: what the library accepts is what the command line accepts.

* The smallest analysable design (:func:`shortfall`, worded by :func:`unanalysable_reason`),
  applied by :func:`driftscreen.calibrate.neutrality_test`, the screen, power analyses and
  influence.
* The largest read count (:data:`MAX_READS`), per cell, per sample and per stated depth:
  no sequencing run comes near it, and every count below it is exact in float64 and
  int64, so no cast can wrap.
* The longest span of sampling times (:data:`MAX_SPAN_DAYS`).
* The ranges of the options (:class:`IntegerRange`, :class:`NumberRange`), checked by the
  library (:class:`driftscreen.results.CalibrationSettings`,
  :class:`driftscreen.synthetic.DesignSpec`, the simulate command, the niche models) and used
  by the argument parser.
"""

from __future__ import annotations

import math
import operator
from dataclasses import dataclass
from typing import TYPE_CHECKING

from driftscreen.errors import InputError, mention

if TYPE_CHECKING:
    from driftscreen.dataset import Dataset

#: Smallest analysable designs: a time series needs a few intervals for the variogram fit
#: of theta and the rate; a snapshot needs a few replicate communities for theta.
MIN_SAMPLES_TIME_SERIES = 4
MIN_SAMPLES_SNAPSHOT = 3
MIN_TAXA = 2
#: Largest read count of one cell, of one sample's total and of a stated depth: 10^15, far
#: above any sequencing run (the largest give of the order of 10^10 reads; from memory) and
#: below 2^53, so every count up to it is exact in float64 (IEEE 754 binary64 has a 53-bit
#: significand) and in int64.
MAX_READS = 10**15
#: How messages write it.
MAX_READS_TEXT = "10^15"
#: Longest span of one dataset's sampling times: 200 years of 365.25 days.
MAX_SPAN_YEARS = 200
MAX_SPAN_DAYS = MAX_SPAN_YEARS * 365.25
#: Prefix of the note of a dataset a screen cannot analyse.
NOT_ANALYSED = "not analysed: "
#: What to do about a dataset with too few samples, or too few taxa with reads.
FEW_SAMPLES_FIX = ("add samples, or define larger datasets "
                   f"(fewer {mention('dataset_by')} columns)")
FEW_TAXA_FIX = f"check the table (and any {mention('depth')}), or leave this dataset out"


def minimum_samples(time_series: bool) -> int:
    """Fewest samples of an analysable time series or snapshot design."""
    return MIN_SAMPLES_TIME_SERIES if time_series else MIN_SAMPLES_SNAPSHOT


def shortfall(time_series: bool, n_samples: int, n_taxa: int) -> tuple[str, int] | None:
    """What a design of this size lacks to be analysable: ``("samples", fewest)`` or
    ``("taxa", fewest)``; ``None`` when it is analysable.

    Time series need at least 4 samples (3 intervals) and snapshots at least 3 samples,
    both at least 2 taxa with reads.
    """
    minimum = minimum_samples(time_series)
    if n_samples < minimum:
        return "samples", minimum
    if n_taxa < MIN_TAXA:
        return "taxa", MIN_TAXA
    return None


def unanalysable_reason(dataset: Dataset) -> str:
    """Why ``dataset`` cannot be analysed (starting ``"not analysed: "``), or ``""``
    (:func:`shortfall`)."""
    lacking = shortfall(dataset.is_time_series, dataset.n_samples, dataset.n_taxa)
    if lacking is None:
        return ""
    what, minimum = lacking
    if what == "samples":
        kind = "a time series" if dataset.is_time_series else "a snapshot design"
        return (f"{NOT_ANALYSED}{kind} needs at least {minimum} samples, this dataset has "
                f"{dataset.n_samples}")
    return (f"{NOT_ANALYSED}at least {minimum} taxa with reads are needed, this dataset "
            f"has {dataset.n_taxa}")


def check_analysable(dataset: Dataset, fix: str | None = None) -> None:
    """Raise the one-line :class:`InputError` of :func:`unanalysable_reason`, if any, with
    ``fix`` (default: more samples, or a look at the taxa, as the reason asks)."""
    reason = unanalysable_reason(dataset)
    if reason:
        few_samples = shortfall(dataset.is_time_series, dataset.n_samples,
                                dataset.n_taxa)[0] == "samples"
        raise InputError(reason.removeprefix(NOT_ANALYSED), file=", ".join(dataset.source) or None,
                         place=f"dataset '{dataset.name}'",
                         fix=fix or (FEW_SAMPLES_FIX if few_samples else FEW_TAXA_FIX))


@dataclass(frozen=True)
class IntegerRange:
    """The whole numbers an option accepts: ``minimum <= value`` (and ``<= maximum``)."""

    minimum: int
    maximum: int | None = None

    def __contains__(self, value: object) -> bool:
        if isinstance(value, bool):
            return False
        try:
            number = operator.index(value)  # type: ignore[arg-type]
        except TypeError:
            return False
        return number >= self.minimum and (self.maximum is None or number <= self.maximum)

    def describe(self) -> str:
        """``"a whole number >= 1"`` or ``"a whole number from 1 to 1000"``."""
        if self.maximum is None:
            return f"a whole number >= {self.minimum}"
        maximum = MAX_READS_TEXT if self.maximum == MAX_READS else str(self.maximum)
        return f"a whole number from {self.minimum} to {maximum}"

    def check(self, name: str, value: object) -> None:
        """Raise ValueError (a programming error) if ``value`` is outside the range."""
        if value not in self:
            raise ValueError(f"{name} must be {self.describe()}, got {value!r}")


@dataclass(frozen=True)
class NumberRange:
    """The finite numbers an option accepts: ``minimum <= value <= maximum`` (``< maximum``
    with ``open_maximum``)."""

    minimum: float
    maximum: float = math.inf
    open_maximum: bool = False

    def __contains__(self, value: object) -> bool:
        try:
            number = float(value)  # type: ignore[arg-type]
        except (TypeError, ValueError):
            return False
        below = number < self.maximum if self.open_maximum else number <= self.maximum
        return math.isfinite(number) and self.minimum <= number and below

    def describe(self) -> str:
        """``"a number >= 1e-06"``, ``"a number from 0 to 5"`` or ``"a number in [0, 2)"``."""
        if math.isinf(self.maximum):
            return f"a number >= {self.minimum:g}"
        if self.open_maximum:
            return f"a number in {self.interval()}"
        return f"a number from {self.minimum:g} to {self.maximum:g}"

    def interval(self) -> str:
        """``"[0, 2)"``, ``"[1e-06, 5]"`` or ``"[0, inf)"``."""
        closing = ")" if self.open_maximum or math.isinf(self.maximum) else "]"
        return f"[{self.minimum:g}, {self.maximum:g}{closing}"

    def check(self, name: str, value: object) -> None:
        """Raise ValueError (a programming error) if ``value`` is outside the range."""
        if value not in self:
            raise ValueError(f"{name} must be {self.describe()}, got {value!r}")


REPLICATES = IntegerRange(1)
GROUPINGS = IntegerRange(2)
SEED = IntegerRange(0)
JOBS = IntegerRange(1)
READS = IntegerRange(1, MAX_READS)
#: A fixed Dirichlet-multinomial read precision C (below, the draws underflow).
READ_PRECISION = NumberRange(1e-6)
#: Synthetic designs (simulate, power): days between samples (times are kept to 6
#: decimals), standard deviation of log depth, and the immigration parameter theta.
INTERVAL = NumberRange(1e-6, MAX_SPAN_DAYS)
DEPTH_SPREAD = NumberRange(0.0, 5.0)
THETA = NumberRange(1e-6, 1e12)
#: Niche models: the environmental noise sigma of a stochastic logistic taxon (its
#: stationary Gamma law has squared coefficient of variation sigma / (2 - sigma), finite
#: below 2; Grilli 2020, Nat. Commun. 11:4743) and of a Lotka-Volterra community, and the
#: mean competition coefficient of a Lotka-Volterra community.
SIGMA = NumberRange(0.0, 2.0, open_maximum=True)
COMPETITION = NumberRange(0.0)
