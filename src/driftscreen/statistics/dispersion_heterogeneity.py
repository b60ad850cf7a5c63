"""``dispersion_heterogeneity``: do all taxa share one immigration parameter theta?

Basis. Under the neutral model the stationary community is Dirichlet(theta p) (Hubbell
2001, *The Unified Neutral Theory of Biodiversity and Biogeography*; Etienne 2005, Ecol.
Lett. 8), so every taxon's reads in a sample of depth n_t are
N_it ~ BetaBinomial(n_t, theta p_i, theta (1 - p_i)) with one theta for all taxa: every
taxon is overdispersed relative to the multinomial by the same factor
(theta + n_t)/(theta + 1). Niche structure (taxa with their own stabilising or
destabilising dynamics) gives taxon-specific dispersion. The statistic is the likelihood
ratio of taxon-specific theta_i against one common theta, with each taxon's mean p_i
profiled out in both fits,

    LR = 2 (sum_i max_{theta_i, p_i} l_i(theta_i, p_i)
            - max_theta sum_i max_{p_i} l_i(theta, p_i)),

where l_i is the beta-binomial composite log-likelihood of taxon i over the samples
(treated as independent; Lindsay 1988, Contemp. Math. 80, "Composite likelihood
methods"), per degree of freedom and corrected for autocorrelation:

    statistic = LR / (phi (K' - 1)),

K' the number of taxa used (those with some but not all reads) and phi the
autocorrelation factor below (1 for a snapshot). Under neutrality with independent
samples LR is close to chi-square(K' - 1) (Wilks 1938, Ann. Math. Stat. 9:60), so the
statistic is close to 1 whatever theta and K'. Dividing by K' - 1 matters because the
data hold only taxa with reads, whereas bootstrap replicates drawn at the fitted p lose
their rarest taxa now and then (in 40-taxon snapshots at theta = 10: 39.3 taxa used in
the data, 36.4 in the replicates on average), and LR grows with the number of taxa.

Why p_i is profiled. The mean and the precision of a beta-binomial are not orthogonal
parameters (Cox & Reid 1987, J. R. Stat. Soc. B 49:1, "Parameter orthogonality and
approximate conditional inference"): for the Beta law of the abundance their Fisher
information is theta [p psi'(theta p) - (1 - p) psi'(theta (1 - p))], which vanishes only
for p = 1/2 and grows like 1/(theta p) for rare taxa (likewise for the beta-binomial).
With p_i fixed at an estimate, theta_i absorbs the estimate's error: in neutral snapshots
(40 taxa, 60 samples, depths over a 100-fold range) the LR share of taxa with
theta p_i < 1 averaged 3.6 at theta = 10 and 1.8 at theta = 300, and LR moved from 138 to
49 with theta. Profiled, every share averages ~1 (0.93-1.01) and LR stays at ~K - 1
(39-40 for K = 40) over theta = 10-300: the statistic tests the heterogeneity of theta
alone and its null law hardly depends on the parameters that the bootstrap estimates.

Autocorrelation. In a time series the composite likelihood treats dependent samples as
independent, which inflates every taxon's share by the ratio phi of the variance of its
theta-score to the information (Varin, Reid & Firth 2011, Stat. Sinica 21:5, "An overview
of composite likelihood methods"; for equal factors LR / phi is again
chi-square-like: Rotnitzky & Jewell 1990, Biometrika 77:485). The score of a precision is
a standardised squared deviation, weighted by the share f_t = v/(v + (1 - v)/n_t) of drift
in the variance of sample t (v = 1/(1 + theta), design note section 2), and squared
deviations of jointly Gaussian abundances correlate as the square of their correlation
(Isserlis 1918, Biometrika 12:134): f_s f_t exp(-2 rate |t_s - t_t|). Hence

    phi = 1 + sum_{s != t} f_s^2 f_t^2 exp(-2 rate |t_s - t_t|) / sum_t f_t^2,

with theta and rate from the fitted null (phi = 1 for a snapshot). Without it the LR of
daily neutral series (theta = 40, K = 40, T = 60) averaged 136, 88 and 58 at rates 0.25,
0.5 and 1 per day, so the error of the fitted rate shifted its bootstrap null; LR / phi
averaged 35-45 over theta = 10-300 and rates 0.25-1. (The Gaussian form slightly
over-corrects: taxa with theta p_i < 1 carry a linear component that decorrelates at the
rate itself.)

Computation. theta = c theta_0 with a per-table pilot theta_0: the pooled,
sampling-corrected moment estimate with the samples treated as independent (around the
precision-weighted composition, see
:func:`driftscreen.statistics.composition.precision_weighted_composition`),
which is what the composite likelihood itself estimates, autocorrelation included. The
profile max_{p_i} l_i is evaluated on the grid c = 2^-s, ..., 2^s (s = ``log2_span``;
theta_i is bounded to that range around the pilot). At fixed theta, l_i is concave in p_i
(lgamma(m + s) - lgamma(s) is concave in s), and one step reaches the profile: the curve
alpha log p + gamma log(1 - p) with the score and curvature of l_i at a start is
maximised (:func:`beta_curve_step`); the middle grid point starts from the
precision-weighted composition, each further one from its neighbour's maximiser moved
along the implicit-function slope dp_i/dlog theta (:func:`profile_grid`). Against a
numerical maximisation with ``scipy.stats.betabinom`` the profile is within 0.05
log-likelihood units (median 1e-4). Both maxima over the grid are refined between grid
points by the curve f + alpha log c - beta c through the best grid point and its two
neighbours (see :func:`refine_maximum`), and each taxon's share of LR is twice its own
maximum minus its value at the common maximiser, clipped at 0.

Cost. Per grid point and count cell: one log and one reciprocal serve the asymptotic
series of lgamma, psi and psi' for N + a and for n - N + b (Abramowitz & Stegun 1964,
6.1.41, 6.3.18, 6.4.12; error below 1e-7 per cell); reads below 32 enter exactly through
per-taxon tail counts (see :class:`CountSummary`); the terms in a + b = theta are shared
by all taxa. About the cost of the former fixed-p likelihood grid.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np
import pandas as pd
from scipy import special

from driftscreen.dataset import Design
from driftscreen.neutral.model import NeutralModel, NullFit, single_fit
from driftscreen.statistics.base import Alternative
from driftscreen.statistics.composition import precision_weighted_composition

#: Bounds of the pilot v = 1/(1 + theta_0).
PILOT_V_RANGE = (1e-7, 1.0 - 1e-7)
#: Read numbers below this enter the log-likelihood exactly; larger ones through Stirling.
EXACT_BELOW = 32
HALF_LOG_TWO_PI = 0.5 * np.log(2.0 * np.pi)
#: Starting values of p_i are kept this far from 0 and 1.
P_FLOOR = 1e-12
#: Largest move in log-odds of the starting p_i from one grid point to the next.
MAX_LOGIT_SHIFT = 3.0


@dataclass(frozen=True)
class DispersionFit:
    """Per-table and per-taxon results, shapes ``(R,)`` and ``(R, K)``.

    ``contribution`` is each taxon's share of the composite LR before the division by the
    autocorrelation factor ``inflation`` (``(R,)``, 1 for a snapshot) and by the degrees of
    freedom.
    """

    theta_common: np.ndarray
    theta_taxon: np.ndarray
    at_grid_edge: np.ndarray
    contribution: np.ndarray
    used: np.ndarray
    inflation: np.ndarray

    @property
    def scale(self) -> np.ndarray:
        """1 / (phi (K' - 1)) per table, ``(R,)``; NaN with fewer than two taxa used."""
        freedom = np.count_nonzero(self.used, axis=1) - 1.0
        with np.errstate(divide="ignore"):
            return np.where(freedom >= 1, 1.0 / (self.inflation * freedom), np.nan)


@dataclass(frozen=True)
class DispersionHeterogeneity:
    """Likelihood ratio of taxon-specific theta_i against one common theta.

    Attributes
    ----------
    log2_span:
        The grid of multipliers of the pilot theta runs over 2^-log2_span .. 2^log2_span.
    """

    name: ClassVar[str] = "dispersion_heterogeneity"
    #: How outputs name it, and what its value is (the axis of its null distribution).
    title: ClassVar[str] = "Dispersion heterogeneity"
    unit: ClassVar[str] = "likelihood ratio, taxon-specific vs common theta"
    #: What it measures, for the methods paragraph ({groupings}: R).
    methods: ClassVar[str] = (
        "the likelihood ratio of taxon-specific against common beta-binomial dispersion, "
        "with each taxon's mean profiled, per taxon and corrected for autocorrelation")
    #: How to read its diagnostics ({abundance_classes}: classes of the report).
    how_to_read: ClassVar[str] = (
        "LR part: the taxon's part of the likelihood-ratio "
        "statistic (taxon-specific against common beta-binomial theta, per taxon beyond the "
        "first and, for time series, corrected for autocorrelation; the parts sum to the "
        "statistic). Own theta above the common one: the taxon varies less than the common "
        "theta implies; below: more. * at the end of the fitted range.")
    needs_time: ClassVar[bool] = False
    alternative: ClassVar[Alternative] = "greater"
    marginal: ClassVar[bool] = True
    #: Out of ``combined``: on neutral series relaxing from a disturbance it rejected 0.10
    #: at 0.05 (bench/null_choices.py, 80 datasets), so its calibration is not established.
    in_combination: ClassVar[bool] = False
    studentised: ClassVar[bool] = False

    log2_span: int = 3

    def compute(self, counts: np.ndarray, design: Design, fit: NullFit,
                rng: np.random.Generator) -> np.ndarray:
        """LR / (phi (K' - 1)) per table, shape ``(R,)``; NaN with fewer than two usable taxa."""
        result = self.fit_dispersion(counts, design, fit)
        return result.contribution.sum(axis=1) * result.scale

    def fit_dispersion(self, counts: np.ndarray, design: Design, fit: NullFit) -> DispersionFit:
        """Common and taxon-specific theta on the grid, each taxon's share of LR, and phi."""
        counts = np.asarray(counts)
        depths = design.depths.astype(np.float64)
        composition = precision_weighted_composition(counts, depths, fit.theta)
        used = (composition > 0) & (composition < 1)
        p = np.where(used, composition, 0.5)
        pilot = pilot_theta(counts, depths, composition)
        multipliers = 2.0 ** np.arange(-self.log2_span, self.log2_span + 1)
        loglik = profile_grid(summarise_counts(counts, design.depths), p, pilot, multipliers)
        loglik = np.where(used[..., None], loglik, 0.0)
        taxon_index = np.argmax(loglik, axis=-1)
        taxon_c, taxon_best = refine_maximum(loglik, taxon_index, multipliers)
        total = loglik.sum(axis=1)
        common_index = np.argmax(total, axis=-1)
        common_c, _ = refine_maximum(total, common_index, multipliers)
        at_common = interpolant_at(loglik, common_index[:, None], multipliers,
                                   common_c[:, None])
        contribution = np.where(used, np.maximum(2.0 * (taxon_best - at_common), 0.0), 0.0)
        at_edge = used & ((taxon_index == 0) | (taxon_index == multipliers.size - 1))
        return DispersionFit(pilot * common_c, np.where(used, pilot[:, None] * taxon_c, np.nan),
                             at_edge, contribution, used, autocorrelation_factor(design, fit))

    def diagnose(self, counts: np.ndarray, design: Design, model: NeutralModel,
                 rng: np.random.Generator) -> pd.DataFrame:
        """Per taxon: mean abundance p, its own theta_i, the common theta and its share of the LR.

        ``p`` is the precision-weighted composition (the start of the profile in p_i);
        ``lr_contribution`` is the taxon's share of the statistic (its share of LR divided
        by phi (K' - 1), so the column sums to the statistic). Rows sorted by
        decreasing contribution; ``taxon`` is the column index in ``counts``;
        ``at_grid_edge`` marks theta_i bounded by the grid.
        """
        counts = np.asarray(counts)
        result = self.fit_dispersion(counts[None], design, single_fit(model))
        table = pd.DataFrame({
            "taxon": np.arange(counts.shape[1]),
            "p": precision_weighted_composition(counts[None], design.depths.astype(np.float64),
                                               np.array([model.theta]))[0],
            "theta_taxon": result.theta_taxon[0],
            "theta_common": np.full(counts.shape[1], result.theta_common[0]),
            "at_grid_edge": result.at_grid_edge[0],
            "lr_contribution": result.contribution[0] * result.scale[0],
        })[result.used[0]]
        return table.sort_values("lr_contribution", ascending=False, kind="stable"
                                 ).reset_index(drop=True)


def pilot_theta(counts: np.ndarray, depths: np.ndarray, p: np.ndarray) -> np.ndarray:
    """Moment estimate of theta with independent samples around ``p``, shape ``(R,)``.

    Stationary Var Y_it = pi_i (v + (1 - v)/n_t), pi_i = p_i (1 - p_i) (design note,
    section 2), so Q = sum_it (Y_it - p_i)^2 has E[Q] = Pi (T v + (1 - v) S) with
    Pi = sum_i pi_i and S = sum_t 1/n_t; solved for v = 1/(1 + theta).
    """
    relative = counts / depths[:, None]
    n_samples = depths.size
    squares = np.einsum("rtk,rtk->r", relative, relative)
    cross = np.einsum("rtk,rk->r", relative, p)
    q = squares - 2.0 * cross + n_samples * np.sum(p * p, axis=1)
    pi_sum = np.sum(p * (1.0 - p), axis=1)
    s = np.sum(1.0 / depths)
    with np.errstate(divide="ignore", invalid="ignore"):
        v = (q / pi_sum - s) / (n_samples - s)
    v = np.clip(np.nan_to_num(v, nan=PILOT_V_RANGE[1]), *PILOT_V_RANGE)
    return 1.0 / v - 1.0


def autocorrelation_factor(design: Design, fit: NullFit) -> np.ndarray:
    """phi = 1 + sum_{s != t} w_s w_t exp(-2 rate |t_s - t_t|) / sum_t w_t per table, ``(R,)``.

    w_t = f_t^2, f_t = v/(v + (1 - v) s_t) the share of drift in the variance of sample t,
    v = 1/(1 + theta) and s_t = g + (1 - g)/n_t the read variance factor at the fitted noise
    g = 1/(1 + C) (Mosimann 1962, Biometrika 49:65; g = 0 for multinomial reads), from
    ``fit`` (see the module docstring); 1 for a snapshot. Technical noise is independent
    between samples, so it dilutes the correlation of squared deviations like binomial
    sampling does. The double sum runs in O(T) through the recursion
    S_t = exp(-2 rate dt_t) (S_{t-1} + w_{t-1}) over the sorted times.
    """
    if design.times is None or fit.rate is None:
        return np.ones(fit.theta.shape)
    v = 1.0 / (1.0 + fit.theta[:, None])
    g = fit.noise[:, None]
    reads = g + (1.0 - g) / design.depths.astype(np.float64)
    share = v / (v + (1.0 - v) * reads)
    weight = share * share                                               # (R, T)
    carried = np.zeros(fit.theta.shape)
    cross = np.zeros(fit.theta.shape)
    for t, gap in enumerate(design.intervals, start=1):
        carried = np.exp(-2.0 * fit.rate * gap) * (carried + weight[:, t - 1])
        cross += weight[:, t] * carried
    return 1.0 + 2.0 * cross / weight.sum(axis=1)


@dataclass(frozen=True)
class CountSummary:
    """Counts arranged for fast sums over samples of f(m + s) - f(s), f = lgamma, psi, psi'.

    Here m is N (reads of the taxon) or n - N (reads of the rest). With E = EXACT_BELOW,
    the recurrences f(s + E) = f(s) + sum_{i<E} g(s + i) (g = log, 1/x, -1/x^2) give, per
    cell,

        f(m + s) - f(s) = [f(M + s) - f(E + s)] + sum_{i<E} g(s + i) [m > i],  M = max(m, E),

    exactly (the bracket vanishes when m < E). The bracket goes through the asymptotic
    series of f at every cell in one vectorised pass (error below 1e-7 per cell); the sum
    through the per-taxon tail counts #{t: m_t > i}, i < E, which do not depend on s.
    """

    depths: np.ndarray                          # (T,)
    clamped: tuple[np.ndarray, np.ndarray]      # (R, T, K) M = max(m, E), m = N, n - N
    clamped_sum: tuple[np.ndarray, np.ndarray]  # (R, K) sums over samples of M
    tail_counts: tuple[np.ndarray, np.ndarray]  # (R, K, E) #{t: m_t > i}, i = 0..E-1
    scratch: tuple[np.ndarray, np.ndarray]      # (R, T, K) work space, reused per evaluation


def summarise_counts(counts: np.ndarray, depths: np.ndarray) -> CountSummary:
    """The :class:`CountSummary` of a batch ``(R, T, K)`` with depths ``(T,)``."""
    reads = np.asarray(counts, dtype=np.int64)
    rest = depths.astype(np.int64)[:, None] - reads
    clamped = tuple(np.maximum(m, EXACT_BELOW).astype(np.float64) for m in (reads, rest))
    return CountSummary(depths.astype(np.float64), clamped,
                        tuple(c.sum(axis=1) for c in clamped),
                        tuple(_tail_counts(m) for m in (reads, rest)),
                        (np.empty(reads.shape), np.empty(reads.shape)))


def _tail_counts(values: np.ndarray) -> np.ndarray:
    """#{t: values_t > i} for i = 0..EXACT_BELOW-1, ``(R, K, EXACT_BELOW)``."""
    n_rep, _, n_taxa = values.shape
    bins = EXACT_BELOW + 1
    cell = (np.arange(n_rep)[:, None, None] * n_taxa + np.arange(n_taxa)) * bins
    index = cell + np.minimum(values, EXACT_BELOW)
    histogram = np.bincount(index.ravel(), minlength=n_rep * n_taxa * bins
                            ).reshape(n_rep, n_taxa, bins)
    at_least = np.cumsum(histogram[..., ::-1], axis=-1)[..., ::-1]      # #{t: m_t >= j}
    return at_least[..., 1:].astype(np.float64)


def stirling_log_gamma(x: np.ndarray) -> np.ndarray:
    """lgamma(x) ~ (x - 1/2) log x - x + log(2 pi)/2 + 1/(12 x), error < 1/(360 x^3).

    Stirling's series (Abramowitz & Stegun 1964, *Handbook of Mathematical Functions*,
    6.1.41); for x >= EXACT_BELOW = 32 the error is below 8.5e-8.
    """
    return (x - 0.5) * np.log(x) - x + HALF_LOG_TWO_PI + 1.0 / (12.0 * x)


def asymptotic_digamma(x: np.ndarray) -> np.ndarray:
    """psi(x) ~ log x - 1/(2 x) - 1/(12 x^2), error < 1/(120 x^4) (A&S 1964, 6.3.18)."""
    return np.log(x) - 0.5 / x - 1.0 / (12.0 * x * x)


def asymptotic_trigamma(x: np.ndarray) -> np.ndarray:
    """psi'(x) ~ 1/x + 1/(2 x^2) + 1/(6 x^3), error < 1/(30 x^5) (A&S 1964, 6.4.12)."""
    return 1.0 / x + 0.5 / x**2 + 1.0 / (6.0 * x**3)


@dataclass(frozen=True)
class ShapeSums:
    """Sums over samples for reads m_t and a Beta shape s, per table and taxon ``(R, K)``.

    ``log_gamma`` = sum_t lgamma(m_t + s) - lgamma(s), ``digamma`` = sum_t psi(m_t + s) -
    psi(s) (its derivative in s) and ``curvature`` = sum_t psi'(s) - psi'(m_t + s) (minus
    the second derivative; >= 0 because lgamma(m + s) - lgamma(s) is concave in s).
    """

    log_gamma: np.ndarray
    digamma: np.ndarray
    curvature: np.ndarray


def summed_series(clamped: np.ndarray, clamped_sum: np.ndarray, shape: np.ndarray,
                  scratch: tuple[np.ndarray, np.ndarray]) -> ShapeSums:
    """sum_t of the asymptotic lgamma, psi and psi' at x_t = M_t + s, ``(R, K)`` each.

    One log and one reciprocal per cell serve all three series; the terms linear in x are
    summed in closed form. Works in the two ``scratch`` arrays (shape of ``clamped``).
    The ``curvature`` field holds sum_t psi'(x_t) here (not a difference).
    """
    x, work = scratch
    n_samples = clamped.shape[1]
    np.add(clamped, shape[:, None, :], out=x)
    np.log(x, out=work)
    sum_log = work.sum(axis=1)
    sum_m_log = np.einsum("rtk,rtk->rk", clamped, work)
    np.reciprocal(x, out=x)
    sum_inverse = x.sum(axis=1)
    np.multiply(x, x, out=work)
    sum_inverse2 = work.sum(axis=1)
    sum_inverse3 = np.einsum("rtk,rtk->rk", work, x)
    log_gamma = (sum_m_log + (shape - 0.5) * sum_log - clamped_sum
                 + n_samples * (HALF_LOG_TWO_PI - shape) + sum_inverse / 12.0)
    digamma = sum_log - 0.5 * sum_inverse - sum_inverse2 / 12.0
    trigamma = sum_inverse + 0.5 * sum_inverse2 + sum_inverse3 / 6.0
    return ShapeSums(log_gamma, digamma, trigamma)


def shape_sums(summary: CountSummary, which: int, shape: np.ndarray) -> ShapeSums:
    """The :class:`ShapeSums` of m = N (``which`` = 0) or m = n - N (1) at shapes ``(R, K)``.

    See :class:`CountSummary` for the decomposition; the recurrences are A&S 1964, 6.1.15,
    6.3.5 and 6.4.6.
    """
    tails = summary.tail_counts[which]
    steps = shape[..., None] + np.arange(EXACT_BELOW)
    inverse = 1.0 / steps
    series = summed_series(summary.clamped[which], summary.clamped_sum[which], shape,
                           summary.scratch)
    clamp = EXACT_BELOW + shape
    n_samples = summary.depths.size
    return ShapeSums(
        series.log_gamma - n_samples * stirling_log_gamma(clamp)
        + np.einsum("rki,rki->rk", tails, np.log(steps)),
        series.digamma - n_samples * asymptotic_digamma(clamp)
        + np.einsum("rki,rki->rk", tails, inverse),
        n_samples * asymptotic_trigamma(clamp) - series.curvature
        + np.einsum("rki,rki->rk", tails, inverse * inverse))


@dataclass(frozen=True)
class ProfilePoint:
    """Beta-binomial composite log-likelihood of every taxon at (theta, p), ``(R, K)`` each.

    ``loglik`` omits the binomial coefficients (adding sum_t log C(n_t, N_it) gives the sum
    over samples of ``scipy.stats.betabinom.logpmf``); ``score`` and ``information`` are
    the first and minus the second derivative in p at fixed theta; ``drift`` is the
    derivative of the score in log theta at fixed p.
    """

    loglik: np.ndarray
    score: np.ndarray
    information: np.ndarray
    drift: np.ndarray


def profile_point(summary: CountSummary, p: np.ndarray, theta: np.ndarray) -> ProfilePoint:
    """:class:`ProfilePoint` at a = theta p, b = theta (1 - p); p ``(R, K)``, theta ``(R,)``.

    With A, B the :class:`ShapeSums` of N at a and of n - N at b:
    l = A.log_gamma + B.log_gamma - sum_t [lgamma(n_t + theta) - lgamma(theta)],
    dl/dp = theta (A.digamma - B.digamma), -d2l/dp2 = theta^2 (A.curvature + B.curvature),
    d(dl/dp)/dlog theta = dl/dp + theta^2 ((1 - p) B.curvature - p A.curvature).
    """
    scale = theta[:, None]
    reads = shape_sums(summary, 0, scale * p)
    rest = shape_sums(summary, 1, scale * (1.0 - p))
    shared = np.sum(special.gammaln(summary.depths + scale) - special.gammaln(scale), axis=1)
    score = scale * (reads.digamma - rest.digamma)
    return ProfilePoint(
        reads.log_gamma + rest.log_gamma - shared[:, None], score,
        scale**2 * (reads.curvature + rest.curvature),
        score + scale**2 * ((1.0 - p) * rest.curvature - p * reads.curvature))


def beta_curve_step(p: np.ndarray, score: np.ndarray, information: np.ndarray
                    ) -> tuple[np.ndarray, np.ndarray]:
    """Maximiser and gain over p of the curve alpha log p + gamma log(1 - p) matched at ``p``.

    The curve has the score and curvature of the log-likelihood at p when
    alpha = p^2 (score + information (1 - p)) and gamma = (1 - p)^2 (p information - score);
    with both positive its maximum is at alpha / (alpha + gamma) (the Beta-kernel shape of
    a beta-binomial log-likelihood in its mean, exact for rare taxa where it behaves like
    k log p - C p). Otherwise a Newton step, capped to half the distance to 0 or 1, and the
    gain of the quadratic model along it.
    """
    alpha = p * p * (score + information * (1.0 - p))
    gamma = (1.0 - p) ** 2 * (p * information - score)
    curved = (alpha > 0) & (gamma > 0)
    alpha, gamma = np.where(curved, alpha, 1.0), np.where(curved, gamma, 1.0)
    peak = alpha / (alpha + gamma)
    with np.errstate(divide="ignore", invalid="ignore"):
        gain = alpha * np.log(peak / p) + gamma * np.log((1.0 - peak) / (1.0 - p))
        newton = np.clip(np.nan_to_num(score / information), -0.5 * p, 0.5 * (1.0 - p))
    quadratic = newton * score - 0.5 * information * newton**2
    return np.where(curved, peak, p + newton), np.where(curved, gain, quadratic)


def profile_grid(summary: CountSummary, start: np.ndarray, pilot: np.ndarray,
                 multipliers: np.ndarray) -> np.ndarray:
    """max over p_i of the composite log-likelihood at theta = c * pilot, ``(R, K, G)``.

    At the middle multiplier (c = 1) the step of :func:`beta_curve_step` starts from
    ``start``; moving outwards, each grid point starts from the previous one's maximiser
    shifted along the implicit-function slope dp*/dlog theta = drift / information
    (in log-odds, at most MAX_LOGIT_SHIFT per grid step), so one evaluation per grid point
    reaches the profile.
    """
    middle = multipliers.size // 2
    log_step = float(np.log(multipliers[1] / multipliers[0]))
    values = np.empty(start.shape + (multipliers.size,))

    def evaluate(index: int, p: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        point = profile_point(summary, p, multipliers[index] * pilot)
        peak, gain = beta_curve_step(p, point.score, point.information)
        values[..., index] = point.loglik + gain
        with np.errstate(divide="ignore", invalid="ignore"):
            slope = np.nan_to_num(point.drift / (point.information * p * (1.0 - p)))
        return peak, np.clip(slope * log_step, -MAX_LOGIT_SHIFT, MAX_LOGIT_SHIFT)

    centre = evaluate(middle, np.clip(start, P_FLOOR, 1.0 - P_FLOOR))
    for direction in (1, -1):
        peak, shift = centre
        for index in range(middle + direction, middle + direction * (middle + 1), direction):
            moved = special.expit(special.logit(peak) + direction * shift)
            peak, shift = evaluate(index, np.clip(moved, P_FLOOR, 1.0 - P_FLOOR))
    return values


def refine_maximum(values: np.ndarray, index: np.ndarray, multipliers: np.ndarray
                   ) -> tuple[np.ndarray, np.ndarray]:
    """Maximiser and maximum over the grid axis (last) of ``values``, refined between grid points.

    Through the best grid point ``index`` and its two neighbours passes exactly one curve
    g(c) = f_k + alpha log(c / c_k) - beta (c - c_k), the shape of a log-likelihood in a
    precision parameter (the Gamma/Beta form a log c - b c); when it is concave with an
    interior maximum (alpha, beta > 0) its maximiser alpha / beta, clipped to the
    neighbours, and its value there are returned; otherwise (grid edge, no curvature) the
    grid point itself. On beta-binomial log-likelihoods this is within ~2% of the exact
    maximiser where a parabola in log c is ~5% low.
    """
    alpha, beta, interior = _curve_coefficients(values, index, multipliers)
    last = multipliers.size - 1
    low = multipliers[np.clip(index - 1, 0, last)]
    high = multipliers[np.clip(index + 1, 0, last)]
    concave = interior & (alpha > 0) & (beta > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        peak = np.where(concave, np.clip(alpha / beta, low, high), multipliers[index])
    return peak, interpolant_at(values, index, multipliers, peak)


def interpolant_at(values: np.ndarray, index: np.ndarray, multipliers: np.ndarray,
                   point: np.ndarray) -> np.ndarray:
    """The curve of :func:`refine_maximum` through index - 1, index, index + 1, at ``point``.

    ``index`` and ``point`` broadcast against ``values.shape[:-1]``. At the grid edges
    the value at the grid point is returned (``point`` is then that grid point).
    """
    alpha, beta, interior = _curve_coefficients(values, index, multipliers)
    centre = multipliers[index]
    middle = _take(values, np.broadcast_to(index, values.shape[:-1]))
    curve = middle + alpha * np.log(point / centre) - beta * (point - centre)
    return np.where(interior, curve, middle)


def _curve_coefficients(values: np.ndarray, index: np.ndarray, multipliers: np.ndarray
                        ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """alpha, beta of f_k + alpha log(c / c_k) - beta (c - c_k) through the three grid points.

    On a geometric grid c_{k+1} = r c_k, with d1 = f_k - f_{k-1} and d2 = f_{k+1} - f_k:
    beta = (d1 - d2) / (c_{k-1} (r - 1)^2), alpha = (d1 + (d1 - d2)/(r - 1)) / log r.
    Zero where ``index`` is at a grid edge (``interior`` False).
    """
    last = multipliers.size - 1
    index = np.broadcast_to(index, values.shape[:-1])
    interior = (index > 0) & (index < last)
    left = _take(values, np.clip(index - 1, 0, last))
    middle = _take(values, index)
    right = _take(values, np.clip(index + 1, 0, last))
    ratio = multipliers[1] / multipliers[0]
    rise, next_rise = middle - left, right - middle
    beta = (rise - next_rise) / (multipliers[np.clip(index - 1, 0, last)] * (ratio - 1.0) ** 2)
    alpha = (rise + (rise - next_rise) / (ratio - 1.0)) / np.log(ratio)
    return np.where(interior, alpha, 0.0), np.where(interior, beta, 0.0), interior


def _take(values: np.ndarray, index: np.ndarray) -> np.ndarray:
    """values[..., index] with one index per leading position."""
    return np.take_along_axis(values, index[..., None], axis=-1)[..., 0]
