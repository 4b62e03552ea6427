"""Calibration and power of the paired test of a drift's fall (prints two tables).

    python tests/benchmarks/bench_drift_change.py               # 1,000 runs a cell (about 3 min on 2 cores)
    python tests/benchmarks/bench_drift_change.py --reps 200

`invariance.metrics.drift.paired_drift_change` decides whether an aligned encoder's
held-out drift fell beyond sampling noise: "fell" when the lower end of its 95% paired
bootstrap interval is above 0, a one-sided test aimed at 2.5%. Calibration: under each
null of tests/nulls.py (``encoder_states`` with the two states exchangeable) the share of
runs called "fell" (and, the other way, "rose") must not exceed the binomial 99% band
around 2.5% (scipy.stats.binom); a rate below the band is conservative and is shown. Power: the second state's clutter scaled by 0.8 and 0.9
(drift about 17% and 9% lower). Beside it, the rule of two independent intervals (fell
when the after interval's upper end is below the before interval's lower end), which was
tried and reverted (docs/alignment.md).
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
from scipy.stats import binom

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

from nulls import KINDS, encoder_states  # noqa: E402

from invariance.metrics.drift import paired_drift, paired_drift_change  # noqa: E402

# one-sided aim of the judgement's test; band of the binomial rate (common practice)
AIM, BAND = 0.025, 0.99
SIZES = (20, 60, 180)
DIMENSION = 16
RESAMPLES = 1000


def _rates(kind, n, reps, scale, seed, independent=False):
    rng = np.random.default_rng(seed)
    fell = rose = apart = 0
    for run in range(reps):
        before, after = encoder_states(kind, n, DIMENSION, rng, scale_after=scale)
        low, high = paired_drift_change(before, after, seed=run, resamples=RESAMPLES)["relative_fall_ci"]
        fell, rose = fell + (low > 0), rose + (high < 0)
        if independent:
            lo0 = paired_drift(*before, seed=run, resamples=RESAMPLES)["relative_drift_ci"][0]
            hi1 = paired_drift(*after, seed=run, resamples=RESAMPLES)["relative_drift_ci"][1]
            apart += hi1 < lo0
    return fell / reps, rose / reps, apart / reps


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--reps", type=int, default=1000)
    args = parser.parse_args(argv)
    low, high = (binom.ppf(q, args.reps, AIM) / args.reps for q in ((1 - BAND) / 2, (1 + BAND) / 2))
    print(f"calibration: {args.reps} runs a cell, aim {AIM:.1%}, 99% band [{low:.3f}, {high:.3f}]")
    print(f"{'null':<14}{'pairs':>6}{'fell':>8}{'rose':>8}  within      s")
    bad = 0
    for kind in KINDS:
        for n in SIZES:
            start = time.perf_counter()
            fell, rose, _ = _rates(kind, n, args.reps, 1.0, seed=1)
            liberal = fell > high or rose > high
            bad += liberal
            state = "above band" if liberal else ("below band" if min(fell, rose) < low else "yes")
            print(f"{kind:<14}{n:>6}{fell:>8.3f}{rose:>8.3f}  {state:<11}"
                  f"{time.perf_counter() - start:4.0f}")
    reps = max(args.reps // 5, 20)
    print(f"\npower: {reps} runs a cell; 'independent' = two separate intervals that do not overlap")
    print(f"{'null':<14}{'pairs':>6}{'clutter':>9}{'paired':>8}{'independent':>13}")
    for kind in KINDS:
        for n in SIZES:
            for scale in (0.8, 0.9):
                fell, _, apart = _rates(kind, n, reps, scale, seed=2, independent=True)
                print(f"{kind:<14}{n:>6}{scale:>9.1f}{fell:>8.3f}{apart:>13.3f}")
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
