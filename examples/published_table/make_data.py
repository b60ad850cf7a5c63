"""Make the invented "published" table of this example (run from this folder).

An invented article reports a compost reactor sampled 45 times over five months, and claims
that its bacterial community drifts neutrally. Its supplementary table, as such tables often
are, lists only the 15 most abundant genera, in percent of reads, and the methods state a
sequencing depth of 25,000 reads per sample. Here the table is simulated by driftscreen
from a neutral community of 70 genera (theta 120, rate 0.3 per day), rounded to two
decimals, so the rows sum to less than 100.
"""

from __future__ import annotations

from datetime import date, timedelta

import numpy as np
import pandas as pd

from driftscreen.neutral.model import NeutralModel
from driftscreen.neutral.simulate import simulate
from driftscreen.synthetic import DesignSpec, metacommunity

SEED = 77
DEPTH = 25_000


def main() -> None:
    rng = np.random.default_rng(SEED)
    design = DesignSpec(n_samples=45, interval=3.3, irregular=True, depth=DEPTH).draw(rng)
    model = NeutralModel(metacommunity(70, rng), theta=120.0, rate=0.3)
    counts = simulate(model, design, 1, rng)[0]
    percent = 100.0 * counts / counts.sum(axis=1, keepdims=True)
    top = np.argsort(-percent.mean(axis=0))[:15]
    days = np.floor(design.times).astype(int)
    days += np.arange(days.size) * (np.diff(days, prepend=-1) <= 0)  # one sample a day at most
    samples = [f"CR{k + 1:02d}" for k in range(days.size)]
    table = pd.DataFrame(np.round(percent[:, top].T, 2), columns=samples,
                         index=[f"Genus_{chr(65 + j)}" for j in range(top.size)])
    table.index.name = "genus"
    table.to_csv("genera_percent.tsv", sep="\t")
    start = date(2025, 4, 2)
    pd.DataFrame({"sample": samples,
                  "date": [(start + timedelta(days=int(d))).isoformat() for d in days]}
                 ).to_csv("samples.tsv", sep="\t", index=False)


if __name__ == "__main__":
    main()
