"""Which null holds its size on disturbed, noisy and short neutral series (run by hand).

For each neutral collection (stationary start, a disturbed start, Dirichlet-multinomial
reads, short series) simulates datasets with the exact simulator, tests each under the
null options compared (replicates conditioned on the first sample or started from the
stationary law; technical noise estimated or off) with every p-value computed (no
withholding on short series), and prints the rejection rate at 0.05 of every statistic,
overall and for series covering fewer than 15 correlation times; the per-dataset
p-values go to null_choices.tsv in the working folder.

Usage: python bench/null_choices.py [DATASETS_PER_CELL] [REPLICATES] [JOBS]
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import sys
import time

import numpy as np
import pandas as pd
from joblib import Parallel, delayed

from driftscreen import calibrate, seeds
from driftscreen.dataset import Dataset
from driftscreen.neutral.dirichlet import dirichlet_rows
from driftscreen.neutral.model import NeutralModel
from driftscreen.neutral.simulate import simulate
from driftscreen.synthetic import DesignSpec, as_dataset, metacommunity

COLLECTIONS = ("stationary", "disturbed", "noise300", "short")
OPTIONS = {"conditioned+noise": dict(start="first-sample", noise="estimate"),
           "stationary+noise": dict(start="stationary", noise="estimate"),
           "conditioned, multinomial": dict(start="first-sample", noise="off")}


def draw_dataset(collection: str, index: int) -> Dataset:
    """One neutral dataset of a collection, designs and parameters varied by index."""
    rng = seeds.generator(seeds.dataset_stream(11, f"{collection}_{index}"))
    n_taxa = int(rng.choice([15, 40, 100]))
    n_samples = int(rng.integers(10, 26)) if collection == "short" else int(rng.choice([30, 100]))
    spec = DesignSpec(n_samples, 1.0, bool(rng.integers(2)), int(rng.choice([2_000, 20_000])),
                      float(rng.choice([0.0, 0.5])))
    design = spec.draw(rng)
    theta, rate = float(rng.choice([10.0, 50.0, 300.0])), float(rng.choice([0.05, 0.1, 0.5]))
    noise = 1.0 / 301.0 if collection == "noise300" else 0.0
    model = NeutralModel(metacommunity(n_taxa, rng), theta, rate, noise)
    start = dirichlet_rows((theta * model.p)[None], rng)[0]
    if collection == "disturbed":
        top = np.argsort(-start)[:3]
        start[top] /= 10.0
        start /= start.sum()
    counts = simulate(model, design, 1, rng, start=start)[0]
    return as_dataset(f"{collection}_{index}", counts, design)


def run_one(collection: str, index: int, option: str, replicates: int) -> dict:
    calibrate.MIN_CORRELATION_TIMES = {"stationary": 0.0, "first-sample": 0.0}
    dataset = draw_dataset(collection, index)
    result = calibrate.neutrality_test(dataset, replicates=replicates, seed=3, **OPTIONS[option])
    row = {"collection": collection, "index": index, "option": option,
           "coverage": calibrate.correlation_times(result.model, dataset.design)}
    row.update({name: stat.pvalue for name, stat in result.statistics.items()})
    return row


def main(per_cell: int, replicates: int, jobs: int) -> None:
    start = time.perf_counter()
    rows = Parallel(n_jobs=jobs)(delayed(run_one)(c, i, o, replicates) for c in COLLECTIONS
                                 for i in range(per_cell) for o in OPTIONS)
    frame = pd.DataFrame(rows)
    statistics = [c for c in frame.columns if c not in ("collection", "index", "option",
                                                         "coverage")]
    frame.to_csv("null_choices.tsv", sep="\t", index=False)
    pd.set_option("display.width", 250)
    pd.set_option("display.max_columns", None)
    pd.set_option("display.max_rows", None)
    for label, part in (("all series", frame), ("coverage < 15", frame[frame.coverage < 15])):
        rates = part.groupby(["collection", "option"])[statistics].agg(
            lambda p: np.mean(p.dropna() <= 0.05))
        rates["n"] = part.groupby(["collection", "option"]).size()
        print(f"\nrejection rate at 0.05, {label} ({per_cell} datasets per collection, "
              f"B = {replicates})\n{rates.round(3)}")
    print(f"\n{time.perf_counter() - start:.0f} s")


if __name__ == "__main__":
    args = [int(a) for a in sys.argv[1:]]
    main(*(args + [60, 99, 2][len(args):]))
