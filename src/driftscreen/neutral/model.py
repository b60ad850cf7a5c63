"""Parameter records of the neutral null model.

The model (see DEVELOPERS.md, "The neutral null") is the Wright-Fisher diffusion with
immigration on the simplex: local relative abundances X(t) relax towards the
metacommunity composition ``p`` with immigration parameter ``theta`` (Etienne's
fundamental dispersal number I; theta = 2Nm for a haploid Wright-Fisher population),
and every sample is a draw of its sequencing depth from X at its time: multinomial, or
Dirichlet-multinomial with precision C when PCR and extraction add technical noise
(Mosimann 1962, Biometrika 49:65): reads ~ Multinomial(n, Dirichlet(C X)), so that
Var(N_i / n | X) = X_i (1 - X_i) (g + (1 - g) / n) with ``noise`` g = 1 / (1 + C); g = 0 is
the multinomial. Technical noise is independent from sample to sample, drift is not,
which is what separates the two in a time series. Its stationary law is Dirichlet(theta p). In calendar time, correlations decay as
exp(-rate * lag): ``rate`` (lambda, per day) is the per-capita rate at which residents
are replaced by immigrants, and the diffusion clock runs at ``kappa = 2 rate / theta``
per day.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

import numpy as np

NoiseOption = Literal["estimate", "off"] | float
#: The named values of :attr:`NullOptions.noise` (else a fixed precision).
NOISE_CHOICES: tuple[str, ...] = ("estimate", "off")
StartOption = Literal["first-sample", "stationary"]
#: Allowed values of :attr:`NullOptions.start`.
START_CHOICES: tuple[str, ...] = ("first-sample", "stationary")


@dataclass(frozen=True)
class NullOptions:
    """How the neutral null is fitted and simulated.

    Attributes
    ----------
    noise:
        Technical noise of the reads: ``"estimate"`` (time series: from the nugget of the
        sampling-corrected variogram, i.e. the part of the variance between successive
        samples that drift cannot explain; snapshots cannot separate it from drift and
        get multinomial reads; a dataset with technical replicates, of either design, gets
        it from them, :func:`driftscreen.calibrate.fit_null`), ``"off"`` (multinomial
        reads), or a fixed
        Dirichlet-multinomial precision C > 0.
    start:
        ``"first-sample"``: replicates of a time series are conditioned on its first
        sample (they start from the posterior of the community given its reads and
        relax towards p), and p is estimated as the point every taxon relaxes to at the
        shared rate; a community recovering from a disturbance is then still neutral.
        ``"stationary"``: replicates start from the stationary law and p is the pooled
        read fraction.
    """

    noise: NoiseOption = "estimate"
    start: StartOption = "first-sample"

    def __post_init__(self) -> None:
        if isinstance(self.noise, str):
            if self.noise not in NOISE_CHOICES:
                raise ValueError(f"noise must be 'estimate', 'off' or a precision > 0, "
                                 f"got {self.noise!r}")
        elif not (np.isfinite(self.noise) and self.noise > 0):
            raise ValueError(f"a fixed noise precision must be positive and finite, "
                             f"got {self.noise}")
        if self.start not in START_CHOICES:
            raise ValueError(f"start must be one of {START_CHOICES}, got {self.start!r}")

    @property
    def conditioned(self) -> bool:
        """True when time-series replicates are conditioned on the first sample."""
        return self.start == "first-sample"

    @property
    def fixed_noise(self) -> float | None:
        """g = 1 / (1 + C) when the noise is fixed (0 when off); None when estimated."""
        if self.noise == "estimate":
            return None
        return 0.0 if self.noise == "off" else 1.0 / (1.0 + float(self.noise))


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
    noise:
        Technical noise g = 1 / (1 + C) of Dirichlet-multinomial reads with precision C,
        in [0, 1); 0 (the default) is multinomial sequencing.
    flags:
        Plain-text notes from fitting (e.g. a clipped estimate, weak identifiability).
    conditioned:
        True when the model's time series is conditioned on its observed first sample: it
        relaxes from there along E[X(t)] = p + (x_0 - p) exp(-rate (t - t_0)) (only with a
        rate).
    """

    p: np.ndarray
    theta: float
    rate: float | None = None
    noise: float = 0.0
    flags: tuple[str, ...] = field(default=())
    conditioned: bool = False

    def __post_init__(self) -> None:
        p = np.asarray(self.p, dtype=np.float64)
        if p.ndim != 1 or p.size == 0 or np.any(p < 0) or not np.isfinite(p).all():
            raise ValueError("p must be a non-empty 1-D array of non-negative numbers")
        if p.sum() <= 0:
            raise ValueError("p must have a positive sum")
        total = p.sum()
        object.__setattr__(self, "p", p if abs(total - 1.0) <= 1e-12 else p / total)
        if not (np.isfinite(self.theta) and self.theta > 0):
            raise ValueError(f"theta must be positive and finite, got {self.theta}")
        object.__setattr__(self, "theta", float(self.theta))
        if self.rate is not None:
            if not (np.isfinite(self.rate) and self.rate > 0):
                raise ValueError(f"rate must be positive and finite, got {self.rate}")
            object.__setattr__(self, "rate", float(self.rate))
        if not (np.isfinite(self.noise) and 0.0 <= self.noise < 1.0):
            raise ValueError(f"noise must lie in [0, 1), got {self.noise}")
        object.__setattr__(self, "noise", float(self.noise))
        if self.conditioned and self.rate is None:
            raise ValueError("a model conditioned on its first sample needs a rate")

    @property
    def precision(self) -> float:
        """Dirichlet-multinomial precision C = 1/g - 1 of the reads; inf without noise."""
        return np.inf if self.noise == 0 else 1.0 / self.noise - 1.0

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
    noise:
        Shape ``(R,)``: technical noise g = 1 / (1 + C) of the reads (0: multinomial).
    conditioned:
        True when every table is a time series conditioned on its first sample (as
        :attr:`NeutralModel.conditioned`).
    """

    p: np.ndarray
    theta: np.ndarray
    rate: np.ndarray | None
    clipped: np.ndarray
    noise: np.ndarray | None = None
    conditioned: bool = False

    def __post_init__(self) -> None:
        if self.noise is None:
            object.__setattr__(self, "noise", np.zeros_like(self.theta, dtype=np.float64))

    @property
    def n_replicates(self) -> int:
        return int(self.theta.size)


def sampling_variance_factor(depths: np.ndarray, noise: np.ndarray | float) -> np.ndarray:
    """s_t = g + (1 - g) / n_t: Var(N_it / n_t | X) = X_i (1 - X_i) s_t, shape ``(..., T)``.

    The Dirichlet-multinomial variance n p (1 - p) (n + C) / (n (1 + C)) (Mosimann 1962)
    divided by n^2, with g = 1 / (1 + C); g may be one value per replicate ``(R,)``, which
    gives shape ``(R, T)``. 1 / s_t is the effective depth of sample t: the multinomial
    depth with the same sampling variance.
    """
    depths = np.asarray(depths, dtype=np.float64)
    g = np.asarray(noise, dtype=np.float64)[..., None]
    return g + (1.0 - g) / depths


def read_theta(theta: np.ndarray | float, noise: np.ndarray | float) -> np.ndarray:
    """theta_0 with 1/(1 + theta_0) = v + (1 - v) g: the reads' composition before sampling.

    Dirichlet-multinomial reads are Multinomial(n, Dirichlet(C X)); with X ~ Dirichlet
    (theta p), the composition Dirichlet(C X) has the mean p and the variance
    p (1 - p)(v + (1 - v) g) of a Dirichlet(theta_0 p) (v = 1/(1 + theta), g = 1/(1 + C)),
    which stands in for it in the statistics' stationary laws. theta_0 = theta when g = 0.
    """
    v = 1.0 / (1.0 + np.asarray(theta, dtype=np.float64))
    return 1.0 / (v + (1.0 - v) * np.asarray(noise, dtype=np.float64)) - 1.0


def single_fit(model: NeutralModel) -> NullFit:
    """A batch-of-one NullFit holding ``model``."""
    rate = None if model.rate is None else np.array([model.rate])
    return NullFit(p=model.p[None], theta=np.array([model.theta]), rate=rate,
                   clipped=np.array([False]), noise=np.array([model.noise]),
                   conditioned=model.conditioned)
