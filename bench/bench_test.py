"""End-to-end time of one neutrality test (run by hand).

One neutral time series of 100 taxa x 200 irregular daily samples with varying depth, tested
with B = 999 replicates and R = 200 groupings. Prints the wall time of `neutrality_test` with
the given number of jobs, the simulation floor (the time to simulate the same B replicates,
one process), and their ratio. Target: under 30 s on a 2-core machine. With
``--baseline PYTHON`` the same test is also timed under another interpreter that has another
driftscreen version installed (e.g. the previous release in its own venv), and the ratio of
the two wall times is printed, both measured in the same run.

Usage: python bench/bench_test.py [--jobs 2] [--replicates 999] [--baseline PYTHON]
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import time

import numpy as np

from driftscreen.calibrate import neutrality_test
from driftscreen.neutral.model import NeutralModel
from driftscreen.neutral.simulate import simulate
from driftscreen.synthetic import DesignSpec, as_dataset, metacommunity


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--jobs", type=int, default=2)
    parser.add_argument("--replicates", type=int, default=999)
    parser.add_argument("--taxa", type=int, default=100)
    parser.add_argument("--samples", type=int, default=200)
    parser.add_argument("--baseline", metavar="PYTHON",
                        help="also time the test under this interpreter's driftscreen")
    parser.add_argument("--wall-only", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args()

    rng = np.random.default_rng(2026)
    design = DesignSpec(args.samples, 1.0, irregular=True, depth=10_000,
                        depth_spread=0.4).draw(rng)
    model = NeutralModel(metacommunity(args.taxa, rng), theta=80.0, rate=0.3)
    dataset = as_dataset("bench", simulate(model, design, 1, rng)[0], design)

    start = time.perf_counter()
    simulate(model, design, args.replicates, np.random.default_rng(1))
    floor = time.perf_counter() - start

    start = time.perf_counter()
    result = neutrality_test(dataset, replicates=args.replicates, groupings=200, seed=1,
                             jobs=args.jobs)
    total = time.perf_counter() - start
    if args.wall_only:
        print(f"WALL {total}")
        return

    print(f"dataset: {dataset.n_taxa} taxa x {dataset.n_samples} samples, "
          f"B = {args.replicates}, R = 200, jobs = {args.jobs}")
    print(f"neutrality_test:  {total:7.2f} s")
    print(f"simulation floor: {floor:7.2f} s (B replicates simulated once, one process)")
    print(f"ratio:            {total / floor:7.2f}")
    print(f"target < 30 s: {'met' if total < 30 else 'NOT met'}; "
          f"combined p = {result.pvalue:.3f}")
    if args.baseline:
        baseline = baseline_wall(args.baseline)
        print(f"baseline ({args.baseline}): {baseline:7.2f} s; this version / baseline: "
              f"{total / baseline:.2f}")


def baseline_wall(python: str) -> float:
    """Wall time of the same test run by this script under another interpreter."""
    arguments = [a for a in sys.argv[1:] if not a.startswith("--baseline")]
    if "--baseline" in sys.argv:
        index = sys.argv.index("--baseline")
        arguments = sys.argv[1:index] + sys.argv[index + 2:]
    output = subprocess.run([python, __file__, *arguments, "--wall-only"], check=True,
                            capture_output=True, text=True).stdout
    return float(output.split("WALL")[-1])


if __name__ == "__main__":
    main()
