"""Moment estimators of the neutral null: composition p, immigration theta, relaxation rate.

Implements section 5 of the design note on the neutral null (Wright-Fisher diffusion
with immigration observed through multinomial sequencing; moments from Ewens 2004,
*Mathematical Population Genetics I*, ch. 5). With depths n_t, W = sum_t n_t and pooled
read weights w_t = n_t / W:

* ``p`` is the pooled read fraction sum_t N_it / W (unbiased at stationarity).
* Snapshots (independent samples): theta from the sampling-corrected ratio of the
  pooled across-sample variance Q to the heterozygosity H = 1 - sum_i p_i^2.
* Time series: the pooled weighted spread about p and the pooled sampling-corrected
  squared increments between successive samples and between samples two apart; three
  moment equations give v = 1/(1 + theta), the rate and the technical noise
  g = 1/(1 + C) of Dirichlet-multinomial reads. Technical noise is independent from
  sample to sample, so it adds the same nugget 2 g (1 - v) Pi to the expected squared
  increment at every lag, whereas drift adds 2 v Pi (1 - exp(-rate lag)): the two lags
  separate them. Conditioned on the first sample (the default), p is the point every
  taxon relaxes to at the shared rate, E[Y_t] = p + (Y_0 - p) exp(-rate (t - t_0)).
  The pooled variogram over all pairs,

      D_st = sum_i [(Y_is - Y_it)^2 - Y_is(1 - Y_is)/(n_s - 1) - Y_it(1 - Y_it)/(n_t - 1)],

  with E[D_st] = 2 A (1 - exp(-rate |t_s - t_t|)), A = v Pi, Pi = sum_i p_i (1 - p_i),
  is kept as a diagnostic (:func:`variogram`).

Everything is vectorised over a batch of replicate tables that share one design, and
processed in sub-batches to bound memory.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from driftscreen.dataset import Design
from driftscreen.errors import InputError
from driftscreen.neutral.model import NeutralModel, NullFit, NullOptions

#: v = 1/(1 + theta) is kept in [V_MIN, V_MAX], so theta stays finite and positive.
V_MIN = 1e-9
V_MAX = 1.0 - 1e-9
#: Rate bounds: rate * span >= RATE_MIN_SPAN (below, the variogram is a straight line over the
#: whole series and only the product A * rate is identified); rate * shortest lag <=
#: RATE_MAX_LAG (above, exp(-rate * lag) < 5e-5 at every lag: the variogram is flat).
RATE_MIN_SPAN = 0.01
RATE_MAX_LAG = 10.0
#: Lowest rate * span of a fit conditioned on the first sample (see :func:`rate_bounds`).
CONDITIONED_MIN_SPAN = 1.0
#: Below this rate * span the plateau of the variogram is barely reached (design note, section 5).
WEAK_RATE_SPAN = 5.0
#: Spacing of the log-rate grid (natural-log units); crossings are interpolated within it.
LOG_RATE_STEP = 0.05
#: Working memory per sub-batch of replicates, in bytes.
SUB_BATCH_BYTES = 96 * 2**20
#: Grid of the technical noise g = 1/(1 + C) searched when it is estimated: 0 and
#: log-spaced values from C = 10^6 down to C = 1.
NOISE_GRID = np.concatenate([[0.0], 1.0 / (1.0 + np.geomspace(1e6, 1.0, 49))])
#: Technical noise is kept only when successive samples are correlated at least this much
#: under the fit with noise (mean of exp(-rate dt)): otherwise the increments at every lag
#: are at the plateau, and drift and noise cannot be told apart.
NOISE_MIN_CORRELATION = 0.2
#: Lags (in successive usable samples) whose increments the noise estimate uses.
NOISE_LAGS = 4
#: Fewest usable samples for estimating technical noise: the nugget is the difference of
#: two noisy sums of increments, and on shorter series it mostly absorbed drift.
NOISE_MIN_SAMPLES = 10
#: The relaxation estimate of p divides by 1 - e, e the read-weighted mean of
#: exp(-rate (t - t_0)); e is capped here (the noise of p grows as 1 / (1 - e)).
MAX_START_WEIGHT = 0.75
#: Floor of the relaxation estimate of p, as a share of the taxon's pooled read fraction.
MIN_RELAXED_SHARE = 0.1


@dataclass(frozen=True)
class _MomentTerms:
    """Design-only coefficients of the pooled moment equations at every grid rate, ``(G,)``.

    In units of Pi = sum_i p_i (1 - p_i), with sampling variance factors
    s_t = g + (1 - g)/n_t (``one`` is the part proportional to g, ``depth`` the rest):

        E[Q]/Pi   = v q_drift + (1 - v)(g q_one + (1 - g) q_depth)
        E[H]/Pi   = 1 - v h_drift - (1 - v)(g h_one + (1 - g) h_depth)
        E[D_l]/Pi = v pair_drift_l + 2 g (1 - v) m_l,          l = 1 .. NOISE_LAGS

    Q is the spread about the fitted mean path, H = sum_i p-hat_i (1 - p-hat_i), D_l the
    sampling-corrected squared increments between usable samples l apart (minus the
    fitted trend when conditioned on the first sample).
    """

    q_drift: np.ndarray
    q_one: np.ndarray
    q_depth: np.ndarray
    h_drift: np.ndarray
    h_one: np.ndarray
    h_depth: np.ndarray
    pair_drift: tuple[np.ndarray, ...]

    def v_from_spread(self, ratio_q: np.ndarray, noise: np.ndarray) -> np.ndarray:
        """v solving E[Q]/E[H] = ratio_q at every grid rate (the note's ratio form)."""
        q_s = noise * self.q_one + (1.0 - noise) * self.q_depth
        h_s = noise * self.h_one + (1.0 - noise) * self.h_depth
        with np.errstate(divide="ignore", invalid="ignore"):
            return ((ratio_q * (1.0 - h_s) - q_s)
                    / (self.q_drift - q_s + ratio_q * (self.h_drift - h_s)))

    def increments(self, lag: int, n_pairs: int, v: np.ndarray,
                   noise: np.ndarray) -> np.ndarray:
        """E[D_lag]/E[H] at every grid rate."""
        h_s = noise * self.h_one + (1.0 - noise) * self.h_depth
        drift = self.pair_drift[lag - 1]
        with np.errstate(divide="ignore", invalid="ignore"):
            return ((v * drift + 2.0 * noise * (1.0 - v) * n_pairs)
                    / (1.0 - v * self.h_drift - (1.0 - v) * h_s))


@dataclass(frozen=True)
class _ConditionalPath:
    """Design-only pieces of the mean path p-hat (1 - e_t) + Y_0 e_t at every grid rate.

    e_t = exp(-rate (t - t_0)); ``start_weight`` is e-bar = sum_t w_t e_t (capped at
    :data:`MAX_START_WEIGHT`), p-hat = (pooled - e-bar Y_0)/(1 - e-bar), and the path at
    sample t is alpha_t pooled + beta_t Y_0. ``trend`` is sum over the pairs l apart of
    (e_s - e_t)^2, the factor of ||Y_0 - p||^2 in their expected squared increments.
    """

    start_weight: np.ndarray              # (G,)
    alpha: np.ndarray                     # (G, T)
    beta: np.ndarray                      # (G, T)
    trend: tuple[np.ndarray, ...]         # (G,) per lag


@dataclass(frozen=True)
class _SeriesDesign:
    """Design-only quantities of the time-series moment equations.

    Usable samples have depth >= 2 (the sampling correction divides by n - 1); the
    adjacent pairs are successive usable samples. ``path`` is set when the fit is
    conditioned on the first sample.
    """

    lag_pairs: tuple[tuple[np.ndarray, np.ndarray], ...]  # usable samples l = 1, 2, .. apart
    adjacent_gaps: np.ndarray  # days between successive usable samples
    log_grid: np.ndarray       # (G,) grid of log rate over rate_bounds(design)
    terms: _MomentTerms
    path: _ConditionalPath | None

    @property
    def adjacent(self) -> tuple[np.ndarray, np.ndarray]:
        """Successive usable samples (s, t)."""
        return self.lag_pairs[0]

    @property
    def usable(self) -> np.ndarray:
        """Indices of the usable samples, in time order."""
        first, second = self.adjacent
        return np.concatenate([first[:1], second])

    @property
    def identifiable(self) -> bool:
        """The rate needs at least three usable samples (two adjacent pairs)."""
        return self.adjacent[0].size >= 2

    @property
    def noise_identifiable(self) -> bool:
        """Separating noise from drift needs :data:`NOISE_MIN_SAMPLES` usable samples."""
        return self.adjacent[0].size >= NOISE_MIN_SAMPLES - 1


@dataclass(frozen=True)
class _Crossing:
    """A position on a grid per row (a crossing or a minimum): grid cell and fraction."""

    low: np.ndarray        # (R,) index of the grid point below the crossing
    fraction: np.ndarray   # (R,) position between low and low + 1

    def at(self, values: np.ndarray) -> np.ndarray:
        """``values`` ``(G,)`` or ``(R, G)`` interpolated at each row's crossing."""
        values = np.broadcast_to(values, (self.low.size, values.shape[-1]))
        rows = np.arange(self.low.size)
        below, above = values[rows, self.low], values[rows, np.minimum(self.low + 1,
                                                                       values.shape[1] - 1)]
        return below + self.fraction * (above - below)


def rate_bounds(design: Design, conditioned: bool = False) -> tuple[float, float]:
    """Search range of the rate (per day) for a time-series design.

    ``[RATE_MIN_SPAN / span, RATE_MAX_LAG / shortest lag]`` over the samples usable in the
    variogram (depth >= 2; all samples if fewer than two are usable): outside it the
    variogram is either linear over the whole span or flat at every lag, and the rate is
    not identified. Conditioned on the first sample the lower end is
    ``CONDITIONED_MIN_SPAN / span``: slower dynamics pin the mean path to the first sample,
    the spread about it carries almost no drift, and the moment equations admit spurious
    solutions with a huge drift variance.
    """
    if design.times is None or design.n_samples < 2:
        raise ValueError("rate bounds need a time-series design with at least two samples")
    times = design.times[design.depths >= 2]
    if times.size < 2:
        times = design.times
    span = float(times[-1] - times[0])
    low = (CONDITIONED_MIN_SPAN if conditioned else RATE_MIN_SPAN) / span
    return low, RATE_MAX_LAG / float(np.diff(times).min())


def pooled_fractions(counts: np.ndarray, design: Design) -> np.ndarray:
    """p-hat: pooled read fraction sum_t N_it / W of each taxon, shape ``(R, K)``.

    Unbiased for p at stationarity (design note, section 5). Taxa without reads get 0.
    """
    return counts.sum(axis=1, dtype=np.float64) / float(design.depths.sum())


def variogram(counts: np.ndarray, design: Design) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pooled sampling-corrected variogram D_st over all usable pairs s < t.

    Parameters
    ----------
    counts:
        Shape ``(R, T, K)``; rows sum to ``design.depths``.
    design:
        A time-series design.

    Returns
    -------
    first, second, d:
        Sample indices of each pair ``(P,)`` and D_st, shape ``(R, P)``. At stationarity
        E[D_st] = 2 v Pi (1 - exp(-rate |t_s - t_t|)) (design note, section 5). Samples
        with depth 1 are left out (the correction divides by n - 1).
    """
    first, second = _usable_pairs(design)
    gram, own = _gram_terms(counts, design)
    return first, second, 2.0 * _half_variogram(gram, own, first, second)


def fit_batch(counts: np.ndarray, design: Design,
              options: NullOptions = NullOptions(),
              known_noise: np.ndarray | None = None) -> NullFit:
    """Fit (p, theta, rate, noise) to each table of a batch sharing one design; vectorised.

    Parameters
    ----------
    counts:
        Integer counts, shape ``(R, T, K)``; row ``t`` of every table sums to
        ``design.depths[t]``. Taxa absent from a table get p = 0.
    design:
        Depths and (for a time series) times shared by all tables.
    options:
        Technical noise estimated, off or fixed; p relaxation-corrected (conditioned on
        the first sample) or the pooled read fraction (see :class:`NullOptions`).
    known_noise:
        The technical noise g of every table ``(R,)`` when it is known from elsewhere
        (technical replicates, :mod:`driftscreen.neutral.technical`): used as a fixed
        noise, in place of the options' one.

    Returns
    -------
    NullFit
        ``theta`` from v-hat clipped into [1e-9, 1 - 1e-9] (``clipped`` marks where that
        happened); ``rate`` per day for a time series (None for a snapshot). When the
        series has fewer than two distinct usable lags the rate is set to its upper bound
        (samples treated as independent). ``noise`` is g = 1/(1 + C); an estimated noise
        is 0 for snapshots and wherever it is not identified (see
        :data:`NOISE_MIN_CORRELATION`).
    """
    counts = np.asarray(counts)
    if counts.ndim != 3 or counts.shape[1] != design.n_samples:
        raise ValueError("counts must have shape (R, T, K) with T = design.n_samples")
    if design.n_samples < 2:
        raise InputError("a dataset with one sample cannot be fitted",
                         fix="provide at least two samples per dataset")
    series = (_series_design(design, options.conditioned) if design.is_time_series
              else None)
    p = pooled_fractions(counts, design)
    n_rep = counts.shape[0]
    v, noise = np.empty(n_rep), np.full(n_rep, options.fixed_noise or 0.0)
    fixed = options.fixed_noise is not None
    if known_noise is not None:
        noise, fixed = np.asarray(known_noise, dtype=np.float64).copy(), True
    rate = np.empty(n_rep) if series is not None else None
    step = _sub_batch_size(counts.shape)
    for start in range(0, n_rep, step):
        part = slice(start, start + step)
        if series is None:
            v[part] = _snapshot_v(counts[part], p[part], design, noise[part])
        else:
            v[part], rate[part], noise[part] = _series_fit(counts[part], p[part], design,
                                                           series, noise[part] if fixed else None)
    clipped = ~((v >= V_MIN) & (v <= V_MAX))
    v = np.clip(np.nan_to_num(v, nan=V_MIN), V_MIN, V_MAX)
    conditioned = series is not None and options.conditioned
    if conditioned:
        p = relaxation_composition(counts, p, design, rate)
    return NullFit(p=p, theta=1.0 / v - 1.0, rate=rate, clipped=clipped, noise=noise,
                   conditioned=conditioned)


def relaxation_composition(counts: np.ndarray, pooled: np.ndarray, design: Design,
                           rate: np.ndarray) -> np.ndarray:
    """p as the point every taxon relaxes to from the first sample, shape ``(R, K)``.

    Given the first sample, the neutral mean relaxes as
    E[X_i(t)] = p_i + (x_i(t_0) - p_i) exp(-rate (t - t_0)) (design note, section 2), so
    the pooled read fraction has expectation p (1 - e) + Y_0 e with
    e = sum_t w_t exp(-rate (t - t_0)), and p = (pooled - e Y_0) / (1 - e). A community
    still recovering from a disturbance at t_0 then gets the composition it recovers
    towards, not its time mean. e is capped at :data:`MAX_START_WEIGHT`; no taxon seen in
    the series gets less than :data:`MIN_RELAXED_SHARE` of its pooled fraction (the
    difference can be negative for a taxon declining faster than the fit allows), and rows
    are renormalised.
    """
    lags = design.times - design.times[0]
    first = counts[:, 0, :] / float(design.depths[0])
    return start_corrected(pooled, first, np.exp(-rate[:, None] * lags) @ _weights(design))


def start_corrected(composition: np.ndarray, first: np.ndarray, start_weight: np.ndarray
                    ) -> np.ndarray:
    """(composition - e Y_0) / (1 - e): a mean composition ``(R, K)`` with expectation
    p (1 - e) + Y_0 e, for first read fractions Y_0 ``(R, K)`` and start weights e ``(R,)``,
    corrected to p. e is capped at :data:`MAX_START_WEIGHT`, no taxon falls below
    :data:`MIN_RELAXED_SHARE` of its composition, and rows are renormalised."""
    start_weight = np.minimum(start_weight, MAX_START_WEIGHT)
    relaxed = (composition - start_weight[:, None] * first) / (1.0 - start_weight)[:, None]
    relaxed = np.maximum(relaxed, MIN_RELAXED_SHARE * composition)
    totals = relaxed.sum(axis=1, keepdims=True)
    return np.where(totals > 0, relaxed / np.where(totals > 0, totals, 1.0), composition)


def fit(counts: np.ndarray, design: Design, options: NullOptions = NullOptions()
        ) -> NeutralModel:
    """Fit one table ``(T, K)``: :func:`fit_batch` on a batch of one, as a flagged model."""
    counts = np.asarray(counts)
    if counts.ndim != 2:
        raise ValueError("counts must have shape (T, K)")
    return fitted_model(fit_batch(counts[None], design, options), design, options)


def fitted_model(result: NullFit, design: Design, options: NullOptions = NullOptions(),
                 index: int = 0, replicate_pairs: int = 0) -> NeutralModel:
    """Table ``index`` of a batch fit as a :class:`NeutralModel` with plain-text flags.

    The one path from a fit to a model. Flags: theta clipped; rate at a bound of its
    search range; rate weakly identified (rate * span < 5, design note section 5); series
    too short for a rate; samples with a single read left out of the variogram; technical
    noise not separable from drift (snapshots, or successive samples nearly independent);
    with ``replicate_pairs`` pairs of technical replicates, where the noise came from.
    """
    rate = None if result.rate is None else float(result.rate[index])
    flags = _fit_flags(design, rate, bool(result.clipped[index]), options.conditioned)
    if replicate_pairs:
        flags += (_replicate_flag(replicate_pairs, options),)
    else:
        flags += _noise_flags(design, rate, float(result.noise[index]), options)
    return NeutralModel(result.p[index], float(result.theta[index]), rate,
                        float(result.noise[index]), flags, result.conditioned)


def correlation_weight(rate: np.ndarray, design: Design) -> np.ndarray:
    """R_w = sum_{s,t} w_s w_t exp(-rate |t_s - t_t|) for each rate, shape like ``rate``.

    Var(p-hat_i) = pi_i [v R_w + (1 - v)/W]; 1/R_w is the effective number of independent
    samples (design note, section 5). Uses the recursion over sorted times
    S_t = exp(-rate dt_t) (S_{t-1} + w_{t-1}), so the cost is O(T) per rate.
    """
    rate = np.asarray(rate, dtype=np.float64)
    w = _weights(design)
    carried = np.zeros_like(rate)
    cross = np.zeros_like(rate)
    for t, gap in enumerate(design.intervals, start=1):
        carried = np.exp(-rate * gap) * (carried + w[t - 1])
        cross += w[t] * carried
    return float(np.sum(w**2)) + 2.0 * cross


# ---------------------------------------------------------------- snapshot


def _snapshot_v(counts: np.ndarray, p: np.ndarray, design: Design,
                noise: np.ndarray) -> np.ndarray:
    """v-hat from Q/H with R_w = sum_t w_t^2 (independent samples; design note, section 5).

    Solves E[Q]/E[H] = r with E[Q] = Pi[v(1 - R_w) + (1 - v)(S1 - S2)] and
    E[H] = Pi[1 - v R_w - (1 - v) S2], S1 = sum_t w_t s_t, S2 = sum_t w_t^2 s_t, where
    s_t = g + (1 - g)/n_t is the sampling variance factor of sample t (1/n_t without
    technical noise).
    """
    w = _weights(design)
    depths = design.depths.astype(np.float64)
    proportions = counts / depths[:, None]
    spread = np.einsum("t,rt->r", w, np.sum((proportions - p[:, None, :]) ** 2, axis=2))
    hetero = 1.0 - np.sum(p**2, axis=1)
    r_w = float(np.sum(w**2))
    s1 = noise + (1.0 - noise) * float(np.sum(w / depths))
    s2 = noise * r_w + (1.0 - noise) * float(np.sum(w**2 / depths))
    with np.errstate(divide="ignore", invalid="ignore"):
        r = spread / hetero
        return (r * (1.0 - s2) - (s1 - s2)) / (1.0 - r_w + r * r_w - r * s2 - (s1 - s2))


# ---------------------------------------------------------------- time series


def _series_fit(counts: np.ndarray, p: np.ndarray, design: Design, series: _SeriesDesign,
                fixed_noise: np.ndarray | None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """v-hat, rate-hat and noise-hat from the pooled spread and increments at lags 1 and 2.

    Pooled over taxa, the spread Q about the fitted mean, H = sum_i p_i (1 - p_i) and the
    sampling-corrected squared increments D_1 between successive samples and D_2 between
    samples two apart have the expectations of :class:`_MomentTerms` (design note,
    section 5, with sampling variance factors s_t = g + (1 - g)/n_t). The correction
    Y(1 - Y)/(n - 1) removes multinomial noise exactly, and Dirichlet-multinomial reads
    leave g X (1 - X) per sample: the nugget 2 g (1 - v) Pi, the same at every lag. For
    each rate on a grid the spread equation gives v; the rate is where the D_1 equation
    holds. With technical noise estimated, g and the rate come jointly from the increments
    at lags 1 .. NOISE_LAGS (:func:`_noise_estimate`): where the noise dominates the
    increments, the lag-1 equation alone would turn a small error in g into a large one in
    the rate. Successive samples carry most of
    the information on the rate and the variance about the mean carries the plateau.
    Least squares on the variogram over all pairs (the note's suggestion) is less
    efficient because its many long-lag pairs are noisy and strongly correlated: in
    simulations with theta = 50, rate = 0.05 per day and 60 daily samples, the spread (sd)
    of log rate-hat is 0.45 here against 1.0 for the variogram fit. Sums are pooled over
    taxa: weighting taxa unequally makes the ratio of noisy sums strongly biased when
    p-hat is noisy.

    Conditioned on the first sample, the mean path is p (1 - e_t) + Y_0 e_t,
    e_t = exp(-rate (t - t_0)), so Q, H and the trend part of D_l are evaluated on the
    path of every grid rate (:func:`_observed_ratios`).
    """
    ratio_q, ratios = _observed_ratios(counts, p, design, series)
    noise = np.zeros(counts.shape[0]) if fixed_noise is None else fixed_noise.copy()
    if not series.identifiable:
        last = series.log_grid.size - 1
        crossing = _Crossing(np.full(noise.size, last), np.zeros(noise.size))
    else:
        crossing = _rate_crossing(ratio_q, ratios[0], series, noise)
        if fixed_noise is None and series.noise_identifiable:
            noise, rate_index = _noise_estimate(ratio_q, ratios, series)
            joint = noise > 0
            crossing.low[joint], crossing.fraction[joint] = rate_index[joint], 0.0
        rate = np.exp(crossing.at(series.log_grid))
        lost = (noise > 0) & (successive_correlation(rate, series.adjacent_gaps)
                              < NOISE_MIN_CORRELATION)
        if fixed_noise is None and lost.any():
            noise[lost] = 0.0
            refit = _rate_crossing(ratio_q[lost], ratios[0][lost], series, noise[lost])
            crossing.low[lost], crossing.fraction[lost] = refit.low, refit.fraction
    v = crossing.at(series.terms.v_from_spread(ratio_q, noise[:, None]))
    return v, np.exp(crossing.at(series.log_grid)), noise


def _observed_ratios(counts: np.ndarray, p: np.ndarray, design: Design, series: _SeriesDesign
                     ) -> tuple[np.ndarray, list[np.ndarray]]:
    """Q/H and D_l/H (l = 1, 2, ..) of every table, ``(R, 1)`` or, conditioned, ``(R, G)``."""
    depths = design.depths.astype(np.float64)
    proportions = counts / depths[:, None]
    increments = [total[:, None] for total in
                  _lag_increments(proportions, depths, series.usable, len(series.lag_pairs))]
    w = _weights(design)
    if series.path is None:
        hetero = (p * (1.0 - p)).sum(axis=1)[:, None]
        spread = np.einsum("t,rtk->r", w, (proportions - p[:, None, :]) ** 2)[:, None]
    else:
        path = series.path
        first = proportions[:, 0, :]
        with_pooled = np.einsum("rtk,rk->rt", proportions, p)
        with_first = np.einsum("rtk,rk->rt", proportions, first)
        squares = np.einsum("rtk,rtk->rt", proportions, proportions)
        pp, pf, ff = (p * p).sum(axis=1), (p * first).sum(axis=1), (first * first).sum(axis=1)
        spread = (squares @ w)[:, None] - 2.0 * with_pooled @ (w * path.alpha).T \
            - 2.0 * with_first @ (w * path.beta).T + np.outer(pp, (w * path.alpha**2).sum(1)) \
            + 2.0 * np.outer(pf, (w * path.alpha * path.beta).sum(1)) \
            + np.outer(ff, (w * path.beta**2).sum(1))
        e = path.start_weight
        hetero = 1.0 - (pp[:, None] - 2.0 * e * pf[:, None] + e**2 * ff[:, None]) / (1.0 - e)**2
        departure = (pp - 2.0 * pf + ff)[:, None] / (1.0 - e) ** 2      # ||Y_0 - p-hat||^2
        increments = [d - departure * trend for d, trend in zip(increments, path.trend)]
    with np.errstate(divide="ignore", invalid="ignore"):
        return spread / hetero, [d / hetero for d in increments]


def _rate_crossing(ratio_q: np.ndarray, ratio_1: np.ndarray, series: _SeriesDesign,
                   noise: np.ndarray) -> _Crossing:
    """Where the predicted lag-1 increment reaches the observed one, per table.

    Only rates where the spread equation gives a valid v (in (0, 1)) count. Searched from
    the fast end of the rate grid: conditioned on a first sample, very slow rates pin the
    mean path to that sample and a spurious crossing with a large drift variance can
    appear there. Without a crossing, the rate where the two come closest.
    """
    g = noise[:, None]
    v = series.terms.v_from_spread(ratio_q, g)
    valid = (v >= V_MIN) & (v <= V_MAX)
    gap = series.terms.increments(1, series.adjacent[0].size, np.clip(v, V_MIN, V_MAX),
                                  g) - ratio_1
    return _crossing(np.where(valid, gap, np.nan), last=True)


def successive_correlation(rate: np.ndarray, gaps: np.ndarray) -> np.ndarray:
    """Mean over successive samples of exp(-rate dt), the drift correlation, per rate."""
    return np.exp(-np.asarray(rate)[..., None] * gaps).mean(axis=-1)


def _lag_increments(proportions: np.ndarray, depths: np.ndarray, usable: np.ndarray,
                    n_lags: int) -> list[np.ndarray]:
    """Per lag l = 1 .. n_lags: the sum over the pairs of usable samples l apart, and over
    the taxa, of sampling-corrected squared increments, ``(R,)`` each.

    The sampling corrections x (1 - x)/(n - 1) are summed over the taxa once per sample,
    and the pairs at lag l are the slices ``[:-l]`` and ``[l:]`` of the usable samples.
    """
    x = proportions[:, usable]
    noise = np.einsum("rtk,rtk->rt", x, 1.0 - x) / (depths[usable] - 1.0)
    totals = []
    for lag in range(1, n_lags + 1):
        step = x[:, lag:] - x[:, :-lag]
        totals.append(np.einsum("rtk,rtk->r", step, step)
                      - noise[:, :-lag].sum(axis=1) - noise[:, lag:].sum(axis=1))
    return totals


def _noise_estimate(ratio_q: np.ndarray, ratios: list[np.ndarray],
                    series: _SeriesDesign) -> tuple[np.ndarray, np.ndarray]:
    """g-hat and the rate's grid index of every table, from the increments at lags 1 ..
    NOISE_LAGS (the nugget of the sampling-corrected variogram), ``(R,)`` each.

    For every g on :data:`NOISE_GRID` and every grid rate, the spread equation gives v and
    the increment equations predict D_l; g-hat is the g of the pair (rate, g) whose
    predictions are closest to the observed increments in relative squared error, each lag
    weighted by its number of pairs. Three moments alone (spread, lags 1 and 2) cannot
    tell fast drift without noise from slow drift with noise; the longer lags can: fast
    drift saturates within a lag or two, slow drift keeps rising while the nugget stays.
    Grid points where v leaves (0, 1) are not solutions.
    """
    losses = np.empty((ratio_q.shape[0], NOISE_GRID.size))
    rate_index = np.empty((ratio_q.shape[0], NOISE_GRID.size), dtype=np.int64)
    for j, g in enumerate(NOISE_GRID):
        noise = np.full((ratio_q.shape[0], 1), g)
        v = series.terms.v_from_spread(ratio_q, noise)
        valid = (v >= V_MIN) & (v <= V_MAX)
        v = np.clip(v, V_MIN, V_MAX)
        loss = np.zeros_like(v)
        for lag, (ratio, pairs) in enumerate(zip(ratios, series.lag_pairs), start=1):
            predicted = series.terms.increments(lag, pairs[0].size, v, noise)
            with np.errstate(divide="ignore", invalid="ignore"):
                loss += pairs[0].size * (ratio / predicted - 1.0) ** 2
        loss = np.where(valid & np.isfinite(loss), loss, np.inf)
        rate_index[:, j] = np.argmin(loss, axis=1)
        losses[:, j] = loss[np.arange(loss.shape[0]), rate_index[:, j]]
    best = np.argmin(losses, axis=1)
    return _refined_minimum(losses), rate_index[np.arange(best.size), best]


def _refined_minimum(losses: np.ndarray) -> np.ndarray:
    """g at the smallest loss of each row, refined by a parabola in log g through the best
    grid point and its neighbours (0 stays 0; NaN-free: rows without a finite loss get 0)."""
    best = np.argmin(losses, axis=1)
    estimate = NOISE_GRID[best]
    inner = (best > 1) & (best < NOISE_GRID.size - 1)       # index 0 is g = 0
    rows = np.flatnonzero(inner & np.isfinite(losses.min(axis=1)))
    left, centre, right = (losses[rows, best[rows] + k] for k in (-1, 0, 1))
    curvature = left - 2.0 * centre + right
    with np.errstate(divide="ignore", invalid="ignore"):
        shift = np.clip(np.nan_to_num(0.5 * (left - right) / curvature), -0.5, 0.5)
    step = np.log(NOISE_GRID[2] / NOISE_GRID[1])
    estimate[rows] = np.exp(np.log(estimate[rows]) + np.where(curvature > 0, shift, 0.0) * step)
    return estimate


def _crossing(gap: np.ndarray, last: bool = False) -> _Crossing:
    """Where ``gap`` ``(R, G)`` turns from negative to non-negative, interpolated.

    The first such turn: a gap that is non-negative at the first grid point puts the
    crossing there, one that stays negative at the last point. With ``last``, the last
    turn between finite values (NaN marks invalid grid points), and without any turn the
    finite point where |gap| is smallest (the last point if none is finite).
    """
    n_grid = gap.shape[1]
    if last:
        finite = np.isfinite(gap)
        turns = (finite[:, 1:] & finite[:, :-1] & (gap[:, 1:] >= 0) & (gap[:, :-1] < 0))
        closest = np.argmin(np.where(finite, np.abs(gap), np.inf), axis=1)
        closest = np.where(finite.any(axis=1), closest, n_grid - 1)
        index = np.where(turns.any(axis=1), n_grid - 1 - np.argmax(turns[:, ::-1], axis=1),
                         -1)
    else:
        above = np.nan_to_num(gap, nan=-np.inf) >= 0
        index = np.where(above.any(axis=1), np.argmax(above, axis=1), n_grid)
        closest = np.where(index == n_grid, n_grid - 1, 0)
        index = np.where((index == n_grid) | (index == 0), -1, index)
    rows = np.arange(gap.shape[0])
    inner = np.clip(index, 1, n_grid - 1)
    low, high = gap[rows, inner - 1], gap[rows, inner]
    with np.errstate(divide="ignore", invalid="ignore"):
        fraction = np.clip(np.nan_to_num(-low / (high - low), nan=1.0), 0.0, 1.0)
    interpolated = index > 0
    return _Crossing(np.where(interpolated, inner - 1, closest),
                     np.where(interpolated, fraction, 0.0))


def _gram_terms(counts: np.ndarray, design: Design) -> tuple[np.ndarray, np.ndarray]:
    """Gram matrices Y Y^T ``(R, T, T)`` and sum_i Y_it^2 - Y_it(1 - Y_it)/(n_t - 1) ``(R, T)``.

    The second term is g_tt minus the multinomial correction; samples of depth 1 get NaN
    there and are never used.
    """
    depths = design.depths.astype(np.float64)
    proportions = counts / depths[:, None]
    gram = np.matmul(proportions, proportions.transpose(0, 2, 1))
    squares = np.einsum("rtt->rt", gram)
    totals = proportions.sum(axis=2)
    with np.errstate(divide="ignore", invalid="ignore"):
        own = squares - (totals - squares) / (depths - 1.0)
    return gram, own


def _half_variogram(gram: np.ndarray, own: np.ndarray, first: np.ndarray,
                    second: np.ndarray) -> np.ndarray:
    """D_st / 2 for the given pairs, shape ``(R, P)``."""
    return 0.5 * (own[:, first] + own[:, second]) - gram[:, first, second]


def _series_design(design: Design, conditioned: bool = False) -> _SeriesDesign:
    """Successive usable samples and the design-only functions of the rate on its grid.

    Cached per design (the same design is fitted for the data, the pilot and every chunk
    of replicates).
    """
    key = (design.times.tobytes(), design.depths.tobytes(), conditioned)
    if key not in _SERIES_CACHE:
        if len(_SERIES_CACHE) >= SERIES_CACHE_SIZE:
            _SERIES_CACHE.pop(next(iter(_SERIES_CACHE)))
        _SERIES_CACHE[key] = _new_series_design(design, conditioned)
    return _SERIES_CACHE[key]


#: Designs whose series quantities are kept (least recently added dropped first).
SERIES_CACHE_SIZE = 8
_SERIES_CACHE: dict[tuple, _SeriesDesign] = {}


def _new_series_design(design: Design, conditioned: bool) -> _SeriesDesign:
    usable = np.flatnonzero(design.depths >= 2)
    lag_pairs = tuple((usable[:-lag], usable[lag:]) for lag in range(1, NOISE_LAGS + 1)
                      if usable.size > lag)
    adjacent = lag_pairs[0]
    low, high = rate_bounds(design, conditioned)
    n_grid = int(np.ceil(np.log(high / low) / LOG_RATE_STEP)) + 1
    log_grid = np.linspace(np.log(low), np.log(high), n_grid)
    gaps = design.times[adjacent[1]] - design.times[adjacent[0]]
    if conditioned:
        terms, path = _conditional_terms(design, np.exp(log_grid), lag_pairs)
    else:
        terms, path = _stationary_terms(design, np.exp(log_grid), lag_pairs), None
    return _SeriesDesign(lag_pairs, gaps, log_grid, terms, path)


def _stationary_terms(design: Design, rates: np.ndarray,
                      pair_sets: tuple[tuple[np.ndarray, np.ndarray], ...]) -> _MomentTerms:
    """Terms of a stationary series about the pooled mean (design note, section 5)."""
    w = _weights(design)
    depths = design.depths.astype(np.float64)
    r_w = correlation_weight(rates, design)
    s1, s2, w2 = float(np.sum(w / depths)), float(np.sum(w**2 / depths)), float(np.sum(w**2))
    ones = np.ones_like(rates)
    pair_drift = tuple(2.0 * -np.expm1(-rates[:, None] * (design.times[b] - design.times[a])
                                       ).sum(axis=1) for a, b in pair_sets)
    return _MomentTerms(1.0 - r_w, (1.0 - w2) * ones, (s1 - s2) * ones, r_w, w2 * ones,
                        s2 * ones, pair_drift)


def _conditional_terms(design: Design, rates: np.ndarray,
                       pair_sets: tuple[tuple[np.ndarray, np.ndarray], ...]
                       ) -> tuple[_MomentTerms, _ConditionalPath]:
    """Terms of a series conditioned on its first sample, about the mean path.

    Given X(t_0), the community is X_t = p + (X_0 - p) e_t + eps_t with
    Cov(eps_s, eps_t) = v pi (exp(-rate |t_s - t_t|) - e_s e_t) (the covariance given
    X(t_0) of an Ornstein-Uhlenbeck approximation of the pooled diffusion; design note,
    section 2), and reads add independent noise of variance (1 - v) pi s_t. The residuals
    of the path are a linear map M of the noise vector z (eps plus sampling noise, z_0 the
    sampling noise of the first sample): r = M z with
    M = I - (1 - e) c^T - e delta_0^T and p-hat - p = c^T z, c = (w - e-bar delta_0)/(1 - e-bar).
    So E[Q]/Pi = sum_t w_t (M S M^T)_tt and Var(p-hat)/pi = c^T S c for each covariance S
    of the drift, of g and of 1/n_t; the squared increment of a pair gets the drift part
    2 - 2 exp(-rate lag) - (e_s - e_t)^2 and the trend (e_s - e_t)^2 ||X_0 - p||^2.
    """
    w = _weights(design)
    times = design.times - design.times[0]
    inverse_depth = 1.0 / design.depths.astype(np.float64)
    lags = np.abs(times[:, None] - times[None, :])
    columns = {name: np.empty(rates.size) for name in
               ("q_drift", "q_one", "q_depth", "h_drift", "h_one", "h_depth")}
    alpha, beta = np.empty((rates.size, times.size)), np.empty((rates.size, times.size))
    start_weight = np.empty(rates.size)
    for j, rate in enumerate(rates):
        e = np.exp(-rate * times)
        e_bar = min(float(w @ e), MAX_START_WEIGHT)
        c = w / (1.0 - e_bar)
        c[0] -= e_bar / (1.0 - e_bar)
        drift = np.exp(-rate * lags) - np.outer(e, e)
        for kind, covariance in (("drift", drift), ("one", None), ("depth", inverse_depth)):
            columns[f"q_{kind}"][j], columns[f"h_{kind}"][j] = _residual_moments(
                covariance, w, c, e)
        start_weight[j] = e_bar
        alpha[j] = (1.0 - e) / (1.0 - e_bar)
        beta[j] = (e - e_bar) / (1.0 - e_bar)
    pair_drift, trend = [], []
    for a, b in pair_sets:
        e_pairs = np.exp(-rates[:, None] * times[None, :])
        step = (e_pairs[:, a] - e_pairs[:, b]) ** 2
        pair_drift.append((-2.0 * np.expm1(-rates[:, None] * (times[b] - times[a]))
                           - step).sum(axis=1))
        trend.append(step.sum(axis=1))
    return (_MomentTerms(**columns, pair_drift=tuple(pair_drift)),
            _ConditionalPath(start_weight, alpha, beta, tuple(trend)))


def _residual_moments(covariance: np.ndarray | None, w: np.ndarray, c: np.ndarray,
                      e: np.ndarray) -> tuple[float, float]:
    """sum_t w_t (M S M^T)_tt and c^T S c for M = I - (1 - e) c^T - e delta_0^T.

    ``covariance`` is a matrix S, a vector (a diagonal S) or None (the identity).
    """
    u = 1.0 - e
    if covariance is None or covariance.ndim == 1:
        diagonal = np.ones_like(w) if covariance is None else covariance
        s_c = diagonal * c                                   # S c
        m_s = np.diag(diagonal) - np.outer(u, s_c) - np.outer(e, np.eye(w.size)[0] * diagonal)
    else:
        s_c = covariance @ c
        m_s = covariance - np.outer(u, s_c) - np.outer(e, covariance[0])
    diagonal_mm = np.diag(m_s) - u * (m_s @ c) - e * m_s[:, 0]
    return float(w @ diagonal_mm), float(c @ s_c)


def _lag_groups(design: Design) -> tuple[np.ndarray, ...]:
    """Usable pairs sorted by lag; start, lag and size of each group of equal lags."""
    first, second = _usable_pairs(design)
    pair_lags = design.times[second] - design.times[first]
    order = np.argsort(pair_lags, kind="stable")
    first, second, pair_lags = first[order], second[order], pair_lags[order]
    new_lag = np.ones(pair_lags.size, dtype=bool)
    new_lag[1:] = ~np.isclose(pair_lags[1:], pair_lags[:-1], rtol=1e-12, atol=0.0)
    starts = np.flatnonzero(new_lag)
    pair_counts = np.diff(np.append(starts, pair_lags.size)).astype(np.float64)
    return first, second, starts, pair_lags[starts], pair_counts


def _usable_pairs(design: Design) -> tuple[np.ndarray, np.ndarray]:
    """Index pairs s < t of samples with depth >= 2, row-major order."""
    usable = np.flatnonzero(design.depths >= 2)
    first, second = np.triu_indices(usable.size, k=1)
    return usable[first], usable[second]


# ---------------------------------------------------------------- helpers


def _weights(design: Design) -> np.ndarray:
    """Pooled read weights w_t = n_t / W."""
    depths = design.depths.astype(np.float64)
    return depths / depths.sum()


def _sub_batch_size(shape: tuple[int, ...]) -> int:
    """Replicates per sub-batch so the float64 working arrays stay near SUB_BATCH_BYTES."""
    _, n_samples, n_taxa = shape
    return max(1, SUB_BATCH_BYTES // (8 * 4 * n_samples * n_taxa))


def noise_identifiable(design: Design, rate: float | None) -> bool:
    """Whether a series fitted at ``rate`` lets technical noise be told from drift."""
    if rate is None:
        return False
    series = _series_design(design)
    correlation = float(successive_correlation(np.array(rate), series.adjacent_gaps))
    return series.noise_identifiable and correlation >= NOISE_MIN_CORRELATION


def _noise_flags(design: Design, rate: float | None, noise: float,
                 options: NullOptions) -> tuple[str, ...]:
    """Plain-text notes on what the fit could say about technical noise."""
    if options.noise != "estimate" or noise > 0:
        return ()
    if rate is None:
        return ("a snapshot design cannot separate technical noise from drift: reads are "
                "treated as multinomial (give a read precision to include technical noise)",)
    if noise_identifiable(design, rate):
        return ()
    correlation = float(successive_correlation(np.array(rate),
                                               _series_design(design).adjacent_gaps))
    return (f"technical noise not identified (successive samples correlate at "
            f"{correlation:.2f} under the fit, below {NOISE_MIN_CORRELATION:g}, or fewer than "
            f"{NOISE_MIN_SAMPLES} samples): reads are treated as multinomial",)


def _replicate_flag(pairs: int, options: NullOptions) -> str:
    """Where the read precision came from in a dataset with technical replicates."""
    if options.noise == "estimate":
        return (f"read precision from {pairs} technical replicate "
                f"{'pair' if pairs == 1 else 'pairs'} (sequenced samples of one biological "
                "sample), not from the variance between samples")
    return (f"technical replicates ({pairs} {'pair' if pairs == 1 else 'pairs'}) not used: "
            "the read noise is fixed by the options")


def _fit_flags(design: Design, rate: float | None, clipped: bool,
               conditioned: bool = False) -> tuple[str, ...]:
    """Plain-text notes on one fit."""
    flags = []
    if clipped:
        flags.append("theta estimate clipped to its allowed range (v = 1/(1 + theta) "
                     "fell outside (0, 1)); the neutral fit is unreliable")
    if rate is None:
        return tuple(flags)
    if np.any(design.depths < 2):
        flags.append(f"{int(np.sum(design.depths < 2))} sample(s) with a single read left out "
                     "of the rate estimate")
    if _lag_groups(design)[3].size < 2:
        flags.append("series too short to estimate the rate (fewer than two distinct lags); "
                     "samples treated as independent")
        return tuple(flags)
    low, high = rate_bounds(design, conditioned)
    if np.isclose(rate, low, rtol=1e-9):
        flags.append(f"rate at the lower bound of its search range ({low:.3g} per day): "
                     "the variogram does not level off within the series")
    elif np.isclose(rate, high, rtol=1e-9):
        flags.append(f"rate at the upper bound of its search range ({high:.3g} per day): "
                     "no correlation between successive samples is detectable")
    span = float(design.times[-1] - design.times[0])
    if rate * span < WEAK_RATE_SPAN:
        flags.append(f"rate weakly identified: rate x span = {rate * span:.2g} "
                     f"< {WEAK_RATE_SPAN:g}; "
                     "theta and rate are uncertain")
    return tuple(flags)
