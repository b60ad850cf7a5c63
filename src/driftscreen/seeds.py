"""Random streams derived from one master seed.

Every random draw in a run comes from a :class:`numpy.random.SeedSequence` keyed by the
master seed and by *what* it is for (a dataset's name, a purpose, a chunk index), never by
*who* draws it (a worker, a job number). Results are therefore the same whatever the number
of jobs, and a dataset's results do not change when other datasets are added or removed.
"""

from __future__ import annotations

import hashlib

import numpy as np

#: Purposes of the streams derived for one dataset.
SIMULATION = 0
STATISTICS = 1
PILOT = 2
#: The per-taxon scan's tie-breaking draws (randomised p-values).
TAXON_TIES = 3


def name_key(name: str) -> tuple[int, ...]:
    """A stable tuple of 32-bit words from a dataset name (SHA-256; not Python's hash)."""
    digest = hashlib.sha256(name.encode("utf-8")).digest()
    return tuple(int.from_bytes(digest[i:i + 4], "little") for i in range(0, 16, 4))


def dataset_stream(seed: int, name: str) -> np.random.SeedSequence:
    """The root stream of dataset ``name`` under master ``seed``."""
    return np.random.SeedSequence(entropy=int(seed), spawn_key=name_key(name))


def substream(root: np.random.SeedSequence, *keys: int) -> np.random.SeedSequence:
    """A child stream of ``root`` addressed by ``keys`` (e.g. purpose, chunk index)."""
    return np.random.SeedSequence(entropy=root.entropy,
                                  spawn_key=tuple(root.spawn_key) + tuple(int(k) for k in keys))


def generator(stream: np.random.SeedSequence) -> np.random.Generator:
    """A fresh PCG64 generator on ``stream``."""
    return np.random.Generator(np.random.PCG64(stream))
