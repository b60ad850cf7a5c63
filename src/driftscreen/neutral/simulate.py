"""Exact simulation of neutral communities with a dataset's own design.

The latent relative abundances follow the Wright-Fisher diffusion with immigration
(stationary law Dirichlet(theta p)); every sample is a multinomial draw of its
sequencing depth. Transitions over an interval of diffusion time ``tau`` are drawn
exactly through lines of descent (Griffiths 1980; Jenkins & Spano 2017):

    X(tau) | x  ~  Dirichlet(theta p + L),   L | A ~ Multinomial(A, x),   A = A_inf(tau),

with one ``A`` per replicate per interval, shared by all taxa, so the cost does not
depend on any community size. Calendar intervals become diffusion time through
``kappa = 2 rate / theta`` per day. With technical noise (``model.noise`` g > 0) every
sample is Dirichlet-multinomial around the community, Multinomial(n, Dirichlet(C X)),
C = 1/g - 1 (Mosimann 1962, Biometrika 49:65), drawn independently for every sample.

:func:`simulate_conditioned` conditions a time series on its observed first sample:
the community at the first time is drawn from its posterior given those reads and the
later samples follow from it; the first sample itself is the observed one.
:func:`simulate_with_replicates` also reads technical replicates: further reads of the
latent community of a sample, drawn right after that sample's own reads from the same
block stream (without technical replicates, the draws are those of :func:`simulate`).

Reproducibility: replicates are simulated in blocks of :func:`replicates_per_block`
replicates (a fixed function of the number of taxa and samples). Block ``b`` draws from
its own stream, child ``b`` of a :class:`numpy.random.SeedSequence` whose entropy is
drawn once from ``rng``; chunks are cut from the blocks afterwards. The output therefore
depends on ``(model, design, n_replicates, rng)`` only, never on ``chunk_size``; and a
full block is the same whatever the number of replicates after it.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Literal

import numpy as np

from driftscreen.dataset import Design, TechnicalReplicates
from driftscreen.neutral.dirichlet import dirichlet_rows, dirichlet_rows_unchecked
from driftscreen.neutral.lines_of_descent import LinesOfDescentSampler
from driftscreen.neutral.model import NeutralModel

RandomSource = np.random.Generator | np.random.SeedSequence | int | None
Start = Literal["stationary"] | np.ndarray

BLOCK_ELEMENTS = 1 << 15
"""Replicate x taxon entries per block: large enough that numpy's per-call overhead
is negligible, small enough to keep a block's state in cache."""
BLOCK_BYTES = 64 * 2**20
"""Upper bound on the counts of one block."""
MEMORY_BUDGET = 256 * 2**20
"""Default bound on the live counts of :func:`iter_simulate`: the chunk the caller holds,
the chunk being filled and one block."""
MIN_START_CONCENTRATION = 1.0
"""Least concentration of the prior of a conditioned start: Dirichlet(p), nearly no weight
against the first sample's reads."""
START_SPREAD_Z = 2.0
"""A first sample is treated as disturbed when its spread about p exceeds the stationary
mean by this many standard deviations (4-7% of stationary starts, in checks with 15-150
taxa, theta 10-1000 and depths 2,000-20,000)."""


def replicates_per_block(n_taxa: int, n_samples: int) -> int:
    """Number of replicates that share one random stream (see the module docstring)."""
    by_elements = -(-BLOCK_ELEMENTS // n_taxa)
    by_bytes = BLOCK_BYTES // (8 * n_taxa * n_samples)
    return int(max(1, min(by_elements, by_bytes)))


def default_chunk_size(n_taxa: int, n_samples: int,
                       memory_budget: int = MEMORY_BUDGET) -> int:
    """Replicates per chunk so that two chunks and one block of counts fit the budget.

    A whole number of blocks when at least one block fits, so blocks are written in place.
    """
    per_replicate = 8 * n_taxa * n_samples
    block = replicates_per_block(n_taxa, n_samples)
    fitting = (memory_budget // per_replicate - block) // 2
    return int(fitting // block * block if fitting >= block else max(1, fitting))


def diffusion_intervals(model: NeutralModel, times: np.ndarray) -> np.ndarray:
    """Diffusion time of every sampling interval, ``kappa * diff(times)``."""
    return model.kappa * np.diff(np.asarray(times, dtype=np.float64))


def transition(x: np.ndarray, model: NeutralModel | tuple[float, np.ndarray],
               tau: float | np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """One exact transition ``X(tau) | X(0) = x`` for every row of ``x``.

    Parameters
    ----------
    x:
        Compositions, shape ``(R, K)`` (rows are renormalised).
    model:
        A :class:`NeutralModel` or a pair ``(theta, p)`` (p is renormalised).
    tau:
        Diffusion time, scalar or one value per row ``(R,)``.
    rng:
        Source of randomness.

    Returns
    -------
    np.ndarray
        Shape ``(R, K)``, rows on the simplex.
    """
    theta, p = (model.theta, model.p) if isinstance(model, NeutralModel) else model
    p = _normalised_rows(np.atleast_2d(np.asarray(p, dtype=np.float64)))[0]
    x = _normalised_rows(np.atleast_2d(np.asarray(x, dtype=np.float64)))
    taus = np.broadcast_to(np.asarray(tau, dtype=np.float64), (x.shape[0],))
    distinct, which = np.unique(taus, return_inverse=True)
    sampler = LinesOfDescentSampler(theta, distinct)
    lines = np.empty(x.shape[0], dtype=np.int64)
    for index in range(distinct.size):
        rows = which == index
        lines[rows] = sampler.draw(index, int(rows.sum()), rng)
    return _step(x, theta * np.asarray(p, dtype=np.float64), lines, rng)


def _step(x: np.ndarray, theta_p: np.ndarray, lines: np.ndarray,
          rng: np.random.Generator) -> np.ndarray:
    """Dirichlet(theta p + L) with L | A ~ Multinomial(A, x), row by row (vectorised).

    The shapes are valid by construction (theta p >= 0 sums to theta > 0, L >= 0) and
    their row sums are theta + A, so the validating pass of :func:`dirichlet_rows` is
    skipped.
    """
    surviving = rng.multinomial(lines, x)
    alpha = theta_p + surviving
    return dirichlet_rows_unchecked(alpha, theta_p.sum() + lines, rng)


def _normalised_rows(x: np.ndarray) -> np.ndarray:
    """Rows divided by their float64 sums (numpy's multinomial rejects sums > 1 + 1e-12)."""
    if np.any(x < 0) or not np.all(np.isfinite(x)):
        raise ValueError("compositions must be finite and non-negative")
    sums = x.sum(axis=1, keepdims=True)
    if np.any(sums <= 0):
        raise ValueError("every composition needs a positive entry")
    return x / sums


def _latent_path(theta_p: np.ndarray, start: np.ndarray | None, n_rows: int,
                 sampler: LinesOfDescentSampler, n_times: int,
                 rng: np.random.Generator) -> Iterator[np.ndarray]:
    """Yield X at each sampling time, shape ``(n_rows, K)``; stationary start if None."""
    alpha = np.broadcast_to(theta_p, (n_rows, theta_p.size))
    x = dirichlet_rows(alpha, rng) if start is None else start
    yield x
    for interval in range(n_times - 1):
        x = _step(x, theta_p, sampler.draw(interval, n_rows, rng), rng)
        yield x


def sequence(depth: int | np.ndarray, x: np.ndarray, precision: float,
             rng: np.random.Generator) -> np.ndarray:
    """Reads of compositions ``x`` ``(R, K)``: multinomial, or Dirichlet-multinomial.

    ``precision`` C = inf gives Multinomial(depth, x); a finite C gives
    Multinomial(depth, Dirichlet(C x)) (Mosimann 1962), whose variance is that of the
    multinomial times (depth + C)/(1 + C).
    """
    if np.isfinite(precision):
        x = dirichlet_rows(precision * x, rng)
    return rng.multinomial(depth, x)


def _simulate_block(model: NeutralModel, design: Design, sampler: LinesOfDescentSampler | None,
                    start: np.ndarray | None, rng: np.random.Generator,
                    out: np.ndarray, technical: TechnicalReplicates | None = None
                    ) -> np.ndarray:
    """Counts of one block of replicates written into ``out`` (shape ``(n_rows, T, K)``,
    or ``(n_rows, T + E, K)`` with the E ``technical`` replicates after the samples).

    Taxa are processed in decreasing order of p: numpy's multinomial draws one
    conditional binomial per category and stops once all trials are placed, so putting
    the rare taxa last skips many of them (measured: ~15% less time per multinomial).
    A technical replicate is read from the same community as its sample, right after it.
    """
    n_rows = out.shape[0]
    order = np.argsort(-model.p, kind="stable")
    original = np.argsort(order)
    theta_p = model.theta * model.p[order]
    if sampler is None:
        alpha = np.broadcast_to(theta_p, (n_rows, model.n_taxa))
        path: Iterator[np.ndarray] = (dirichlet_rows(alpha, rng) for _ in design.depths)
    else:
        start = None if start is None else start[:, order]
        path = _latent_path(theta_p, start, n_rows, sampler, design.n_samples, rng)
    for t, x in enumerate(path):
        out[:, t] = sequence(design.depths[t], x, model.precision, rng)[:, original]
        if technical is not None:
            for e in np.flatnonzero(technical.of == t):
                out[:, design.n_samples + e] = sequence(technical.depths[e], x,
                                                        model.precision, rng)[:, original]
    return out


def _start_rows(start: Start, model: NeutralModel, design: Design,
                n_replicates: int) -> np.ndarray | None:
    """Validated start compositions, shape ``(R, K)`` or ``(1, K)``; None if stationary."""
    if isinstance(start, str):
        if start != "stationary":
            raise ValueError(f"start must be 'stationary' or an array, got {start!r}")
        return None
    if not design.is_time_series:
        raise ValueError("a snapshot design draws every sample from the stationary law; "
                         "a start composition needs a time series")
    rows = _normalised_rows(np.atleast_2d(np.asarray(start, dtype=np.float64)))
    if rows.shape[1] != model.n_taxa or rows.shape[0] not in (1, n_replicates):
        raise ValueError(f"start must have shape (K,) or (R, K) = ({n_replicates}, "
                         f"{model.n_taxa}), got {np.shape(start)}")
    return rows


def _check_inputs(model: NeutralModel, design: Design, n_replicates: int) -> None:
    if int(n_replicates) != n_replicates or n_replicates < 1:
        raise ValueError(f"n_replicates must be a positive integer, got {n_replicates}")
    if design.is_time_series and model.rate is None:
        raise ValueError("a time-series design needs a model with a rate")


class _Blocks:
    """The blocks of one simulation request: block ``b`` from its own random stream."""

    def __init__(self, model: NeutralModel, design: Design, n_replicates: int,
                 rng: RandomSource, start: Start,
                 technical: TechnicalReplicates | None = None) -> None:
        _check_inputs(model, design, n_replicates)
        self.model, self.design, self.n_replicates = model, design, int(n_replicates)
        self.technical = technical
        self.n_rows_out = design.n_samples + (0 if technical is None else technical.n_pairs)
        self.starts = _start_rows(start, model, design, n_replicates)
        self.sampler = None
        if design.is_time_series:
            self.sampler = LinesOfDescentSampler(model.theta,
                                                 diffusion_intervals(model, design.times))
        self.size = replicates_per_block(model.n_taxa, design.n_samples)
        entropy = np.random.default_rng(rng).integers(0, 2**32, size=4, dtype=np.uint32)
        self.streams = np.random.SeedSequence(entropy.tolist()).spawn(
            -(-self.n_replicates // self.size))

    def rows(self, index: int) -> tuple[int, int]:
        """First and one-past-last replicate of block ``index``."""
        return index * self.size, min((index + 1) * self.size, self.n_replicates)

    def simulate(self, index: int, out: np.ndarray | None = None) -> np.ndarray:
        """Counts of block ``index``, into ``out`` if given."""
        first, last = self.rows(index)
        if out is None:
            out = np.empty((last - first, self.n_rows_out, self.model.n_taxa),
                           dtype=np.int64)
        start = None
        if self.starts is not None:
            rows = self.starts[first:last] if self.starts.shape[0] > 1 else self.starts
            start = np.broadcast_to(rows, (last - first, self.model.n_taxa))
        return _simulate_block(self.model, self.design, self.sampler, start,
                               np.random.default_rng(self.streams[index]), out, self.technical)


def iter_simulate(model: NeutralModel, design: Design, n_replicates: int,
                  rng: RandomSource = None, *, chunk_size: int | None = None,
                  start: Start = "stationary") -> Iterator[np.ndarray]:
    """Neutral replicate datasets in chunks of shape ``(R_chunk, T, K)``, int64 counts.

    Concatenating the chunks gives exactly :func:`simulate` with the same ``rng``
    state, whatever ``chunk_size`` (see the module docstring). Live memory is the chunk
    the caller holds, the chunk being filled and at most one block of counts: by default
    at most ``MEMORY_BUDGET`` (256 MiB).

    Parameters
    ----------
    model:
        Neutral model; needs ``rate`` for a time-series design.
    design:
        Depths (and times, for a time series) shared by every replicate.
    n_replicates:
        Number of replicate datasets R.
    rng:
        Generator, SeedSequence, seed or None; 128 bits of entropy are drawn from it once.
    chunk_size:
        Replicates per chunk (the last chunk may be smaller); default from the budget, a
        whole number of blocks so that blocks are written in place.
    start:
        ``"stationary"`` (Dirichlet(theta p) at the first time) or compositions at the
        first sampling time, shape ``(K,)`` or ``(R, K)`` (time series only).
    """
    size = default_chunk_size(model.n_taxa, design.n_samples) if chunk_size is None else chunk_size
    if int(size) != size or size < 1:
        raise ValueError(f"chunk_size must be a positive integer, got {chunk_size}")
    blocks = _Blocks(model, design, n_replicates, rng, start)
    return _chunks(blocks, int(size))


def _chunks(blocks: _Blocks, size: int) -> Iterator[np.ndarray]:
    """Chunks of ``size`` replicates; whole blocks are simulated in place, a block that
    straddles two chunks is simulated once and kept until both have their part."""
    straddling: tuple[int, np.ndarray] | None = None
    tail_shape = (blocks.n_rows_out, blocks.model.n_taxa)
    for first in range(0, blocks.n_replicates, size):
        last = min(first + size, blocks.n_replicates)
        chunk = np.empty((last - first, *tail_shape), dtype=np.int64)
        for index in range(first // blocks.size, (last - 1) // blocks.size + 1):
            block_first, block_last = blocks.rows(index)
            if first <= block_first and block_last <= last:
                blocks.simulate(index, chunk[block_first - first:block_last - first])
                continue
            if straddling is None or straddling[0] != index:
                straddling = (index, blocks.simulate(index))
            low, high = max(first, block_first), min(last, block_last)
            chunk[low - first:high - first] = straddling[1][low - block_first:high - block_first]
        yield chunk
        del chunk


def simulate(model: NeutralModel, design: Design, n_replicates: int,
             rng: RandomSource = None, *, start: Start = "stationary") -> np.ndarray:
    """Counts of ``n_replicates`` neutral datasets with the design's times and depths.

    Snapshot designs: every sample is an independent stationary community,
    Dirichlet(theta p), sequenced as Multinomial(depth, X). Time series: stationary (or
    given) start, then exact lines-of-descent transitions over the diffusion intervals
    ``kappa * diff(times)`` (Griffiths 1980), each sample sequenced at its depth.
    Arguments as for :func:`iter_simulate`; the blocks are written straight into the
    result.

    Returns
    -------
    np.ndarray
        Shape ``(R, T, K)``, int64; ``counts[r, t].sum() == design.depths[t]``.
        Identical to the concatenated chunks of :func:`iter_simulate`.
    """
    blocks = _Blocks(model, design, n_replicates, rng, start)
    return next(_chunks(blocks, blocks.n_replicates))


def start_concentration(model: NeutralModel, first_counts: np.ndarray) -> float:
    """Concentration kappa of the prior Dirichlet(kappa p) of the community at the first sample.

    A stationary start is Dirichlet(theta p); a disturbed one lies farther from p. With
    Y_0 the first read fraction, n_eff its effective depth, pi_i = p_i (1 - p_i) and
    rho = 1/(kappa + 1), the spread D = sum_i (Y_0i - p_i)^2 / sum_i pi_i has
    E[D] = rho + (1 - rho)/n_eff under Dirichlet(kappa p) (Mosimann 1962, Biometrika 49:65,
    Dirichlet-multinomial moments), and, the terms being near-Gaussian squares,
    Var(D) ~ 2 E[D]^2 sum_i pi_i^2 / (sum_i pi_i)^2. kappa is theta (the stationary law)
    unless D exceeds its stationary mean by more than :data:`START_SPREAD_Z` standard
    deviations; then it is the method-of-moments solution, at least
    :data:`MIN_START_CONCENTRATION`. The squares are not divided by p_i, so rare taxa's
    skewed deviations do not dominate.
    """
    counts = np.asarray(first_counts, dtype=np.float64)
    depth = counts.sum()
    effective = 1.0 / (model.noise + (1.0 - model.noise) / depth)
    pi = model.p * (1.0 - model.p)
    if pi.sum() <= 0 or effective <= 1.0:
        return float(model.theta)
    spread = float(np.sum((counts / depth - model.p) ** 2) / pi.sum())
    stationary_rho = 1.0 / (model.theta + 1.0)
    expected = stationary_rho + (1.0 - stationary_rho) / effective
    spread_sd = expected * np.sqrt(2.0 * np.sum(pi * pi)) / pi.sum()
    if spread <= expected + START_SPREAD_Z * spread_sd:
        return float(model.theta)
    rho = (spread - 1.0 / effective) / (1.0 - 1.0 / effective)
    return float(np.clip(1.0 / rho - 1.0, MIN_START_CONCENTRATION, model.theta))


def first_sample_posterior(model: NeutralModel, first_counts: np.ndarray, n_replicates: int,
                           rng: np.random.Generator) -> np.ndarray:
    """Draws of the community at the first sample given its reads, ``(R, K)``.

    Under the prior Dirichlet(kappa p) and multinomial reads N_0 the posterior is
    Dirichlet(kappa p + N_0) (Dirichlet-multinomial conjugacy), kappa from
    :func:`start_concentration` (theta, the stationary law, unless the start lies
    farther from p than stationarity allows, as after a disturbance). With technical noise
    the reads carry the information of a multinomial sample of the effective depth
    n_eff = 1 / (g + (1 - g)/n), so N_0 is scaled by n_eff / n (a moment-matched
    approximation of the non-conjugate posterior).
    """
    counts = np.asarray(first_counts, dtype=np.float64)
    depth = counts.sum()
    effective = 1.0 / (model.noise + (1.0 - model.noise) / depth)
    alpha = start_concentration(model, counts) * model.p + counts * (effective / depth)
    return dirichlet_rows(np.broadcast_to(alpha, (n_replicates, alpha.size)), rng)


def simulate_conditioned(model: NeutralModel, design: Design, n_replicates: int,
                         first_counts: np.ndarray, rng: RandomSource = None) -> np.ndarray:
    """Neutral replicates of a time series conditioned on its observed first sample.

    The community at the first time is drawn from :func:`first_sample_posterior`, the
    process runs forward exactly as in :func:`simulate`, and the first sample of every
    replicate is ``first_counts`` itself. A neutral community that is still relaxing from
    a disturbance at the first sample (after an antibiotic course, a diet change, a
    colonisation) is thereby reproduced, and every taxon relaxes towards ``p`` at the one
    shared rate: E[X(t)] = p + (x_0 - p) exp(-rate (t - t_0)).

    Returns
    -------
    np.ndarray
        Shape ``(R, T, K)``, int64; ``counts[:, 0] == first_counts``.
    """
    counts, _ = simulate_with_replicates(model, design, n_replicates, None, rng,
                                         first_counts=first_counts)
    return counts


def simulate_with_replicates(model: NeutralModel, design: Design, n_replicates: int,
                             technical: TechnicalReplicates | None, rng: RandomSource = None,
                             *, first_counts: np.ndarray | None = None
                             ) -> tuple[np.ndarray, np.ndarray]:
    """Neutral replicates and their technical replicates: ``(R, T, K)`` and ``(R, E, K)``.

    As :func:`simulate` (or, given ``first_counts``, :func:`simulate_conditioned`, with
    the same draws), and every technical replicate e of ``technical`` is read at its depth
    from the latent community of the sample ``technical.of[e]`` it replicates, with the
    model's read precision. Without ``technical`` (None) the second array is empty.
    """
    generator = np.random.default_rng(rng)
    start: Start = "stationary"
    if first_counts is not None:
        if not design.is_time_series:
            raise ValueError("conditioning on the first sample needs a time series")
        first_counts = np.asarray(first_counts)
        if first_counts.shape != (model.n_taxa,) or first_counts.sum() != design.depths[0]:
            raise ValueError("first_counts must have shape (K,) and sum to the first depth")
        start = first_sample_posterior(model, first_counts, n_replicates, generator)
    blocks = _Blocks(model, design, n_replicates, generator, start, technical)
    rows = next(_chunks(blocks, blocks.n_replicates))
    counts, extra = rows[:, :design.n_samples], rows[:, design.n_samples:]
    if first_counts is not None:
        counts[:, 0] = first_counts
    if technical is None:
        return rows, extra
    return np.ascontiguousarray(counts), np.ascontiguousarray(extra)


def simulate_abundances(model: NeutralModel, times: np.ndarray, n_replicates: int,
                        rng: RandomSource = None, *,
                        start: Start = "stationary") -> np.ndarray:
    """Latent relative abundances X at ``times`` (days), shape ``(R, T, K)`` float64.

    The process of :func:`simulate` before sequencing, all replicates in one
    vectorised batch drawn directly from ``rng`` (so not the same draws as
    :func:`simulate`).
    """
    times = np.asarray(times, dtype=np.float64)
    design = Design(depths=np.ones(times.size, dtype=np.int64), times=times)
    _check_inputs(model, design, n_replicates)
    starts = _start_rows(start, model, design, n_replicates)
    if starts is not None:
        starts = np.broadcast_to(starts, (n_replicates, model.n_taxa))
    generator = np.random.default_rng(rng)
    sampler = LinesOfDescentSampler(model.theta, diffusion_intervals(model, times))
    path = _latent_path(model.theta * model.p, starts, n_replicates, sampler, times.size,
                        generator)
    return np.stack(list(path), axis=1)
