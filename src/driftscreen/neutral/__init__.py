"""The neutral null: Wright-Fisher diffusion with immigration, sequenced multinomially.

- :class:`NeutralModel`, :class:`NullFit`: parameter records (:mod:`.model`).
- :func:`.fit.fit`, :func:`fit_batch`: moment estimators corrected for sampling noise (:mod:`.fit`).
- :func:`simulate`, :func:`iter_simulate`: exact simulation between arbitrary sampling
  times through lines of descent (:mod:`.simulate`, :mod:`.lines_of_descent`).
- :func:`simulate_wright_fisher`: a plain discrete-generation reference (:mod:`.wright_fisher`).
"""

from driftscreen.neutral.fit import fit_batch
from driftscreen.neutral.model import NeutralModel, NullFit
from driftscreen.neutral.simulate import iter_simulate, simulate
from driftscreen.neutral.wright_fisher import simulate_wright_fisher

__all__ = ["NeutralModel", "NullFit", "fit_batch", "iter_simulate", "simulate",
           "simulate_wright_fisher"]
