"""Pooling of rare taxa for the marginal statistics.

A taxon with theta p_i << 1 is absent from most samples and its neutral marginal
Beta(theta p_i, theta (1 - p_i)) is J-shaped; its fitted p_i is then very noisy, and a
statistic built taxon by taxon inherits that noise in a way the parametric bootstrap
reproduces only roughly (the design note, section 7: test rare taxa through aggregates).
Under neutrality any group G of taxa is itself neutral with composition P_G = sum_{i in G}
p_i (the grouping property of the Dirichlet law and of the diffusion, design note
section 6). So taxa are merged, in order of increasing p, into groups whose shape
theta P_G reaches ``min_shape``; taxa with theta p_i >= ``min_shape`` stay on their own
unless they complete a group of rarer taxa.

Groups are contiguous in the order of increasing p, so their counts are differences of
cumulative sums: the cost is O(R T K), and the result keeps the shape ``(R, T, K)`` with
each group stored at the position of its last member and zeros elsewhere (p = 0 marks an
unused position, which the statistics treat as an absent taxon).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class PooledTaxa:
    """Counts and composition with rare taxa merged; ``members`` counts taxa per position."""

    counts: np.ndarray      # (R, T, K), group counts at group-end positions, 0 elsewhere
    p: np.ndarray           # (R, K), group composition at group-end positions, 0 elsewhere
    members: np.ndarray     # (R, K), taxa in the group at each group-end position, 0 elsewhere
    order: np.ndarray       # (R, K), taxa sorted by increasing p (position -> taxon index)


def group_ids(shapes_sorted: np.ndarray, min_shape: float) -> np.ndarray:
    """Group index of every taxon, taxa sorted by increasing shape theta p, ``(R, K)``.

    Greedy, in order: a group closes as soon as its total shape reaches ``min_shape``, so
    taxa with shape >= min_shape that follow a closed group stay alone. A last group that
    falls short (only when every remaining taxon is rare) joins the group before it. The
    loop runs over taxon positions, vectorised over replicates.
    """
    n_rows, n_taxa = shapes_sorted.shape
    ids = np.empty((n_rows, n_taxa), dtype=np.int64)
    current = np.zeros(n_rows)
    group = np.zeros(n_rows, dtype=np.int64)
    for position in range(n_taxa):
        ids[:, position] = group
        current += shapes_sorted[:, position]
        closed = current >= min_shape
        group += closed
        current[closed] = 0.0
    short = (current > 0) & (group > 0)
    last = group[:, None]
    return np.where(short[:, None] & (ids == last), last - 1, ids)


def group_sums(values_sorted: np.ndarray, is_end: np.ndarray) -> np.ndarray:
    """Sum of each contiguous group along the last axis, stored at the group's end."""
    running = np.cumsum(values_sorted, axis=-1)
    at_ends = np.where(is_end, running, 0.0)
    previous = np.maximum.accumulate(
        np.concatenate([np.zeros_like(at_ends[..., :1]), at_ends[..., :-1]], axis=-1), axis=-1)
    return np.where(is_end, running - previous, 0.0)


def pool_rare_taxa(counts: np.ndarray, p: np.ndarray, theta: np.ndarray,
                   min_shape: float = 1.0) -> PooledTaxa:
    """Merge taxa with theta p_i < ``min_shape`` into groups of total shape >= min_shape.

    Parameters
    ----------
    counts:
        Shape ``(R, T, K)``.
    p:
        Composition used for the shapes, ``(R, K)``.
    theta:
        ``(R,)``.
    """
    order = np.argsort(p, axis=1, kind="stable")
    p_sorted = np.take_along_axis(p, order, axis=1)
    ids = group_ids(theta[:, None] * p_sorted, min_shape)
    is_end = np.ones_like(ids, dtype=bool)
    is_end[:, :-1] = ids[:, 1:] != ids[:, :-1]
    counts_sorted = np.take_along_axis(np.asarray(counts, dtype=np.float64),
                                       order[:, None, :], axis=2)
    pooled_counts = group_sums(counts_sorted, is_end[:, None, :])
    pooled_p = group_sums(p_sorted, is_end)
    members = group_sums(np.ones_like(p_sorted), is_end)
    return PooledTaxa(np.rint(pooled_counts).astype(np.int64), pooled_p,
                      np.rint(members).astype(np.int64), order)
