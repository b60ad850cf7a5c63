"""``regrouping_invariance``: neutral drift looks the same for every grouping of taxa.

Basis. Under neutrality any group G of taxa is itself a two-type Wright-Fisher diffusion
with immigration (theta, P_G), whatever the group (the grouping invariance behind the
neutral covariance test of Washburne, Burby, Lacker (2016) "Novel covariance-based
neutrality test of time-series data reveals asymmetries in ecological and economic
systems", PLoS Comput. Biol. 12: e1005124; design note section 6). The angular
transform y = arcsin(sqrt(x)) gives it a diffusion coefficient 1/4 free of G and of the
abundance, and Anscombe's version arcsin(sqrt((N + 3/8)/(n + 3/4))) gives binomial
sampling noise of variance 1/(4 n + 2) free of the abundance (Anscombe 1948,
Biometrika 35:246-254). So y_G is close to an Ornstein-Uhlenbeck process with the
neutral rate and stationary variance s_G = f_G / (4 (theta + 1)), observed with sampling
noise. Given the previous sample, the OU mean relaxes as
E[y(t + dt) | y(t)] = mu_G + (y(t) - mu_G) phi, phi = exp(-rate dt), so the innovations

    eta_t = y_{t+1} - phi_t y_t - (1 - phi_t) mu_G

have, for every group, the expected variance

    e_t = s_G (1 - phi_t^2) + 1/(4 n_{t+1} + 2) + phi_t^2 / (4 n_t + 2),

the OU's conditional variance plus the sampling parts (with technical noise g, at the
effective depths 1/(g + (1 - g)/n_t) of Dirichlet-multinomial reads). mu_G is each group's
own generalised least-squares estimate from its innovations (weights 1/e_t), so the
volatility v_G = sum_t eta_t^2 / e_t / (T - 2) is about 1 for every group, one degree of
freedom spent on mu_G. f_G = 1 where theta P_G (1 - P_G) >> 1; for rare groups (and their
complements) the stationary angular variance is smaller, and
f_G = 4 (theta + 1) Var[arcsin sqrt(X_G)] comes from the Gamma approximation of X_G
(:func:`angular_variance_factor`, e.g. 0.08, 0.49, 0.84 at theta P_G = 0.02, 0.2, 0.8).
Under niche dynamics taxa differ in how much they fluctuate, and groups rich in volatile
taxa have larger v_G.

Why innovations. Squared increments y_{t+1} - y_t have the expected variance
2 s_G (1 - phi_t) only at stationarity: in a community relaxing from a disturbance, a group
far from mu_G moves by (mu_G - y_t)(1 - phi_t) on top of its drift, so v_G grew with the
group's distance from its metacommunity share and the statistic with the size of the
disturbance, and the replicates, conditioned on the first sample but relaxing to the
fitted p at the re-fitted rate, did not reproduce the data's own error in either. The
innovations take the relaxation out whatever the start. In the validation study's
generators (B = 99; every 2nd disturbed and every 3rd stationary, C = 100 and C = 1000
series, 582 in all) the rate at 0.05 went from 0.104 to 0.030 on series starting from a
wholly different composition and from 0.009 to 0.035 on stationary series, 0.043 pooled
either way; power at 0.05 against four niche collections of the study (40 datasets each)
stayed at 0.95-1.00.

Why f_G. With f_G = 1 for all groups, rare groups have v_G well below 1 under
neutrality, so the statistic depends on how rare the groups are, i.e. on the fitted p,
whose rare entries are noisier than the true ones: in a check of the squared-increment
form (40 taxa, 60 daily samples, depths over a 100-fold range, theta = 40, 300 neutral
datasets, 99 replicates each) the bootstrap mean sat 3% above the truth and p-values were
conservative (<= 0.05 and <= 0.2 in 2.3% and 10% of datasets); with f_G, 5.0% and 17%,
and the null mean is a fifth lower.

Statistic: the weighted variance over groupings of log v_G. For the weighted
least-squares line of log v_G on the logit of the groups' mean abundance, this variance
is exactly the residual variance plus slope^2 times the variance of the logit, so it
counts both a trend of volatility with abundance and scatter around it, with no tuning
weight between the two. A group's weight is E[min(1, n_h X_G (1 - X_G) / 5)] over its
neutral abundance law X_G ~ Beta(theta P_G, theta (1 - P_G)), n_h the harmonic-mean depth
and P_G its fitted abundance (:func:`expected_read_weight`): the share of the time the
angular transform's sampling variance holds (expected reads n x (1 - x) >= 5 for
Anscombe's version; design note section 6), counted in part below, smoothly, so no
replicate loses groups abruptly; groups without reads weigh 0.

Why the weight is taken over the abundance law. Taken at the mean, min(1, n_h P_G
(1 - P_G) / 5), it gave full weight to groups with theta P_G < 1, whose abundance is
near 0 much of the time (U-shaped Beta law), whose angular innovations are far from the
OU's, and whose number grows with the unevenness of the fitted p; replicates drawn at a
fitted p, more uneven than the true one, held more such groups, a larger scatter of
log v_G, and the statistic was conservative at low theta: in the study's generators at
theta = 10 (167 stationary series, B = 49) the scatter averaged 0.065 in the data,
0.077 in replicates at the fitted null and 0.062 at the true parameters, and 1.8% of
p-values were <= 0.05. Over the abundance law the weight is unchanged where
theta P_G (1 - P_G) >> 1 and small where the group is mostly absent. In the validation
study (400 datasets per collection, B = 199) the rate at 0.05 went from 0.012 to 0.021 at
theta 10-30, from 0.022 to 0.033 on disturbed starts, from 0.030 to 0.034 pooled over the
collections inside the null, and power against the niche collections stayed at 1.00
(0.98 on tracking before). Remaining departures from v_G = 1 under neutrality (the OU
and Gamma approximations, a few per cent) are part of the null distribution, which the
parametric bootstrap supplies.

The groupings are drawn from ``rng`` (size uniform on 1..K-1, then a uniformly random
subset of that size); the calibration re-creates ``rng`` from one seed for every call,
so the observed table and every replicate use the same groupings. Group reads for all
tables come from one matrix product (R T, K) @ (K, n_groupings).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np
import pandas as pd
from scipy import special

from driftscreen.dataset import Design
from driftscreen.neutral.model import (NeutralModel, NullFit, sampling_variance_factor,
                                       single_fit)
from driftscreen.statistics.base import Alternative


@dataclass(frozen=True)
class GroupVolatility:
    """Membership ``(K, G)``; per table and grouping ``(R, G)``: v_G, P_G, weight."""

    members: np.ndarray
    volatility: np.ndarray
    abundance: np.ndarray
    weight: np.ndarray


@dataclass(frozen=True)
class RegroupingInvariance:
    """Variance over random groupings of taxa of their log volatility.

    Attributes
    ----------
    n_groupings:
        Number of random groupings of taxa.
    min_group_reads:
        n_h P_G (1 - P_G) from which a grouping has full weight.
    """

    name: ClassVar[str] = "regrouping_invariance"
    #: How outputs name it, and what its value is (the axis of its null distribution).
    title: ClassVar[str] = "Regrouping invariance"
    unit: ClassVar[str] = "variance of log volatility over groupings of taxa"
    #: What it measures, for the methods paragraph ({groupings}: R).
    methods: ClassVar[str] = (
        "the variance, over R = {groupings} random groupings of taxa, of the log volatility "
        "of the innovations of the groups' angular-transformed abundances given the "
        "previous sample (the grouping invariance of neutral "
        "drift, after Washburne et al. 2016, PLoS Comput. Biol. 12:e1005124; angular "
        "transform of Anscombe 1948, Biometrika 35:246)")
    #: How to read its diagnostics ({abundance_classes}: classes of the report).
    how_to_read: ClassVar[str] = (
        "Volatility: squared innovations of a group's angular-"
        "transformed abundance (its change from where neutral relaxation would take it from "
        "the previous sample) over their neutral expectation, averaged "
        "with the statistic's weights; groups in up to {abundance_classes} classes of equal "
        "size by fitted abundance (fraction of reads). Under neutrality every class is near "
        "1; a trend or spread across classes points to niche structure.")
    needs_time: ClassVar[bool] = True
    alternative: ClassVar[Alternative] = "greater"
    marginal: ClassVar[bool] = False
    in_combination: ClassVar[bool] = True
    studentised: ClassVar[bool] = False

    n_groupings: int = 200
    min_group_reads: float = 5.0

    def compute(self, counts: np.ndarray, design: Design, fit: NullFit,
                rng: np.random.Generator) -> np.ndarray:
        """Weighted variance over groupings of log v_G, shape ``(R,)``.

        NaN when fewer than two groupings have positive weight.
        """
        groups = self.group_volatility(counts, design, fit, rng)
        weight = groups.weight
        log_volatility = np.log(np.where(weight > 0, groups.volatility, 1.0))
        total = weight.sum(axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            mean = (weight * log_volatility).sum(axis=1) / total
            spread = (weight * (log_volatility - mean[:, None]) ** 2).sum(axis=1) / total
        return np.where(np.count_nonzero(weight, axis=1) >= 2, spread, np.nan)

    def group_volatility(self, counts: np.ndarray, design: Design, fit: NullFit,
                         rng: np.random.Generator) -> GroupVolatility:
        """Volatility of every random grouping in every table."""
        counts = np.asarray(counts)
        if design.times is None or fit.rate is None:
            raise ValueError("regrouping_invariance needs a time series and a fitted rate")
        n_rep, n_samples, n_taxa = counts.shape
        members = draw_groupings(n_taxa, self.n_groupings, rng)
        depths = design.depths.astype(np.float64)
        group_reads = (counts.reshape(n_rep * n_samples, n_taxa).astype(np.float64)
                       @ members.astype(np.float64)).reshape(n_rep, n_samples, -1)
        group_p = fit.p @ members
        volatility = innovation_volatility(group_reads, depths, design.intervals, fit.theta,
                                           fit.rate, angular_variance_factor(fit.theta, group_p),
                                           fit.noise)
        harmonic_depth = 1.0 / np.mean(1.0 / depths)
        weight = expected_read_weight(fit.theta, group_p, harmonic_depth / self.min_group_reads)
        weight = np.where((group_reads.sum(axis=1) > 0) & (volatility > 0), weight, 0.0)
        return GroupVolatility(members, volatility, group_p, weight)

    def diagnose(self, counts: np.ndarray, design: Design, model: NeutralModel,
                 rng: np.random.Generator) -> pd.DataFrame:
        """Per grouping: size, member taxa, fitted abundance P_G, volatility v_G, weight.

        ``members`` holds the column indices in ``counts`` of the grouping's taxa.
        """
        counts = np.asarray(counts)
        groups = self.group_volatility(counts[None], design, single_fit(model), rng)
        return pd.DataFrame({
            "grouping": np.arange(groups.members.shape[1]),
            "size": groups.members.sum(axis=0),
            "members": [tuple(np.flatnonzero(column).tolist()) for column in groups.members.T],
            "mean_abundance": groups.abundance[0],
            "volatility": groups.volatility[0],
            "weight": groups.weight[0],
        })


def draw_groupings(n_taxa: int, n_groupings: int, rng: np.random.Generator) -> np.ndarray:
    """Membership matrix ``(K, G)``: sizes uniform on 1..K-1, then uniform random subsets.

    Needs at least two taxa; with K < 2 it returns no groupings.
    """
    if n_taxa < 2:
        return np.zeros((n_taxa, 0), dtype=bool)
    sizes = rng.integers(1, n_taxa, size=n_groupings)
    ranks = np.argsort(np.argsort(rng.random((n_groupings, n_taxa)), axis=1), axis=1)
    return (ranks < sizes[:, None]).T


def angular_transform(reads: np.ndarray, depths: np.ndarray) -> np.ndarray:
    """Anscombe's arcsin(sqrt((N + 3/8)/(n + 3/4))), reads ``(..., T, G)``, depths ``(T,)``."""
    y = reads + 0.375
    y /= (depths + 0.75)[:, None]
    np.sqrt(y, out=y)
    return np.arcsin(y, out=y)


#: Margin, in standard deviations of a group's abundance law, beyond which its weight is 1.
CERTAIN_SDS = 12.0


def expected_read_weight(theta: np.ndarray, group_p: np.ndarray, scale: float) -> np.ndarray:
    """E[min(1, scale X (1 - X))] for X ~ Beta(theta P, theta (1 - P)), ``(R, G)``.

    With scale = n_h / min_group_reads: the share of the group's neutral abundance law in
    which the expected reads n_h X (1 - X) reach ``min_group_reads``, counted in part below.
    Where scale X (1 - X) <= 1 throughout (scale <= 4) it is scale E[X (1 - X)]; otherwise
    X (1 - X) >= 1/scale on [x1, x2], x1,2 = (1 -+ sqrt(1 - 4/scale))/2, and with
    a = theta P, b = theta (1 - P), E[X (1 - X); X < x] = m I_x(a + 1, b + 1) with
    m = E[X (1 - X)] = P (1 - P) theta/(theta + 1) (the Beta law's moments; Johnson, Kotz &
    Balakrishnan 1995, *Continuous Univariate Distributions* 2, ch. 25, cited from memory):

        E = I_x2(a, b) - I_x1(a, b) + scale m (1 - I_x2(a + 1, b + 1) + I_x1(a + 1, b + 1)).

    0 where P is 0 or 1; 1, without evaluating I, where [x1, x2] holds P with a margin of
    more than :data:`CERTAIN_SDS` standard deviations of X on both sides (the law outside
    is then far below the float64 resolution of 1).
    """
    theta = np.broadcast_to(theta[:, None], group_p.shape)
    inside = (group_p > 0) & (group_p < 1)
    moment = group_p * (1.0 - group_p) * theta / (theta + 1.0)
    if scale <= 4.0:
        return np.where(inside, scale * moment, 0.0)
    half_width = 0.5 * np.sqrt(1.0 - 4.0 / scale)
    low, high = 0.5 - half_width, 0.5 + half_width
    margin = np.minimum(group_p - low, high - group_p)
    weight = np.where(inside, 1.0, 0.0)
    spread = np.sqrt(np.where(inside, moment, 0.0) / theta)
    uncertain = inside & (margin <= CERTAIN_SDS * spread)
    share, m = group_p[uncertain], moment[uncertain]
    a, b = theta[uncertain] * share, theta[uncertain] * (1.0 - share)
    within = special.betainc(a, b, high) - special.betainc(a, b, low)
    outside = (1.0 - special.betainc(a + 1.0, b + 1.0, high)
               + special.betainc(a + 1.0, b + 1.0, low))
    weight[uncertain] = np.clip(within + scale * m * outside, 0.0, 1.0)
    return weight


def angular_variance_factor(theta: np.ndarray, group_p: np.ndarray) -> np.ndarray:
    """4 (theta + 1) Var[arcsin sqrt(X)], X ~ Beta(theta P, theta (1 - P)), ``(R, G)``.

    1 in the regime theta P (1 - P) >> 1 (design note, section 6); for rare groups (or
    their complements, a = theta min(P, 1 - P) small) X ~ Gamma(a)/theta and
    arcsin sqrt(X) ~ sqrt(X), so Var = (a - (Gamma(a + 1/2)/Gamma(a))^2)/theta: the factor
    4 (theta + 1)/theta (a - (Gamma(a + 1/2)/Gamma(a))^2), capped at 1. Against numerical
    integration it is within 1% for theta >= 40 (7% at theta = 5), e.g. 0.077, 0.49, 0.84
    at theta P = 0.02, 0.2, 0.8 (theta = 40).
    """
    shape = theta[:, None] * np.minimum(group_p, 1.0 - group_p)
    safe = np.maximum(shape, 1e-300)
    ratio = np.exp(2.0 * (special.gammaln(safe + 0.5) - special.gammaln(safe)))
    factor = 4.0 * (theta[:, None] + 1.0) / theta[:, None] * (safe - ratio)
    return np.clip(factor, 0.0, 1.0)


def expected_innovation_variance(depths: np.ndarray, intervals: np.ndarray, theta: np.ndarray,
                                 rate: np.ndarray, factor: np.ndarray,
                                 noise: np.ndarray | None = None) -> np.ndarray:
    """Neutral Var(eta_t) per group, ``(R, T-1, G)``: OU conditional part plus sampling parts.

    The OU part is factor_G (1 - phi_t^2) / (4 (theta + 1)), phi_t = exp(-rate dt): the
    conditional variance of an Ornstein-Uhlenbeck process with the group's stationary
    angular variance factor_G / (4 (theta + 1)) (:func:`angular_variance_factor`). The
    sampling part of sample t + 1 enters whole, that of sample t times phi_t^2; each is
    Anscombe's 1/(4 n + 2) at its effective depth n = 1/(g + (1 - g)/n_t)
    (:func:`driftscreen.neutral.model.sampling_variance_factor`; n_t without noise).
    """
    kept = np.exp(-2.0 * rate[:, None] * intervals)                           # phi^2, (R, T-1)
    noise = np.zeros_like(theta) if noise is None else noise
    sampling = 1.0 / (4.0 / sampling_variance_factor(depths, noise) + 2.0)   # (R, T)
    stationary = factor / (4.0 * (theta[:, None] + 1.0))                     # (R, G)
    variance = (1.0 - kept)[..., None] * stationary[:, None, :]
    variance += (sampling[:, 1:] + kept * sampling[:, :-1])[..., None]
    return variance


def innovation_volatility(group_reads: np.ndarray, depths: np.ndarray, intervals: np.ndarray,
                          theta: np.ndarray, rate: np.ndarray, factor: np.ndarray,
                          noise: np.ndarray | None = None) -> np.ndarray:
    """v_G = sum_t eta_t^2 / e_t / (T - 2) for group reads ``(R, T, G)``, shape ``(R, G)``.

    eta_t = y_{t+1} - phi_t y_t - (1 - phi_t) mu_G with mu_G the weighted least-squares
    mean (weights w_t = 1/e_t, :func:`expected_innovation_variance`); NaN if T < 3. With
    z_t = y_{t+1} - phi_t y_t and a_t = 1 - phi_t, sum_t w_t eta_t^2 is
    sum w z^2 - (sum w a z)^2 / sum w a^2, so the sums over t are products with a_t.
    """
    n_rep, n_samples, n_groups = group_reads.shape
    if n_samples < 3:
        return np.full((n_rep, n_groups), np.nan)
    y = angular_transform(group_reads, depths)
    weight = expected_innovation_variance(depths, intervals, theta, rate, factor, noise)
    np.reciprocal(weight, out=weight)
    phi = np.exp(-rate[:, None] * intervals)                                 # (R, T-1)
    pull = (1.0 - phi)[:, None, :]                                           # (R, 1, T-1)
    step = phi[..., None] * y[:, :-1]
    np.subtract(y[:, 1:], step, out=step)
    weighted_step = weight * step
    along = np.matmul(pull, weighted_step)[:, 0]                             # sum w a z
    across = np.matmul(pull * pull, weight)[:, 0]                            # sum w a^2
    squares = np.einsum("rtg,rtg->rg", weighted_step, step)                  # sum w z^2
    return (squares - along * along / across) / (n_samples - 2)
