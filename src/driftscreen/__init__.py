"""driftscreen: is a microbial community's variation neutral drift plus immigration, or niche structure?

The public API mirrors the command line:

- :func:`read_datasets` / :func:`write_tables`: tables on disk to :class:`Dataset` records and back;
- :class:`NeutralModel`, :func:`simulate` and :func:`driftscreen.neutral.fit.fit`: the neutral
  null (Wright-Fisher diffusion with immigration, sequenced multinomially), simulated exactly
  and fitted;
- :func:`neutrality_test`: one dataset, every statistic calibrated by parametric bootstrap,
  returning a :class:`NeutralityResult` with ``summary()``;
- :func:`driftscreen.screen.screen`: many datasets, in parallel, with Benjamini-Hochberg q-values;
- :class:`StochasticLogistic`, :class:`NoisyLotkaVolterra`: niche alternatives for power analysis.
"""

from driftscreen.calibrate import neutrality_test
from driftscreen.dataset import Dataset, Design
from driftscreen.errors import InputError
from driftscreen.intake import read_datasets, write_tables
from driftscreen.neutral import NeutralModel, NullFit, simulate
from driftscreen.niche import NoisyLotkaVolterra, StochasticLogistic
from driftscreen.results import NeutralityResult, StatisticResult
from driftscreen.version import __version__

__all__ = [
    "Dataset", "Design", "InputError", "NeutralModel", "NeutralityResult", "NoisyLotkaVolterra",
    "NullFit", "StatisticResult", "StochasticLogistic", "__version__", "neutrality_test",
    "read_datasets", "simulate", "write_tables",
]
