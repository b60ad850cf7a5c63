"""Niche community simulators: the alternatives to the neutral null, for validation and power.

Two generators of count tables with niche structure, both sampled with the design of a
dataset (times, depths) like the neutral simulator:

* :class:`StochasticLogistic` -- independent taxa, each a logistic population with
  multiplicative environmental noise (Grilli 2020, Nat. Commun. 11:4743).
* :class:`NoisyLotkaVolterra` -- competing taxa in a generalised Lotka-Volterra community
  with environmental noise and a small immigration flux (Lotka 1925; Volterra 1926;
  Stein et al. 2013, PLoS Comput. Biol. 9:e1003388; Fisher & Mehta 2014, PNAS 111:13111).
* :class:`EnvironmentalTracking` -- a neutral community in which a few taxa, of known
  strengths, also track a fluctuating environment (the per-taxon scan's planted truth).

Each exposes ``departures``: how far each taxon departs from neutral drift, by the
parameters its simulation draws first.

Both integrate absolute abundances x in log space with one shared step: over a sub-step h
with frozen coefficients, dx = x (g - c x) dt + sqrt(s) x dW (Ito) has the solution

    x(h) = x e^Z / (1 + c x int_0^h e^Z(u) du),   Z(u) = (g - s/2) u + sqrt(s) W(u),

because 1/x solves a linear SDE. Z(h) is drawn exactly (Gaussian); the time integral is
taken along the straight line between Z(0) and Z(h), h (e^Z - 1)/Z, which is exact without
noise and keeps x positive and finite for any noise strength. Every sampling interval is
split into equal sub-steps no longer than 1/``substeps`` of the shortest generation time.
Samples are Multinomial(depth_t, x_t / sum x_t), normalised in float64 from log space.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from driftscreen.dataset import Design
from driftscreen.limits import COMPETITION, SIGMA
from driftscreen.neutral.dirichlet import log_standard_gamma
from driftscreen.neutral.model import NeutralModel
from driftscreen.neutral.simulate import simulate_abundances


def sequence_counts(log_abundance: np.ndarray, depths: np.ndarray,
                    rng: np.random.Generator) -> np.ndarray:
    """Multinomial reads at each sample's depth from log abundances ``(R, T, K)``.

    Relative abundances are exp(log x - max) renormalised in float64, so rows never
    vanish or sum above 1 by rounding. Returns int64 counts ``(R, T, K)``.
    """
    weights = np.exp(log_abundance - log_abundance.max(axis=2, keepdims=True))
    weights /= weights.sum(axis=2, keepdims=True)
    return rng.multinomial(np.asarray(depths, dtype=np.int64)[None, :], weights).astype(np.int64)


def log_uniform(low_decades: float, n_replicates: int, n_taxa: int,
                rng: np.random.Generator) -> np.ndarray:
    """Values 10^(-low_decades * U), U ~ Uniform(0, 1): log-uniform on [10^-low_decades, 1]."""
    return 10.0 ** (-low_decades * rng.random((n_replicates, n_taxa)))


def log_gamma(shape: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """log of Gamma(shape, 1) draws, finite even for tiny shapes.

    Uses G(a) = G(a + 1) U^(1/a) (exact for a > 0), kept in logs so that shapes well
    below 1 never underflow to log 0.
    """
    shape = np.asarray(shape, dtype=np.float64)
    return np.log(rng.standard_gamma(shape + 1.0)) + np.log(rng.random(shape.shape)) / shape


def _relative_growth(z: np.ndarray) -> np.ndarray:
    """(e^z - 1)/z, with its series 1 + z/2 near 0 (faster than scipy.special.exprel)."""
    small = np.abs(z) < 1e-6
    safe = np.where(small, 1.0, z)
    return np.where(small, 1.0 + 0.5 * z, np.expm1(safe) / safe)


def _logistic_step(log_x: np.ndarray, growth: np.ndarray | float, crowding: np.ndarray | float,
                   noise: np.ndarray | float, h: float, rng: np.random.Generator) -> np.ndarray:
    """log x after a sub-step h of dx = x (growth - crowding x) dt + sqrt(noise) x dW (Ito).

    Exact in the Gaussian log increment; the integral of e^Z over the step follows the
    straight line between its end points (exact when noise = 0).
    """
    increment = (growth - 0.5 * noise) * h + np.sqrt(noise * h) * rng.standard_normal(log_x.shape)
    integral = h * _relative_growth(increment)
    return log_x + increment - np.log1p(crowding * np.exp(log_x) * integral)


def _substep_counts(gaps: np.ndarray, max_step: float) -> np.ndarray:
    """Number of equal sub-steps per interval so that none is longer than ``max_step``."""
    return np.maximum(1, np.ceil(gaps / max_step - 1e-9)).astype(np.int64)


class _SampledCommunity:
    """What both niche models share: abundances from their log-abundance paths, and reads."""

    def _log_abundances(self, design: Design, n_replicates: int,
                        rng: np.random.Generator) -> np.ndarray:
        raise NotImplementedError

    def abundances(self, design: Design, n_replicates: int,
                   rng: np.random.Generator) -> np.ndarray:
        """Absolute abundances x (before normalisation), shape ``(R, T, K)``."""
        return np.exp(self._log_abundances(design, n_replicates, rng))

    def simulate(self, design: Design, n_replicates: int, rng: np.random.Generator) -> np.ndarray:
        """Read counts ``(R, T, K)`` int64 with the design's times and depths."""
        return sequence_counts(self._log_abundances(design, n_replicates, rng), design.depths, rng)


@dataclass(frozen=True)
class StochasticLogistic(_SampledCommunity):
    """Stochastic logistic model per taxon (Grilli 2020, Nat. Commun. 11:4743,
    "Macroecological laws describing variation and diversity in microbial communities").

    Each taxon i follows, independently of the others,

        dx_i = (x_i / tau) (1 - x_i / K_i) dt + sqrt(sigma / tau) x_i dW_i      (Ito),

    with environmental (multiplicative) noise of strength sigma = ``strength`` and
    self-interaction 1/(tau K_i). Its stationary law is Gamma with shape 2/sigma - 1 and
    scale sigma K_i / 2 (mean K_i (1 - sigma/2)), from the zero-flux solution of the
    Fokker-Planck equation. Small fluctuations of log x relax at rate (1 - sigma/2)/tau;
    1/x relaxes exactly at rate (1 - sigma)/tau (its drift is linear).

    The community's relative abundances are the normalised x; each sample is a multinomial
    draw at its depth.

    Attributes
    ----------
    n_taxa:
        Number of taxa K.
    strength:
        sigma in [0, 2): the niche-strength knob for power analysis. sigma -> 0 gives a
        constant community at x = K, i.e. a neutral community with infinite theta plus
        sampling noise: indistinguishable from neutral. Larger sigma means larger,
        taxon-independent fluctuations (sigma = 1: exponential abundance laws; sigma > 1:
        taxa spend long stretches near zero).
    timescale:
        tau in days (generation time of the logistic growth).
    spread_decades:
        Carrying capacities K_i are drawn per replicate log-uniformly on
        [10^-spread_decades, 1]: mean abundances spread over that many orders of magnitude.
    substeps:
        Integration sub-steps per ``timescale`` (each sampling interval is split into equal
        sub-steps no longer than timescale / substeps).

    Notes
    -----
    A time series starts from exact independent stationary Gamma draws, so no burn-in is
    needed; a snapshot design draws every sample as an independent stationary community
    (same K_i within a replicate).
    """

    n_taxa: int
    strength: float = 1.0
    timescale: float = 1.0
    spread_decades: float = 3.0
    substeps: int = 20

    def __post_init__(self) -> None:
        if self.n_taxa < 1:
            raise ValueError("n_taxa must be at least 1")
        if self.strength not in SIGMA:
            raise ValueError(f"strength (sigma) must be in {SIGMA.interval()}, "
                             f"got {self.strength}")
        if not self.timescale > 0:
            raise ValueError("timescale must be positive")
        if self.spread_decades < 0:
            raise ValueError("spread_decades must be non-negative")
        if self.substeps < 1:
            raise ValueError("substeps must be at least 1")

    def draw_capacities(self, n_replicates: int, rng: np.random.Generator) -> np.ndarray:
        """Carrying capacities K_i per replicate, shape ``(R, K)``, log-uniform (see class)."""
        return log_uniform(self.spread_decades, n_replicates, self.n_taxa, rng)

    def stationary_log(self, capacities: np.ndarray, n_samples: int,
                       rng: np.random.Generator) -> np.ndarray:
        """Independent stationary draws of log x, shape ``(R, n_samples, K)``.

        Gamma(2/sigma - 1, scale sigma K_i / 2) (Grilli 2020); sigma = 0 gives x = K_i.
        """
        log_k = np.log(capacities)[:, None, :]
        if self.strength == 0.0:
            return np.broadcast_to(log_k, (capacities.shape[0], n_samples, self.n_taxa)).copy()
        shape = np.full((capacities.shape[0], n_samples, self.n_taxa), 2.0 / self.strength - 1.0)
        return log_gamma(shape, rng) + np.log(0.5 * self.strength) + log_k

    def integrate_log(self, log_start: np.ndarray, capacities: np.ndarray, times: np.ndarray,
                      rng: np.random.Generator) -> np.ndarray:
        """log x at ``times`` ``(R, T, K)``, starting from ``log_start`` ``(R, K)`` at times[0]."""
        tau, sigma = self.timescale, self.strength
        crowding = 1.0 / (tau * capacities)
        gaps = np.diff(np.asarray(times, dtype=np.float64))
        path = np.empty((log_start.shape[0], gaps.size + 1, log_start.shape[1]))
        path[:, 0] = log_x = log_start
        for t, (gap, n_sub) in enumerate(zip(gaps, _substep_counts(gaps, tau / self.substeps)), 1):
            for _ in range(n_sub):
                log_x = _logistic_step(log_x, 1.0 / tau, crowding, sigma / tau, gap / n_sub, rng)
            path[:, t] = log_x
        return path

    def departures(self, n_replicates: int, rng: np.random.Generator) -> np.ndarray:
        """How far each taxon departs from neutral drift, ``(R, K)``: its carrying capacity.

        Every taxon has the same multiplicative noise sigma, so its variance grows as the
        square of its share p, against p (1 - p)/(1 + theta) under drift at a common theta:
        the ratio grows with the share, i.e. with K_i. (A fitted theta absorbs much of the
        shared noise, so the scan then flags both ends of the abundance range.) ``rng`` in the state
        :meth:`simulate` starts from gives the capacities that simulation uses (they are
        its first draw).
        """
        return self.draw_capacities(n_replicates, rng)

    def _log_abundances(self, design: Design, n_replicates: int,
                        rng: np.random.Generator) -> np.ndarray:
        capacities = self.draw_capacities(n_replicates, rng)
        if design.times is None:
            return self.stationary_log(capacities, design.n_samples, rng)
        start = self.stationary_log(capacities, 1, rng)[:, 0]
        return self.integrate_log(start, capacities, design.times, rng)


@dataclass(frozen=True)
class LotkaVolterraParameters:
    """Parameters of one batch of generalised Lotka-Volterra communities.

    dx_i = r_i x_i (1 - x_i/K_i - sum_{j != i} C_ij x_j/K_j) dt + sqrt(noise r_i) x_i dW_i
           + immigration r_i K_i dt,

    i.e. gLV with A_ii = -r_i/K_i and A_ij = -r_i C_ij/K_j.

    Attributes
    ----------
    growth:
        r_i per day, shape ``(R, K)``.
    capacity:
        K_i, shape ``(R, K)``.
    competition:
        C_ij >= 0, shape ``(R, K, K)``, zero diagonal: the growth reduction of taxon i
        caused by taxon j at its own carrying capacity, relative to i's self-limitation.
    """

    growth: np.ndarray
    capacity: np.ndarray
    competition: np.ndarray


@dataclass(frozen=True)
class _StepRates:
    """Per-replicate coefficients of one gLV sub-step, broadcast over runs ``(R, 1, K)``."""

    growth: np.ndarray
    capacity: np.ndarray
    crowding: np.ndarray
    noise: np.ndarray
    competition_t: np.ndarray   # (R, K, K) contiguous C^T, so that filling @ C^T = C filling
    log_inflow: np.ndarray | None

    @classmethod
    def of(cls, parameters: LotkaVolterraParameters, noise: float,
           immigration: float) -> _StepRates:
        growth = parameters.growth[:, None, :]
        capacity = parameters.capacity[:, None, :]
        inflow = None if immigration == 0.0 else np.log(immigration * growth * capacity)
        return cls(growth, capacity, growth / capacity, noise * growth,
                   np.ascontiguousarray(parameters.competition.transpose(0, 2, 1)), inflow)

    def step(self, log_x: np.ndarray, h: float, rng: np.random.Generator) -> np.ndarray:
        """Logistic step with competition frozen over h, then immigration h * flux."""
        pressure = np.matmul(np.exp(log_x) / self.capacity, self.competition_t)
        log_x = _logistic_step(log_x, self.growth * (1.0 - pressure), self.crowding, self.noise,
                               h, rng)
        if self.log_inflow is None:
            return log_x
        return np.logaddexp(log_x, self.log_inflow + np.log(h))


@dataclass(frozen=True)
class NoisyLotkaVolterra(_SampledCommunity):
    """Competitive generalised Lotka-Volterra community with environmental noise.

    The standard gLV (Lotka 1925; Volterra 1926), as used for gut communities by Stein et
    al. 2013 (PLoS Comput. Biol. 9:e1003388), with the multiplicative environmental noise
    of the noisy niche community of Fisher & Mehta 2014 (PNAS 111:13111),
    dx_i = x_i (r_i + sum_j A_ij x_j) dt + sqrt(noise r_i) x_i dW_i, plus a small immigration
    flux so that no taxon goes extinct (see :class:`LotkaVolterraParameters` for the exact
    equation). Interactions are competitive (C_ij >= 0), so abundances stay bounded by the
    carrying capacities for any strength.

    Per replicate, drawn from ``rng``: growth rates r_i log-uniform on
    [1/(2 timescale), 2/timescale]; capacities K_i log-uniform on [10^-spread_decades, 1];
    competition C_ij = strength * U_ij with U_ij ~ Uniform(0, 2) (mean 1) for i != j.

    Attributes
    ----------
    n_taxa:
        Number of taxa K.
    strength:
        Mean competition coefficient C_ij: the fraction by which one other taxon at its own
        carrying capacity reduces a taxon's growth. The total pressure on a taxon is about
        strength * (K - 1) times the mean filling x_j/K_j; above ~1/(K - 1) competition
        dominates self-limitation and some taxa are excluded down to the immigration level
        (rare taxa). strength = 0 gives independent stochastic logistic taxa
        (:class:`StochasticLogistic` with sigma = noise, tau_i = 1/r_i).
    noise:
        Dimensionless environmental noise, the sigma of the stochastic logistic model per
        taxon (noise variance rate noise * r_i); in [0, 2).
        Indistinguishable from neutral: noise -> 0 when the community settles at a stable
        equilibrium gives a constant community, i.e. a neutral community with infinite
        theta plus sampling noise. Without noise, all 50 checked communities at the
        default strength settled (within ~1000 timescales); at strength 0.5 some kept
        fluctuating (competitive cycles), which is niche dynamics even without noise.
    timescale:
        Typical generation time 1/r in days.
    spread_decades:
        Spread of the carrying capacities in orders of magnitude.
    immigration:
        Immigration flux of taxon i is immigration * r_i * K_i per day: an excluded taxon
        settles near immigration * K_i / (pressure - 1) instead of going extinct.
    burn_in:
        Length of the burn-in in units of ``timescale`` before the first sample (from
        x_i = K_i / (1 + strength (K - 1))); snapshot samples are independent runs of this
        length. The low tail of log x mixes slowly under strong noise: started at capacity,
        a stochastic logistic taxon reaches its Gamma law (KS, 2e4 draws) within ~25
        generation times 1/r at noise 1, ~50 at 1.3 and ~100 at 1.5. The default 50
        timescales is 25 generation times of the slowest taxon (r = 1/(2 timescale)):
        enough for noise <= 1; raise ``burn_in`` for stronger noise.
    substeps:
        Integration sub-steps per timescale / 2 (the shortest generation time): the
        competition term is frozen over a sub-step (first-order splitting); immigration is
        added after each sub-step. Abundance quantiles agree to ~1% between 10 and 200.
    """

    n_taxa: int
    strength: float = 0.2
    noise: float = 0.5
    timescale: float = 1.0
    spread_decades: float = 2.0
    immigration: float = 1e-3
    burn_in: float = 50.0
    substeps: int = 20

    def __post_init__(self) -> None:
        if self.n_taxa < 1:
            raise ValueError("n_taxa must be at least 1")
        if self.strength not in COMPETITION:
            raise ValueError("strength must be non-negative")
        if self.noise not in SIGMA:
            raise ValueError(f"noise must be in {SIGMA.interval()}, got {self.noise}")
        if not self.timescale > 0:
            raise ValueError("timescale must be positive")
        if self.spread_decades < 0 or self.immigration < 0 or self.burn_in < 0:
            raise ValueError("spread_decades, immigration and burn_in must be non-negative")
        if self.substeps < 1:
            raise ValueError("substeps must be at least 1")

    def draw_parameters(self, n_replicates: int,
                        rng: np.random.Generator) -> LotkaVolterraParameters:
        """Growth rates, capacities and competition for ``n_replicates`` communities."""
        k = self.n_taxa
        growth = np.exp(np.log(2.0) * (2.0 * rng.random((n_replicates, k)) - 1.0)) / self.timescale
        capacity = log_uniform(self.spread_decades, n_replicates, k, rng)
        competition = self.strength * 2.0 * rng.random((n_replicates, k, k))
        competition[:, np.arange(k), np.arange(k)] = 0.0
        return LotkaVolterraParameters(growth, capacity, competition)

    def integrate_log(self, log_start: np.ndarray, parameters: LotkaVolterraParameters,
                      times: np.ndarray, rng: np.random.Generator) -> np.ndarray:
        """log x at ``times`` starting from ``log_start`` at times[0].

        ``log_start`` has shape ``(R, S, K)``: S independent communities per replicate
        sharing the replicate's parameters. Returns shape ``(R, S, T, K)``.
        """
        gaps = np.diff(np.asarray(times, dtype=np.float64))
        path = np.empty(log_start.shape[:2] + (gaps.size + 1,) + log_start.shape[2:])
        path[:, :, 0] = log_x = log_start
        rates = _StepRates.of(parameters, self.noise, self.immigration)
        for t, (gap, n_sub) in enumerate(zip(gaps, _substep_counts(gaps, self._max_step)), 1):
            for _ in range(n_sub):
                log_x = rates.step(log_x, gap / n_sub, rng)
            path[:, :, t] = log_x
        return path

    def departures(self, n_replicates: int, rng: np.random.Generator) -> np.ndarray:
        """How far each taxon departs from neutral drift, ``(R, K)``: its carrying capacity.

        As in :meth:`StochasticLogistic.departures`: the environmental noise is the same
        for every taxon, so the excess of its variance over drift grows with its share, set
        by K_i (competition lowers every share by a similar factor). ``rng`` in the state
        :meth:`simulate` starts from gives that simulation's capacities (the parameters
        are its first draw).
        """
        return self.draw_parameters(n_replicates, rng).capacity

    @property
    def _max_step(self) -> float:
        return 0.5 * self.timescale / self.substeps

    def _log_abundances(self, design: Design, n_replicates: int,
                        rng: np.random.Generator) -> np.ndarray:
        parameters = self.draw_parameters(n_replicates, rng)
        n_runs = 1 if design.is_time_series else design.n_samples
        start = np.log(parameters.capacity / (1.0 + self.strength * (self.n_taxa - 1)))
        start = np.repeat(start[:, None, :], n_runs, axis=1)
        burn_in = np.array([0.0, self.burn_in * self.timescale])
        settled = self.integrate_log(start, parameters, burn_in, rng)[:, :, -1]
        if design.times is None:
            return settled
        return self.integrate_log(settled, parameters, design.times, rng)[:, 0]


@dataclass(frozen=True)
class EnvironmentalTracking(_SampledCommunity):
    """A neutral community in which a few taxa track a fluctuating environment.

    Every taxon drifts neutrally (Wright-Fisher diffusion with immigration at ``theta`` and
    ``rate``, metacommunity shares log-normal with log-sd ``spread``), but the abundance of
    responding taxon i is multiplied by exp(s_i E_i(t)), with E_i an independent stationary
    Ornstein-Uhlenbeck process of unit variance and correlation time ``timescale`` days:
    species sorting along a fluctuating environmental factor (Leibold et al. 2004, Ecol.
    Lett. 7:601), on top of drift. The strengths s_i are ``strengths``, given to as many
    taxa drawn at random among the more abundant half of the metacommunity (so that each is
    tested on its own, not in a pool of rare taxa); the others have s_i = 0 and stay neutral
    apart from the renormalisation. Snapshot samples are independent stationary communities
    with independent environments.
    """

    n_taxa: int
    strengths: tuple[float, ...] = (0.3, 0.5, 0.7, 0.9, 1.1)
    theta: float = 100.0
    rate: float = 0.3
    timescale: float = 5.0
    spread: float = 1.5

    def __post_init__(self) -> None:
        if self.n_taxa < 2 * len(self.strengths):
            raise ValueError("n_taxa must be at least twice the number of responding taxa")
        if min(self.strengths, default=0.0) < 0:
            raise ValueError("strengths must be non-negative")
        if not (self.theta > 0 and self.rate > 0 and self.timescale > 0):
            raise ValueError("theta, rate and timescale must be positive")

    def draw_community(self, n_replicates: int,
                       rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
        """Metacommunity shares p and response strengths s, both ``(R, K)``."""
        weights = np.exp(rng.normal(0.0, self.spread, (n_replicates, self.n_taxa)))
        p = weights / weights.sum(axis=1, keepdims=True)
        abundant = np.argsort(-p, axis=1)[:, :self.n_taxa // 2]
        chosen = rng.permuted(abundant, axis=1)[:, :len(self.strengths)]
        strengths = np.zeros_like(p)
        np.put_along_axis(strengths, chosen, np.asarray(self.strengths, dtype=np.float64)[None],
                          axis=1)
        return p, strengths

    def departures(self, n_replicates: int, rng: np.random.Generator) -> np.ndarray:
        """How far each taxon departs from neutral drift, ``(R, K)``: its strength s_i.

        ``rng`` in the state :meth:`simulate` starts from gives that simulation's strengths
        (the community is its first draw).
        """
        return self.draw_community(n_replicates, rng)[1]

    def environment(self, design: Design, n_replicates: int,
                    rng: np.random.Generator) -> np.ndarray:
        """E_i(t), ``(R, T, K)``: stationary unit Ornstein-Uhlenbeck paths (independent
        draws for a snapshot design)."""
        shape = (n_replicates, design.n_samples, self.n_taxa)
        noise = rng.standard_normal(shape)
        if design.times is None:
            return noise
        keep = np.exp(-np.diff(design.times) / self.timescale)
        path = np.empty(shape)
        path[:, 0] = noise[:, 0]
        for t, rho in enumerate(keep, 1):
            path[:, t] = rho * path[:, t - 1] + np.sqrt(1.0 - rho * rho) * noise[:, t]
        return path

    def _log_abundances(self, design: Design, n_replicates: int,
                        rng: np.random.Generator) -> np.ndarray:
        p, strengths = self.draw_community(n_replicates, rng)
        if design.times is None:
            shapes = np.repeat((self.theta * p)[:, None, :], design.n_samples, axis=1)
            drift = log_standard_gamma(shapes, rng)
        else:
            with np.errstate(divide="ignore"):
                drift = np.log(np.concatenate([
                    simulate_abundances(NeutralModel(row, self.theta, self.rate), design.times,
                                        1, rng) for row in p]))
        return drift + strengths[:, None, :] * self.environment(design, n_replicates, rng)
