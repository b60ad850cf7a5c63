"""Level of every statistic on neutral data under the parametric bootstrap (run by hand).

For each design below, N neutral datasets are simulated exactly (a fresh log-normal
metacommunity, depths and, for the mixed designs, parameters per dataset) and tested with
:func:`driftscreen.calibrate.neutrality_test` (B replicates). Printed per design and
statistic: the rejection rates at p <= 0.05 and p <= 0.2 with their binomial standard
errors at the nominal level, sqrt(a (1 - a) / N) (a valid test rejects at most a; the
target for 0.05 is 0.03-0.07), the number of datasets without a p-value (withheld or
undefined), and the correlation across datasets of the observed statistic with the log of
the fitted theta (a statistic whose null law moves with theta is only approximately
calibrated by a bootstrap at an estimated theta). A pooled row sums all designs.

Time series cover at least ~20 correlation times (rate x span), so the marginal
statistics get p-values (see ``driftscreen.calibrate.MIN_CORRELATION_TIMES``).

With ``--niche``, also prints p-values of a few niche datasets
(``StochasticLogistic(40)`` and ``NoisyLotkaVolterra(40)`` defaults, 100 daily samples,
depth 10^4), which should stay far in the tail.

Usage: python bench/calibration_check.py [--datasets N] [--replicates B] [--seed S]
       [--designs NAME,...] [--jobs J] [--niche] [--out results.csv]
One BLAS thread per process; ``--jobs`` runs datasets in parallel processes.
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("MKL_NUM_THREADS", "1")

import argparse
import time
from dataclasses import dataclass

import numpy as np
import pandas as pd
from joblib import Parallel, delayed

from driftscreen.calibrate import neutrality_test
from driftscreen.dataset import Design
from driftscreen.neutral.fit import fit
from driftscreen.neutral.model import NeutralModel
from driftscreen.neutral.simulate import simulate
from driftscreen.niche import NoisyLotkaVolterra, StochasticLogistic
from driftscreen.synthetic import as_dataset, metacommunity

LEVELS = (0.05, 0.2)
#: Depths are log-uniform over this range (a 100-fold spread).
DEPTH_RANGE = (200, 20_000)


@dataclass(frozen=True)
class NeutralDesign:
    """Ranges of one family of neutral datasets; a range (low, high) is drawn per dataset.

    theta is drawn log-uniformly, rate, K and T uniformly; ``interval`` None is a
    snapshot; ``irregular`` draws Gamma(2) gaps with mean 1 day.
    """

    name: str
    theta: tuple[float, float]
    n_taxa: tuple[int, int]
    n_samples: tuple[int, int]
    rate: tuple[float, float] | None
    irregular: bool = False

    def draw(self, rng: np.random.Generator) -> tuple[NeutralModel, Design]:
        theta = float(np.exp(rng.uniform(*np.log(self.theta))))
        n_taxa = int(rng.integers(self.n_taxa[0], self.n_taxa[1] + 1))
        n_samples = int(rng.integers(self.n_samples[0], self.n_samples[1] + 1))
        depths = np.rint(np.exp(rng.uniform(*np.log(DEPTH_RANGE), n_samples))).astype(np.int64)
        p = metacommunity(n_taxa, rng)
        if self.rate is None:
            return NeutralModel(p, theta), Design(depths=depths)
        gaps = (rng.gamma(2.0, 0.5, n_samples - 1) if self.irregular
                else np.ones(n_samples - 1))
        times = np.round(np.concatenate([[0.0], np.cumsum(np.maximum(gaps, 1e-3))]), 6)
        return NeutralModel(p, theta, float(rng.uniform(*self.rate))), Design(depths, times)


DESIGNS = (
    NeutralDesign("series theta=10 K=30 T=60", (10, 10), (30, 30), (60, 60), (0.5, 0.5)),
    NeutralDesign("series theta=40 K=40 T=60", (40, 40), (40, 40), (60, 60), (0.5, 0.5)),
    NeutralDesign("series theta=50 K=60 T=100 irregular", (50, 50), (60, 60), (100, 100),
                  (0.3, 0.3), irregular=True),
    NeutralDesign("series theta=300 K=20 T=40", (300, 300), (20, 20), (40, 40), (1.0, 1.0)),
    NeutralDesign("series mixed", (10, 300), (20, 60), (40, 150), (0.4, 1.0)),
    NeutralDesign("snapshot theta=10 K=40 T=60", (10, 10), (40, 40), (60, 60), None),
    NeutralDesign("snapshot theta=40 K=40 T=60", (40, 40), (40, 40), (60, 60), None),
    NeutralDesign("snapshot theta=300 K=20 T=150", (300, 300), (20, 20), (150, 150), None),
    NeutralDesign("snapshot mixed", (10, 300), (20, 60), (40, 150), None),
)


def run_one(spec: NeutralDesign, index: int, stream: np.random.SeedSequence,
            replicates: int) -> list[dict]:
    """Simulate and test one neutral dataset; one record per statistic."""
    rng = np.random.default_rng(stream)
    model, design = spec.draw(rng)
    counts = simulate(model, design, 1, rng)[0]
    dataset = as_dataset(f"neutral_{index}", counts, design)
    fitted_theta = fit(dataset.counts, dataset.design).theta
    result = neutrality_test(dataset, replicates=replicates,
                             seed=int(rng.integers(2**31)))
    return [{"design": spec.name, "dataset": index, "statistic": name,
             "value": outcome.statistic, "pvalue": outcome.pvalue,
             "true_theta": model.theta, "fitted_theta": fitted_theta}
            for name, outcome in result.statistics.items()]


def level_table(records: pd.DataFrame) -> pd.DataFrame:
    """Rejection rates, their nominal SEs, missing p-values and corr(statistic, log theta)."""
    rows = []
    for (design, name), group in records.groupby(["design", "statistic"], sort=False):
        rows.append(summary_row(design, name, group))
    for name, group in records.groupby("statistic", sort=False):
        rows.append(summary_row("pooled", name, group))
    return pd.DataFrame(rows)


def summary_row(design: str, name: str, group: pd.DataFrame) -> dict:
    pvalues = group["pvalue"].to_numpy()
    tested = np.isfinite(pvalues)
    n = int(tested.sum())
    row = {"design": design, "statistic": name, "n": n, "no_p": int((~tested).sum())}
    for level in LEVELS:
        row[f"rate@{level:g}"] = float(np.mean(pvalues[tested] <= level)) if n else np.nan
        row[f"se@{level:g}"] = float(np.sqrt(level * (1 - level) / max(n, 1)))
    values = group["value"].to_numpy()
    log_theta = np.log(group["fitted_theta"].to_numpy())
    finite = np.isfinite(values)
    row["corr_log_theta"] = (float(np.corrcoef(values[finite], log_theta[finite])[0, 1])
                             if finite.sum() > 2 and np.std(values[finite]) > 0 else np.nan)
    return row


def print_table(table: pd.DataFrame) -> None:
    print(f"{'design':38s} {'statistic':25s} {'n':>4s} {'no p':>5s} "
          f"{'p<=0.05':>15s} {'p<=0.2':>15s} {'corr(log th)':>12s}")
    for row in table.to_dict("records"):
        cells = [f"{row[f'rate@{a:g}']:.3f} +- {row[f'se@{a:g}']:.3f}" for a in LEVELS]
        print(f"{row['design']:38s} {row['statistic']:25s} {row['n']:4d} {row['no_p']:5d} "
              f"{cells[0]:>15s} {cells[1]:>15s} {row['corr_log_theta']:12.2f}")


def null_z(outcome) -> float:
    """Distance of the observed statistic from the null mean in null SDs."""
    null = outcome.null_distribution
    return float((outcome.statistic - null.mean()) / null.std()) if null.size > 1 else np.nan


def niche_pvalues(replicates: int, seed: int, n_datasets: int = 3) -> None:
    """p-values of niche datasets (100 daily samples at depth 10^4), and z = distance of the
    statistic from the null mean in null SDs (signed; for two-sided statistics either
    sign counts)."""
    design = Design(depths=np.full(100, 10_000), times=np.arange(100, dtype=float))
    generators = (StochasticLogistic(40), NoisyLotkaVolterra(40))
    print(f"\nniche datasets (B = {replicates}): p-values per statistic")
    for generator, stream in zip(generators, np.random.SeedSequence(seed).spawn(2)):
        rng = np.random.default_rng(stream)
        counts = generator.simulate(design, n_datasets, rng)
        for i in range(n_datasets):
            dataset = as_dataset(f"niche_{i}", counts[i], design)
            result = neutrality_test(dataset, replicates=replicates, seed=seed + i)
            cells = ", ".join(f"{name} {outcome.pvalue:.3g} (z {null_z(outcome):.3g})"
                              for name, outcome in result.statistics.items())
            print(f"  {type(generator).__name__} #{i} (K kept {dataset.n_taxa}): {cells}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--datasets", type=int, default=200)
    parser.add_argument("--replicates", type=int, default=99)
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--designs", default="", help="comma-separated indices into DESIGNS")
    parser.add_argument("--jobs", type=int, default=1)
    parser.add_argument("--niche", action="store_true")
    parser.add_argument("--out", default="", help="CSV of every dataset's results")
    args = parser.parse_args()
    chosen = ([DESIGNS[int(i)] for i in args.designs.split(",")] if args.designs
              else list(DESIGNS))
    start = time.perf_counter()
    tasks = []
    for spec in chosen:
        streams = np.random.SeedSequence([args.seed, DESIGNS.index(spec)]).spawn(args.datasets)
        tasks += [(spec, i, stream) for i, stream in enumerate(streams)]
    records = Parallel(n_jobs=args.jobs)(delayed(run_one)(spec, i, stream, args.replicates)
                                         for spec, i, stream in tasks)
    frame = pd.DataFrame([row for rows in records for row in rows])
    if args.out:
        frame.to_csv(args.out, index=False)
    print(f"{args.datasets} neutral datasets per design, B = {args.replicates}, "
          f"seed {args.seed} ({time.perf_counter() - start:.0f} s)")
    print_table(level_table(frame))
    if args.niche:
        niche_pvalues(args.replicates, args.seed)


if __name__ == "__main__":
    main()
