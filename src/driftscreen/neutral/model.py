"""Parameter records of the neutral null model.

The model (see DEVELOPERS.md, "The neutral null") is the Wright-Fisher diffusion with
immigration on the simplex: local relative abundances X(t) relax towards the
metacommunity composition ``p`` with immigration parameter ``theta`` (Etienne's
fundamental dispersal number I; theta = 2Nm for a haploid Wright-Fisher population),
and every sample is a multinomial draw of its sequencing depth from X at its time.
Its stationary law is Dirichlet(theta p). In calendar time, correlations decay as
exp(-rate * lag): ``rate`` (lambda, per day) is the per-capita rate at which residents
are replaced by immigrants, and the diffusion clock runs at ``kappa = 2 rate / theta``
per day.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


@dataclass(frozen=True)
class NeutralModel:
    """One fitted (or chosen) neutral community.

    Attributes
    ----------
    p:
        Metacommunity composition, shape ``(K,)``, positive, sums to 1.
    theta:
        Immigration parameter (> 0). Stationary Var X_i = p_i (1 - p_i) / (1 + theta).
    rate:
        Relaxation rate lambda per day (> 0); ``None`` for a snapshot design.
    flags:
        Plain-text notes from fitting (e.g. a clipped estimate, weak identifiability).
    """

    p: np.ndarray
    theta: float
    rate: float | None = None
    flags: tuple[str, ...] = field(default=())

    def __post_init__(self) -> None:
        p = np.asarray(self.p, dtype=np.float64)
        if p.ndim != 1 or p.size == 0 or np.any(p < 0) or not np.isfinite(p).all():
            raise ValueError("p must be a non-empty 1-D array of non-negative numbers")
        if p.sum() <= 0:
            raise ValueError("p must have a positive sum")
        object.__setattr__(self, "p", p / p.sum())
        if not (np.isfinite(self.theta) and self.theta > 0):
            raise ValueError(f"theta must be positive and finite, got {self.theta}")
        object.__setattr__(self, "theta", float(self.theta))
        if self.rate is not None:
            if not (np.isfinite(self.rate) and self.rate > 0):
                raise ValueError(f"rate must be positive and finite, got {self.rate}")
            object.__setattr__(self, "rate", float(self.rate))

    @property
    def n_taxa(self) -> int:
        return int(self.p.size)

    @property
    def kappa(self) -> float:
        """Diffusion time per day, 2 rate / theta."""
        if self.rate is None:
            raise ValueError("a snapshot model has no time scale")
        return 2.0 * self.rate / self.theta


@dataclass(frozen=True)
class NullFit:
    """Fitted null parameters for a batch of datasets sharing one design.

    Used for the observed data (batch of one) and for every bootstrap replicate.

    Attributes
    ----------
    p:
        Shape ``(R, K)``; rows sum to 1. A taxon absent from a replicate has p = 0.
    theta:
        Shape ``(R,)``.
    rate:
        Shape ``(R,)`` per day, or ``None`` for a snapshot design.
    clipped:
        Shape ``(R,)`` booleans: the moment estimate of theta fell outside (0, inf)
        and was clipped to the allowed range.
    """

    p: np.ndarray
    theta: np.ndarray
    rate: np.ndarray | None
    clipped: np.ndarray

    @property
    def n_replicates(self) -> int:
        return int(self.theta.size)

    def model(self, index: int = 0) -> NeutralModel:
        """The fit of replicate ``index`` as a :class:`NeutralModel`."""
        flags = ("theta estimate clipped to its allowed range",) if self.clipped[index] else ()
        rate = None if self.rate is None else float(self.rate[index])
        return NeutralModel(self.p[index], float(self.theta[index]), rate, flags)
