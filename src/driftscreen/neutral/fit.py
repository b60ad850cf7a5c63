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
#: Below this rate * span the plateau of the variogram is barely reached (design note, section 5).
WEAK_RATE_SPAN = 5.0
#: Spacing of the log-rate grid (natural-log units); crossings are interpolated within it.
LOG_RATE_STEP = 0.05
#: Working memory per sub-batch of replicates, in bytes.
SUB_BATCH_BYTES = 96 * 2**20
#: Grid of the technical noise g = 1/(1 + C) searched when it is estimated: 0 and
#: log-spaced values from C = 10^6 down to C = 1.
NOISE_GRID = np.concatenate([[0.0], 1.0 / (1.0 + np.geomspace(1e6, 1.0, 49))])
#: Technical noise is estimated only when successive samples are correlated at least this
#: much under the multinomial fit (mean of exp(-rate dt)): otherwise the increments at
#: lags one and two are both at the plateau, and drift and noise cannot be told apart.
NOISE_MIN_CORRELATION = 0.2
#: The relaxation estimate of p divides by 1 - e, e the read-weighted mean of
#: exp(-rate (t - t_0)); e is capped here (the noise of p grows as 1 / (1 - e)).
MAX_START_WEIGHT = 0.75


@dataclass(frozen=True)
class _SeriesDesign:
    """Design-only quantities of the time-series moment equations.

    Usable samples have depth >= 2 (the sampling correction divides by n - 1); the
    adjacent pairs are successive usable samples.
    """

    adjacent: tuple[np.ndarray, np.ndarray]  # sample indices (s, t) of successive usable samples
    second: tuple[np.ndarray, np.ndarray]    # usable samples two apart
    adjacent_gaps: np.ndarray  # days between successive usable samples
    log_grid: np.ndarray      # (G,) grid of log rate over rate_bounds(design)
    r_w: np.ndarray           # (G,) R_w at each grid rate
    adjacent_shape: np.ndarray  # (G,) sum over adjacent pairs of 1 - exp(-rate dt)
    second_shape: np.ndarray  # (G,) the same over pairs two apart
    s1: float                 # sum_t w_t / n_t
    s2: float                 # sum_t w_t^2 / n_t
    w2: float                 # sum_t w_t^2

    @property
    def identifiable(self) -> bool:
        """The rate needs at least three usable samples (two adjacent pairs)."""
        return self.adjacent[0].size >= 2

    @property
    def noise_identifiable(self) -> bool:
        """Separating noise from drift needs pairs two apart as well (four usable samples)."""
        return self.second[0].size >= 2

    def sampling_sums(self, noise: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """S1 = sum_t w_t s_t and S2 = sum_t w_t^2 s_t, s_t = g + (1 - g)/n_t, per g."""
        return noise + (1.0 - noise) * self.s1, noise * self.w2 + (1.0 - noise) * self.s2

def rate_bounds(design: Design) -> tuple[float, float]:
    """Search range of the rate (per day) for a time-series design.

    ``[RATE_MIN_SPAN / span, RATE_MAX_LAG / shortest lag]`` over the samples usable in the
    variogram (depth >= 2; all samples if fewer than two are usable): outside it the
    variogram is either linear over the whole span or flat at every lag, and the rate is
    not identified.
    """
    if design.times is None or design.n_samples < 2:
        raise ValueError("rate bounds need a time-series design with at least two samples")
    times = design.times[design.depths >= 2]
    if times.size < 2:
        times = design.times
    return RATE_MIN_SPAN / float(times[-1] - times[0]), RATE_MAX_LAG / float(np.diff(times).min())


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
              options: NullOptions = NullOptions()) -> NullFit:
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
    series = _series_design(design) if design.is_time_series else None
    p = pooled_fractions(counts, design)
    n_rep = counts.shape[0]
    v, noise = np.empty(n_rep), np.full(n_rep, options.fixed_noise or 0.0)
    rate = np.empty(n_rep) if series is not None else None
    step = _sub_batch_size(counts.shape)
    for start in range(0, n_rep, step):
        part = slice(start, start + step)
        if series is None:
            v[part] = _snapshot_v(counts[part], p[part], design, noise[part])
        else:
            v[part], rate[part], noise[part] = _series_fit(counts[part], p[part], design,
                                                           series, options.fixed_noise)
    clipped = ~((v >= V_MIN) & (v <= V_MAX))
    v = np.clip(np.nan_to_num(v, nan=V_MIN), V_MIN, V_MAX)
    if series is not None and options.conditioned:
        p = relaxation_composition(counts, p, design, rate)
    return NullFit(p=p, theta=1.0 / v - 1.0, rate=rate, clipped=clipped, noise=noise)


def relaxation_composition(counts: np.ndarray, pooled: np.ndarray, design: Design,
                           rate: np.ndarray) -> np.ndarray:
    """p as the point every taxon relaxes to from the first sample, shape ``(R, K)``.

    Given the first sample, the neutral mean relaxes as
    E[X_i(t)] = p_i + (x_i(t_0) - p_i) exp(-rate (t - t_0)) (design note, section 2), so
    the pooled read fraction has expectation p (1 - e) + Y_0 e with
    e = sum_t w_t exp(-rate (t - t_0)), and p = (pooled - e Y_0) / (1 - e). A community
    still recovering from a disturbance at t_0 then gets the composition it recovers
    towards, not its time mean. e is capped at :data:`MAX_START_WEIGHT`; negative entries
    (taxa declining faster than the fit allows) are set to 0 and rows renormalised.
    """
    weights = _weights(design)
    lags = design.times - design.times[0]
    start_weight = np.minimum(np.exp(-rate[:, None] * lags) @ weights, MAX_START_WEIGHT)
    first = counts[:, 0, :] / float(design.depths[0])
    relaxed = np.maximum(pooled - start_weight[:, None] * first, 0.0)
    relaxed /= (1.0 - start_weight)[:, None]
    totals = relaxed.sum(axis=1, keepdims=True)
    return np.where(totals > 0, relaxed / np.where(totals > 0, totals, 1.0), pooled)


def fit(counts: np.ndarray, design: Design, options: NullOptions = NullOptions()
        ) -> NeutralModel:
    """Fit one table ``(T, K)``: :func:`fit_batch` on a batch of one, as a flagged model."""
    counts = np.asarray(counts)
    if counts.ndim != 2:
        raise ValueError("counts must have shape (T, K)")
    return fitted_model(fit_batch(counts[None], design, options), design, options)


def fitted_model(result: NullFit, design: Design, options: NullOptions = NullOptions(),
                 index: int = 0) -> NeutralModel:
    """Table ``index`` of a batch fit as a :class:`NeutralModel` with plain-text flags.

    The one path from a fit to a model. Flags: theta clipped; rate at a bound of its
    search range; rate weakly identified (rate * span < 5, design note section 5); series
    too short for a rate; samples with a single read left out of the variogram; technical
    noise not separable from drift (snapshots, or successive samples nearly independent).
    """
    rate = None if result.rate is None else float(result.rate[index])
    flags = _fit_flags(design, rate, bool(result.clipped[index]))
    flags += _noise_flags(design, rate, options)
    return NeutralModel(result.p[index], float(result.theta[index]), rate,
                        float(result.noise[index]), flags)


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
                fixed_noise: float | None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """v-hat, rate-hat and noise-hat from the pooled spread and increments at lags 1 and 2.

    Pooled over taxa, with H = sum_i p_i (1 - p_i), the weighted spread
    Q = sum_i sum_t w_t (Y_it - p_i)^2 and the sampling-corrected squared increments D_1
    between successive samples and D_2 between samples two apart have (design note,
    section 5, with sampling variance factors s_t = g + (1 - g)/n_t)

        E[Q] / E[H] = [v (1 - R_w) + (1 - v)(S1 - S2)] / [1 - v R_w - (1 - v) S2]
        E[D_l] / E[H] = 2 [v S_l(rate) + g (1 - v) m_l] / [1 - v R_w - (1 - v) S2],

    S1 = sum_t w_t s_t, S2 = sum_t w_t^2 s_t, S_l = sum over the m_l pairs of
    1 - exp(-rate dt). The correction Y(1 - Y)/(n - 1) removes multinomial noise exactly,
    and Dirichlet-multinomial reads leave g X (1 - X) per sample: the nugget
    2 g (1 - v) Pi, the same at every lag. For each rate on a grid the first equation
    gives v; the rate is where the D_1 equation holds; g is where the D_2 equation holds
    as well. Successive samples carry most of the information on the rate and the variance
    about the mean (corrected through R_w) carries the plateau. Least squares on the
    variogram over all pairs (the note's suggestion) is less efficient because its many
    long-lag pairs are noisy and strongly correlated: in simulations with theta = 50,
    rate = 0.05 per day and 60 daily samples, the spread (sd) of log rate-hat is 0.45 here
    against 1.0 for the variogram fit. Sums are pooled over taxa: weighting taxa unequally
    makes the ratio of noisy sums strongly biased when p-hat is noisy.
    """
    depths = design.depths.astype(np.float64)
    proportions = counts / depths[:, None]
    hetero = (p * (1.0 - p)).sum(axis=1)
    spread = np.einsum("t,rtk->r", _weights(design), (proportions - p[:, None, :]) ** 2)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio_q = spread / hetero
        ratio_1 = _pair_increments(proportions, depths, series.adjacent) / hetero
        ratio_2 = _pair_increments(proportions, depths, series.second) / hetero
    noise = np.full(ratio_q.size, fixed_noise or 0.0)
    if not series.identifiable:
        upper = np.exp(series.log_grid[-1])
        return (_v_from_ratio(ratio_q, series.r_w[-1], series, noise), np.full(noise.size, upper),
                noise)
    rate = np.exp(_crossing(_increment_gap(ratio_q, ratio_1, series, noise), series.log_grid))
    if fixed_noise is None and series.noise_identifiable:
        rows = successive_correlation(rate, series.adjacent_gaps) >= NOISE_MIN_CORRELATION
        if rows.any():
            noise[rows] = _noise_estimate(ratio_q[rows], ratio_1[rows], ratio_2[rows], series)
            rate[rows] = np.exp(_crossing(_increment_gap(ratio_q[rows], ratio_1[rows], series,
                                                         noise[rows]), series.log_grid))
    return _v_from_ratio(ratio_q, correlation_weight(rate, design), series, noise), rate, noise


def successive_correlation(rate: np.ndarray, gaps: np.ndarray) -> np.ndarray:
    """Mean over successive samples of exp(-rate dt), the drift correlation, per rate."""
    return np.exp(-np.asarray(rate)[..., None] * gaps).mean(axis=-1)


def _pair_increments(proportions: np.ndarray, depths: np.ndarray,
                     pairs: tuple[np.ndarray, np.ndarray]) -> np.ndarray:
    """Sum over the pairs and taxa of sampling-corrected squared increments, ``(R,)``."""
    first, second = pairs
    with np.errstate(divide="ignore", invalid="ignore"):
        noise = proportions * (1.0 - proportions) / (depths[:, None] - 1.0)
    squared = (proportions[:, second] - proportions[:, first]) ** 2
    return np.sum(squared - noise[:, first] - noise[:, second], axis=(1, 2))


def _v_from_ratio(ratio_q: np.ndarray, r_w: np.ndarray | float, series: _SeriesDesign,
                  noise: np.ndarray) -> np.ndarray:
    """v solving E[Q]/E[H] = ratio_q for a given R_w and noise g (the note's ratio form)."""
    s1, s2 = series.sampling_sums(noise)
    with np.errstate(divide="ignore", invalid="ignore"):
        return ((ratio_q * (1.0 - s2) - (s1 - s2))
                / (1.0 - r_w + ratio_q * r_w - ratio_q * s2 - (s1 - s2)))


def _predicted_increments(v: np.ndarray, shape: np.ndarray, n_pairs: int, r_w: np.ndarray,
                          series: _SeriesDesign, noise: np.ndarray) -> np.ndarray:
    """E[D_l] / E[H] = 2 [v S_l + g (1 - v) m_l] / [1 - v R_w - (1 - v) S2]."""
    _, s2 = series.sampling_sums(noise)
    return 2.0 * (v * shape + noise * (1.0 - v) * n_pairs) / (1.0 - v * r_w - (1.0 - v) * s2)


def _increment_gap(ratio_q: np.ndarray, ratio_d: np.ndarray, series: _SeriesDesign,
                   noise: np.ndarray) -> np.ndarray:
    """Predicted minus observed lag-1 increment ratio at every grid rate, (R, G)."""
    g = noise[:, None]
    v = np.clip(_v_from_ratio(ratio_q[:, None], series.r_w[None, :], series, g), V_MIN, V_MAX)
    predicted = _predicted_increments(v, series.adjacent_shape, series.adjacent[0].size,
                                      series.r_w, series, g)
    return predicted - ratio_d[:, None]


def _noise_estimate(ratio_q: np.ndarray, ratio_1: np.ndarray, ratio_2: np.ndarray,
                    series: _SeriesDesign) -> np.ndarray:
    """g where the lag-2 equation holds once v and the rate solve the others, ``(R,)``.

    For every g on :data:`NOISE_GRID` the rate solving the lag-1 equation is found; more
    noise leaves less of the lag-1 increment to drift, so the predicted lag-2 increment
    falls with g, until v reaches its lower bound (the noise alone would explain the
    spread) and the prediction rises again. g-hat is where the prediction first meets the
    observed lag-2 increment (0 when even g = 0 predicts too little), or where it comes
    closest when it never meets it. Values of g that push the rate to the lower end of its
    range (a drift so slow it is a straight trend, with the noise explaining everything
    else) are not solutions.
    """
    gap = np.empty((ratio_q.size, NOISE_GRID.size))
    for j, g in enumerate(NOISE_GRID):
        noise = np.full(ratio_q.size, g)
        log_rate = _crossing(_increment_gap(ratio_q, ratio_1, series, noise), series.log_grid)
        interior = log_rate > series.log_grid[0]
        r_w = np.interp(log_rate, series.log_grid, series.r_w)
        shape = np.interp(log_rate, series.log_grid, series.second_shape)
        v = np.clip(_v_from_ratio(ratio_q, r_w, series, noise), V_MIN, V_MAX)
        gap[:, j] = np.where(interior, ratio_2 - _predicted_increments(
            v, shape, series.second[0].size, r_w, series, noise), np.nan)
    gap = np.nan_to_num(gap, nan=-np.inf)
    closest = NOISE_GRID[np.argmax(gap, axis=1)]
    return np.where((gap >= 0).any(axis=1), _crossing(gap, NOISE_GRID), closest)


def _crossing(gap: np.ndarray, log_grid: np.ndarray) -> np.ndarray:
    """Log rate where ``gap`` first turns from negative to non-negative, interpolated.

    A gap that is non-negative at the lowest rate puts the rate on the lower bound (the
    increments are as small as the slowest admissible dynamics predict); one that stays
    negative puts it on the upper bound (successive samples look independent).
    """
    above = np.nan_to_num(gap, nan=-np.inf) >= 0
    index = np.argmax(above, axis=1)
    never = ~above.any(axis=1)
    rows = np.arange(gap.shape[0])
    inner = np.clip(index, 1, log_grid.size - 1)
    low, high = gap[rows, inner - 1], gap[rows, inner]
    with np.errstate(divide="ignore", invalid="ignore"):
        fraction = np.clip(np.nan_to_num(-low / (high - low), nan=1.0), 0.0, 1.0)
    log_rate = log_grid[inner - 1] + fraction * (log_grid[inner] - log_grid[inner - 1])
    log_rate = np.where(index == 0, log_grid[0], log_rate)
    return np.where(never, log_grid[-1], log_rate)


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


def _series_design(design: Design) -> _SeriesDesign:
    """Successive usable samples and the design-only functions of the rate on its grid."""
    usable = np.flatnonzero(design.depths >= 2)
    adjacent, second = (usable[:-1], usable[1:]), (usable[:-2], usable[2:])
    low, high = rate_bounds(design)
    n_grid = int(np.ceil(np.log(high / low) / LOG_RATE_STEP)) + 1
    log_grid = np.linspace(np.log(low), np.log(high), n_grid)
    rates = np.exp(log_grid)[:, None]
    gaps = design.times[adjacent[1]] - design.times[adjacent[0]]
    gaps_2 = design.times[second[1]] - design.times[second[0]]
    w = _weights(design)
    depths = design.depths.astype(np.float64)
    return _SeriesDesign(adjacent, second, gaps, log_grid,
                         correlation_weight(np.exp(log_grid), design),
                         -np.expm1(-rates * gaps).sum(axis=1),
                         -np.expm1(-rates * gaps_2).sum(axis=1),
                         float(np.sum(w / depths)), float(np.sum(w**2 / depths)),
                         float(np.sum(w**2)))


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


def _noise_flags(design: Design, rate: float | None, options: NullOptions) -> tuple[str, ...]:
    """Plain-text notes on what the fit could say about technical noise."""
    if options.noise != "estimate":
        return ()
    if rate is None:
        return ("a snapshot design cannot separate technical noise from drift: reads are "
                "treated as multinomial (give a read precision to include technical noise)",)
    series = _series_design(design)
    correlation = float(successive_correlation(np.array(rate), series.adjacent_gaps))
    if series.noise_identifiable and correlation >= NOISE_MIN_CORRELATION:
        return ()
    return (f"technical noise not identified (successive samples correlate at "
            f"{correlation:.2f} under the fit, below {NOISE_MIN_CORRELATION:g}, or fewer than "
            "four samples): reads are treated as multinomial",)


def _fit_flags(design: Design, rate: float | None, clipped: bool) -> tuple[str, ...]:
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
    low, high = rate_bounds(design)
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
