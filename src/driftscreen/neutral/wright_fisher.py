"""A plain discrete-generation reference: haploid Wright-Fisher with immigration.

Each generation the N individuals are replaced by N offspring whose taxa are drawn
from ``(1 - m) x + m p`` (a parent from the local community, or with probability ``m``
an immigrant from the metacommunity ``p``). Its diffusion limit is the neutral model
of :mod:`driftscreen.neutral.simulate` with ``theta = 2 N m`` and diffusion time
``tau = generations / N`` (the standard diffusion limit; Ewens 2004), so
the two simulators must agree up to O(1/N) and O(m) terms. It loops over generations
and exists to check the exact simulator and to generate the validation study's
communities, not for production use.

Two departures from the stationary, multinomially sequenced null can be switched on: a
disturbance of the community just before the first sample (it then relaxes towards
``p``), and Dirichlet-multinomial reads, Multinomial(n, Dirichlet(C x)) at precision C,
the usual model of technical (extraction and PCR) noise on top of sampling.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from typing import Literal

import numpy as np

from driftscreen.dataset import Design
from driftscreen.neutral.dirichlet import dirichlet_rows
from driftscreen.neutral.model import NeutralModel


def _offspring_counts(counts: np.ndarray, population_size: int, immigration: float,
                      p: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """One generation: Multinomial(N, (1 - m) x + m p) for every row of counts."""
    probabilities = (1.0 - immigration) * (counts / population_size) + immigration * p
    probabilities /= probabilities.sum(axis=1, keepdims=True)
    return rng.multinomial(population_size, probabilities)


def _rounded_individuals(composition: np.ndarray, population_size: int) -> np.ndarray:
    """Counts summing to N nearest to ``N * composition`` (largest remainders), per row."""
    scaled = population_size * composition / composition.sum(axis=1, keepdims=True)
    counts = np.floor(scaled).astype(np.int64)
    shortfall = population_size - counts.sum(axis=1)
    ranks = np.argsort(np.argsort(counts - scaled, axis=1, kind="stable"), axis=1)
    return counts + (ranks < shortfall[:, None])


#: A disturbance: the compositions ``(R, K)`` of the communities and a random source in,
#: disturbed compositions ``(R, K)`` (non-negative, any positive row sums) out.
Disturbance = Callable[[np.ndarray, np.random.Generator], np.ndarray]


def _check_schedule(generations_at: np.ndarray, immigration: float) -> None:
    if generations_at.ndim != 1 or np.any(np.diff(generations_at) < 0) \
            or np.any(generations_at < 0):
        raise ValueError("generations_at must be non-decreasing, >= 0 and match depths")
    if not 0.0 < immigration <= 1.0:
        raise ValueError(f"immigration must be in (0, 1], got {immigration}")


def _initial_individuals(p: np.ndarray, population_size: int, immigration: float,
                         n_replicates: int, rng: np.random.Generator,
                         start: Literal["stationary"] | np.ndarray) -> np.ndarray:
    """Individuals per taxon at generation 0, shape ``(R, K)`` (see ``start``)."""
    if isinstance(start, str):
        theta = 2.0 * population_size * immigration
        composition = dirichlet_rows(np.broadcast_to(theta * p, (n_replicates, p.size)), rng)
        return rng.multinomial(population_size, composition)
    composition = np.broadcast_to(np.asarray(start, dtype=np.float64), (n_replicates, p.size))
    return _rounded_individuals(composition, population_size)


def _disturbed_individuals(individuals: np.ndarray, population_size: int,
                           disturb: Disturbance, rng: np.random.Generator) -> np.ndarray:
    """The individuals after ``disturb``, rounded back to N per community."""
    composition = np.asarray(disturb(individuals / population_size, rng), dtype=np.float64)
    if composition.shape != individuals.shape or not np.all(np.isfinite(composition)) \
            or np.any(composition < 0) or np.any(composition.sum(axis=1) <= 0):
        raise ValueError(f"disturb must return finite non-negative compositions of shape "
                         f"{individuals.shape} with a positive entry per row")
    return _rounded_individuals(composition, population_size)


def _compositions_at_samples(p: np.ndarray, population_size: int, immigration: float,
                             generations_at: np.ndarray, n_replicates: int,
                             rng: np.random.Generator,
                             start: Literal["stationary"] | np.ndarray,
                             disturb: Disturbance | None) -> Iterator[np.ndarray]:
    """The communities' compositions ``(R, K)`` at each sampling generation, in order."""
    individuals = _initial_individuals(p, population_size, immigration, n_replicates, rng,
                                       start)
    generation = 0
    for t, target in enumerate(generations_at):
        for _ in range(target - generation):
            individuals = _offspring_counts(individuals, population_size, immigration, p, rng)
        generation = target
        if t == 0 and disturb is not None:
            individuals = _disturbed_individuals(individuals, population_size, disturb, rng)
        yield individuals / population_size


def dirichlet_multinomial_reads(composition: np.ndarray, depths: np.ndarray | int,
                                precision: float, rng: np.random.Generator) -> np.ndarray:
    """Reads Multinomial(n, Dirichlet(C x)) for every composition row x (rows sum to 1).

    ``composition`` has shape ``(..., K)`` and ``depths`` broadcasts against
    ``composition.shape[:-1]``. ``precision`` C = inf gives plain Multinomial(n, x). The
    Dirichlet draw is safe for zero entries (they get no reads). Var N_i = n x_i (1 - x_i)
    (n + C) / (1 + C) (Mosimann 1962, Biometrika 49:65). Returns int64 counts.
    """
    if not precision > 0:
        raise ValueError(f"read precision must be positive (inf: multinomial), got {precision}")
    composition = np.asarray(composition, dtype=np.float64)
    if np.isfinite(precision):
        rows = composition.reshape(-1, composition.shape[-1])
        composition = dirichlet_rows(precision * rows, rng).reshape(composition.shape)
    return rng.multinomial(np.asarray(depths, dtype=np.int64), composition).astype(np.int64)


def wright_fisher_compositions(p: np.ndarray, population_size: int, immigration: float,
                               generations_at: np.ndarray, n_replicates: int,
                               rng: np.random.Generator,
                               start: Literal["stationary"] | np.ndarray = "stationary", *,
                               disturb: Disturbance | None = None) -> np.ndarray:
    """The latent compositions (individuals / N) at each sampling generation.

    Arguments as for :func:`simulate_wright_fisher` (without depths and reads); returns
    float64 compositions, shape ``(R, T, K)``.
    """
    p = np.asarray(p, dtype=np.float64)
    p = p / p.sum()
    generations_at = np.asarray(generations_at, dtype=np.int64)
    _check_schedule(generations_at, immigration)
    compositions = np.empty((n_replicates, generations_at.size, p.size))
    for t, composition in enumerate(_compositions_at_samples(
            p, population_size, immigration, generations_at, n_replicates, rng, start,
            disturb)):
        compositions[:, t] = composition
    return compositions


def simulate_wright_fisher(p: np.ndarray, population_size: int, immigration: float,
                           generations_at: np.ndarray, depths: np.ndarray,
                           n_replicates: int, rng: np.random.Generator,
                           start: Literal["stationary"] | np.ndarray = "stationary", *,
                           disturb: Disturbance | None = None,
                           read_precision: float = np.inf) -> np.ndarray:
    """Sequenced samples of a haploid Wright-Fisher community with immigration.

    Parameters
    ----------
    p:
        Metacommunity composition, shape ``(K,)``.
    population_size:
        N individuals.
    immigration:
        Probability m that an offspring is an immigrant.
    generations_at:
        Generation number of each sample (non-decreasing, >= 0), shape ``(T,)``.
    depths:
        Sequencing depth of each sample, shape ``(T,)``.
    n_replicates:
        Number of independent communities R.
    rng:
        Source of randomness.
    start:
        ``"stationary"``: generation 0 is Multinomial(N, Dirichlet(2 N m p)), the
        diffusion's stationary law put on the 1/N grid (exact up to O(1/N) and O(m));
        or compositions of shape ``(K,)`` or ``(R, K)``, rounded to N individuals by
        largest remainders.
    disturb:
        Applied once to the compositions ``(R, K)`` at generation ``generations_at[0]``,
        just before the first sample; its output is rounded to N individuals by largest
        remainders and the community relaxes from there. ``None``: no disturbance.
    read_precision:
        Precision C of Dirichlet-multinomial reads (see
        :func:`dirichlet_multinomial_reads`); inf (default) gives multinomial reads.

    Returns
    -------
    np.ndarray
        Counts, shape ``(R, T, K)``, int64.
    """
    p = np.asarray(p, dtype=np.float64)
    p = p / p.sum()
    generations_at = np.asarray(generations_at, dtype=np.int64)
    depths = np.asarray(depths, dtype=np.int64)
    if generations_at.shape != depths.shape:
        raise ValueError("generations_at must be non-decreasing, >= 0 and match depths")
    _check_schedule(generations_at, immigration)
    if not read_precision > 0:
        raise ValueError(f"read precision must be positive (inf: multinomial), "
                         f"got {read_precision}")
    counts = np.empty((n_replicates, depths.size, p.size), dtype=np.int64)
    for t, composition in enumerate(_compositions_at_samples(
            p, population_size, immigration, generations_at, n_replicates, rng, start,
            disturb)):
        counts[:, t] = dirichlet_multinomial_reads(composition, depths[t], read_precision, rng)
    return counts


def wright_fisher_for(model: NeutralModel, design: Design, population_size: int) -> dict:
    """Wright-Fisher settings matching a neutral model and a time-series design.

    ``m = theta / (2 N)`` and sample generations ``round(N kappa (t - t_0))``, since
    ``tau = generations / N`` and ``tau = kappa * days``.

    Returns
    -------
    dict
        Keyword arguments ``p, population_size, immigration, generations_at, depths``
        for :func:`simulate_wright_fisher`.
    """
    if not design.is_time_series or model.rate is None:
        raise ValueError("the Wright-Fisher reference needs a time series and a model rate")
    immigration = model.theta / (2.0 * population_size)
    if immigration > 1.0:
        raise ValueError(f"population_size {population_size} is too small for theta "
                         f"{model.theta}: needs N >= theta / 2")
    elapsed = model.kappa * (design.times - design.times[0]) * population_size
    generations = np.rint(elapsed).astype(np.int64)
    if np.any(np.diff(generations) <= 0):
        raise ValueError("two sampling times fall in the same generation; "
                         "increase population_size")
    return {"p": model.p, "population_size": int(population_size),
            "immigration": float(immigration), "generations_at": generations,
            "depths": design.depths}
