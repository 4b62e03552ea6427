"""Calibration and power of the paired MMD permutation test (prints a table).

    python tests/benchmarks/bench_mmd_calibration.py               # full grid, 200 runs a cell
    python tests/benchmarks/bench_mmd_calibration.py --reps 400 --pairs 120 --dims 32

For every null of ``tests/nulls.py`` and every (pairs, dim) cell, the test runs on
``--reps`` independent samples and the share of p-values <= alpha is printed beside the
binomial 99% band around alpha (``scipy.stats.binom.interval``): a calibrated test lands
inside it in all but about 1% of cells. The power row is the issue's alternative: a shift
of 0.35 sd in a quarter of the coordinates (``nulls.shifted``) at 120 pairs, 32-d.
tests/test_metrics_mmd.py runs a reduced subset of the same grid.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
from scipy.stats import binom
from threadpoolctl import threadpool_limits

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # tests/, for nulls

from nulls import KINDS, null, shifted  # noqa: E402

from invariance.metrics.mmd import paired_permutation_test  # noqa: E402

# The level the issue asks about and the band around it (binomial 99%).
ALPHA = 0.05
BAND = 0.99


def band(reps, alpha=ALPHA, level=BAND):
    """Rejection rates a calibrated test reaches with probability ``level`` in ``reps`` runs."""
    low, high = binom.interval(level, reps, alpha)
    return low / reps, high / reps


def rejection_rate(make, reps, permutations, seed):
    """Share of ``reps`` runs with p <= ALPHA; ``make(rng)`` draws one paired sample."""
    rejected = 0
    for rep in range(reps):
        rng = np.random.default_rng([seed, rep])
        clean, cluttered = make(rng)
        p = paired_permutation_test(clean, cluttered, permutations=permutations, seed=rep)["p_value"]
        rejected += p <= ALPHA
    return rejected / reps


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--reps", type=int, default=200)
    parser.add_argument("--permutations", type=int, default=999)
    parser.add_argument("--pairs", type=int, nargs="*", default=[60, 120, 400])
    parser.add_argument("--dims", type=int, nargs="*", default=[16, 128, 512])
    parser.add_argument("--kinds", nargs="*", default=list(KINDS))
    args = parser.parse_args()
    with threadpool_limits(limits=1):  # as score_features runs it
        _table(args)


def _table(args):
    low, high = band(args.reps)
    print(f"paired MMD permutation test, alpha = {ALPHA}, {args.reps} runs a cell, "
          f"B = {args.permutations}; binomial 99% band [{low:.3f}, {high:.3f}]")
    print(f"{'null':<14} {'pairs':>5} {'dim':>4} {'reject':>7}  {'in band':<7} {'s':>6}")
    outside = 0
    for k, kind in enumerate(args.kinds):
        for n in args.pairs:
            for d in args.dims:
                start = time.perf_counter()
                rate = rejection_rate(lambda rng: null(kind, n, d, rng), args.reps, args.permutations,
                                      seed=1000 * k + n + d)
                inside = low <= rate <= high
                outside += not inside
                print(f"{kind:<14} {n:>5} {d:>4} {rate:7.3f}  {'yes' if inside else 'NO':<7} "
                      f"{time.perf_counter() - start:6.1f}", flush=True)
    print(f"{outside} of {len(args.kinds) * len(args.pairs) * len(args.dims)} cells outside the band")
    for kind in args.kinds:
        power = rejection_rate(lambda rng: shifted(kind, 120, 32, rng), args.reps, args.permutations,
                               seed=99)
        print(f"power, {kind}, 120 pairs x 32-d, shift 0.35 sd in 1/4 of the coordinates: {power:.3f} "
              f"(target >= 0.95)", flush=True)


if __name__ == "__main__":
    main()
