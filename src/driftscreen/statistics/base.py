"""The interface every neutrality statistic implements.

A statistic maps a batch of count tables that share one design, together with the
neutral null fitted to each of them, to one number per table. The same function is
applied to the observed data (a batch of one) and to every bootstrap replicate, so the
calibration compares like with like.
"""

from __future__ import annotations

from typing import Literal, Protocol, runtime_checkable

import numpy as np

from driftscreen.dataset import Design
from driftscreen.neutral.model import NullFit

Alternative = Literal["greater", "two-sided"]


@runtime_checkable
class Statistic(Protocol):
    """A test statistic of neutrality.

    Attributes
    ----------
    name:
        Stable identifier used in every output (``results.tsv``, JSON, report).
    needs_time:
        True if the statistic needs a time series (it is skipped for snapshots).
    alternative:
        ``"greater"``: large values speak against neutrality; ``"two-sided"``:
        departures from the null median in either direction do.
    marginal:
        True if the statistic compares each taxon's abundance distribution across samples
        with the stationary law. In a time series that covers few correlation times the
        samples explore little of that law, and the bootstrap calibration of such a
        statistic then hinges on the poorly identified rate; the calibration withholds its
        p-value there (see :data:`driftscreen.calibrate.MIN_CORRELATION_TIMES`).
    in_combination:
        True if its p-value enters ``combined``. A statistic whose calibration is not yet
        established on every kind of neutral data the validation study covers reports its
        p-value but stays out of the combination.
    title:
        Its name in prose (``"Stationary divergence"``), heading its diagnostics.
    unit:
        What its value is, for the axis of its null distribution.
    methods:
        What it measures, with its published basis, for the methods paragraph of a screen
        (``{groupings}`` stands for the number of random groupings R).
    how_to_read:
        How to read its diagnostics, after its title (``{abundance_classes}`` stands for
        the number of abundance classes the report shows).
    studentised:
        Optional (absent means False). True if the statistic also gives each table's own
        standard error (``standard_error(counts, design, fit, rng)``, shape ``(R,)``), and
        the calibration measures the distance from the null median in those units, for the
        data and every replicate alike: the studentised bootstrap, whose p-values depend less
        on how far the fitted parameters are from the true ones (Hall 1992, *The Bootstrap and
        Edgeworth Expansion*; Davison & Hinkley 1997, *Bootstrap Methods and their
        Application*, ch. 4).
    """

    name: str
    title: str
    unit: str
    methods: str
    how_to_read: str
    needs_time: bool
    alternative: Alternative
    marginal: bool
    in_combination: bool

    def compute(self, counts: np.ndarray, design: Design, fit: NullFit,
                rng: np.random.Generator) -> np.ndarray:
        """Statistic for each table in ``counts`` (shape ``(R, T, K)``), shape ``(R,)``.

        ``rng`` is created afresh from the same seed for every call, so any random
        choice inside (e.g. random groupings of taxa) is identical for the observed
        data and for every replicate. Must be vectorised over R (no Python loop over
        replicates) and return finite values or NaN where undefined.
        """
        ...


def is_studentised(stat: Statistic) -> bool:
    """True if ``stat`` is calibrated in units of its own standard error (see
    :class:`Statistic`)."""
    return bool(getattr(stat, "studentised", False))
