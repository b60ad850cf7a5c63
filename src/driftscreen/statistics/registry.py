"""The neutrality statistics by name, in the fixed order used in every output."""

from __future__ import annotations

from dataclasses import fields

from driftscreen.errors import InputError
from driftscreen.statistics.base import Statistic
from driftscreen.statistics.dispersion_heterogeneity import DispersionHeterogeneity
from driftscreen.statistics.fluctuation_scaling import FluctuationScaling
from driftscreen.statistics.regrouping_invariance import RegroupingInvariance
from driftscreen.statistics.stationary_divergence import StationaryDivergence

#: Name of the calibrated combination of the statistics' p-values (see
#: :func:`driftscreen.calibrate.combine`); it is not computed from counts.
COMBINED = "combined"
#: Every statistic class, in output order.
STATISTIC_CLASSES = (StationaryDivergence, RegroupingInvariance, FluctuationScaling,
                     DispersionHeterogeneity)
#: Names of all reported statistics; "combined" (the harmonic mean p-value of the others'
#: p-values) comes last.
STATISTIC_NAMES: tuple[str, ...] = tuple(cls.name for cls in STATISTIC_CLASSES) + (COMBINED,)


def default_statistics(*, time_series: bool, n_groupings: int = 200) -> list[Statistic]:
    """All statistics a design allows, in the fixed order (time-only ones dropped for snapshots).

    ``n_groupings`` is the number of random groupings R, given to every statistic with an
    option of that name (``regrouping_invariance``).
    """
    statistics: list[Statistic] = []
    for cls in STATISTIC_CLASSES:
        if cls.needs_time and not time_series:
            continue
        takes_groupings = "n_groupings" in {option.name for option in fields(cls)}
        statistics.append(cls(n_groupings=n_groupings) if takes_groupings else cls())
    return statistics


def statistic_class(name: str) -> type[Statistic] | None:
    """The registered class of statistic ``name``; ``None`` for ``combined`` or another name."""
    return next((cls for cls in STATISTIC_CLASSES if cls.name == name), None)


def reported_only() -> tuple[type[Statistic], ...]:
    """The registered classes whose p-value is reported but stays out of ``combined``."""
    return tuple(cls for cls in STATISTIC_CLASSES if not cls.in_combination)


def get_statistic(name: str, **options: object) -> Statistic:
    """The statistic called ``name``, built with ``options`` (its dataclass fields).

    Raises
    ------
    InputError
        For an unknown name, or for "combined", which is computed from the others'
        p-values rather than from counts.
    """
    by_name = {cls.name: cls for cls in STATISTIC_CLASSES}
    if name not in by_name:
        raise InputError(f"'{name}' is not a statistic computed from counts",
                         place=f"statistic '{name}'",
                         fix="use one of: " + ", ".join(by_name))
    return by_name[name](**options)
