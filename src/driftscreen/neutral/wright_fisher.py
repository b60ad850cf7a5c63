"""A plain discrete-generation reference: haploid Wright-Fisher with immigration.

Each generation the N individuals are replaced by N offspring whose taxa are drawn
from ``(1 - m) x + m p`` (a parent from the local community, or with probability ``m``
an immigrant from the metacommunity ``p``). Its diffusion limit is the neutral model
of :mod:`driftscreen.neutral.simulate` with ``theta = 2 N m`` and diffusion time
``tau = generations / N`` (the standard diffusion limit; Ewens 2004), so
the two simulators must agree up to O(1/N) and O(m) terms. It loops over generations
and exists to check the exact simulator, not for production use.
"""

from __future__ import annotations

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


def simulate_wright_fisher(p: np.ndarray, population_size: int, immigration: float,
                           generations_at: np.ndarray, depths: np.ndarray,
                           n_replicates: int, rng: np.random.Generator,
                           start: Literal["stationary"] | np.ndarray = "stationary"
                           ) -> np.ndarray:
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

    Returns
    -------
    np.ndarray
        Counts, shape ``(R, T, K)``, int64.
    """
    p = np.asarray(p, dtype=np.float64)
    p = p / p.sum()
    generations_at = np.asarray(generations_at, dtype=np.int64)
    depths = np.asarray(depths, dtype=np.int64)
    if generations_at.shape != depths.shape or np.any(np.diff(generations_at) < 0) \
            or np.any(generations_at < 0):
        raise ValueError("generations_at must be non-decreasing, >= 0 and match depths")
    if not 0.0 < immigration <= 1.0:
        raise ValueError(f"immigration must be in (0, 1], got {immigration}")
    theta = 2.0 * population_size * immigration
    if isinstance(start, str):
        composition = dirichlet_rows(np.broadcast_to(theta * p, (n_replicates, p.size)), rng)
        individuals = rng.multinomial(population_size, composition)
    else:
        composition = np.broadcast_to(np.asarray(start, dtype=np.float64),
                                      (n_replicates, p.size))
        individuals = _rounded_individuals(composition, population_size)
    counts = np.empty((n_replicates, depths.size, p.size), dtype=np.int64)
    generation = 0
    for t, (target, depth) in enumerate(zip(generations_at, depths)):
        for _ in range(target - generation):
            individuals = _offspring_counts(individuals, population_size, immigration, p, rng)
        generation = target
        counts[:, t] = rng.multinomial(depth, individuals / population_size)
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
