"""Time and memory of score_features on synthetic paired features (prints figures).

    python tests/benchmarks/bench_stats.py            # 2,000 and 20,000 pairs x 512
    python tests/benchmarks/bench_stats.py --pairs 5000 --dim 256

Each size runs in a fresh process so its peak resident memory (ru_maxrss) is its own.
Figures vary with machine load; compare the per-metric shares within one run.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import time

import numpy as np


def _features(n, d, seed=0):
    """Float32 features of n scenes; clutter adds noise and a small shift."""
    rng = np.random.default_rng(seed)
    z = rng.standard_normal((n, d), dtype=np.float32)
    clean = z + 0.3 * rng.standard_normal((n, d), dtype=np.float32)
    cluttered = z + 0.3 * rng.standard_normal((n, d), dtype=np.float32) + 0.05
    labels = np.where(z[:, 0] > 0, "left", "right").astype(object)
    level = rng.integers(0, 3, n).astype(np.float64)
    return clean, cluttered, {"side": labels}, {"level": level}


def _timed(fn, *args, **kwargs):
    start = time.perf_counter()
    out = fn(*args, **kwargs)
    return out, time.perf_counter() - start


def run_one(n, d, permutations, per_metric):
    from invariance.metrics import (
        domain_classifier,
        linear_cka,
        linear_probes,
        paired_drift,
        paired_permutation_test,
    )
    from invariance.scoring import score_features

    clean, cluttered, tasks, factors = _features(n, d)
    figures = {"pairs": n, "dim": d, "permutations": permutations}
    if per_metric:
        _, figures["domain_classifier_s"] = _timed(domain_classifier, clean, cluttered)
        # the same fits with the BLAS default thread count, for the ratio in this run
        from invariance.metrics import domain

        single, domain._FIT_THREADS = domain._FIT_THREADS, None
        _, figures["domain_classifier_default_threads_s"] = _timed(
            domain_classifier, clean, cluttered
        )
        domain._FIT_THREADS = single
        _, figures["mmd_s"] = _timed(
            paired_permutation_test, clean, cluttered, permutations=permutations
        )
        _, figures["probe_s"] = _timed(linear_probes, clean, cluttered, tasks)
        _, figures["drift_s"] = _timed(paired_drift, clean, cluttered)
        _, figures["cka_s"] = _timed(linear_cka, clean, cluttered)
    result, figures["score_features_no_breakdown_s"] = _timed(
        score_features, clean, cluttered, tasks=tasks, permutations=permutations
    )
    figures["mmd_method"] = result["metrics"]["mmd"]["method"]
    if per_metric:
        from invariance import scoring

        single, scoring._THREADS = scoring._THREADS, None
        _, figures["score_features_default_threads_s"] = _timed(
            score_features, clean, cluttered, tasks=tasks, permutations=permutations
        )
        scoring._THREADS = single
    _, figures["score_features_with_level_breakdown_s"] = _timed(
        score_features, clean, cluttered, tasks=tasks, factors=factors, permutations=permutations
    )
    # Linux reports ru_maxrss in KiB
    figures["peak_rss_mib"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    figures["input_mib"] = (clean.nbytes + cluttered.nbytes) / 2**20
    return figures


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--pairs", type=int, nargs="*", default=[2000, 20000])
    parser.add_argument("--dim", type=int, default=512)
    parser.add_argument("--permutations", type=int, default=1000)
    parser.add_argument("--one", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.one:
        n = args.pairs[0]
        figures = run_one(n, args.dim, args.permutations, per_metric=n <= 5000)
        print(json.dumps(figures))
        return
    rows = []
    for n in args.pairs:
        cmd = [sys.executable, __file__, "--one", "--pairs", str(n), "--dim", str(args.dim),
               "--permutations", str(args.permutations)]
        out = subprocess.run(cmd, check=True, capture_output=True, text=True).stdout
        rows.append(json.loads(out.strip().splitlines()[-1]))
        print(json.dumps(rows[-1]), flush=True)
    for row in rows:
        if "domain_classifier_default_threads_s" in row:
            ratio = row["domain_classifier_default_threads_s"] / row["domain_classifier_s"]
            print(f"{row['pairs']} pairs: domain classifier {ratio:.1f}x slower with default "
                  f"BLAS threads than single-threaded")
        if "score_features_default_threads_s" in row:
            ratio = row["score_features_default_threads_s"] / row["score_features_no_breakdown_s"]
            print(f"{row['pairs']} pairs: score_features {ratio:.1f}x slower with default "
                  f"BLAS threads than single-threaded")
    if len(rows) > 1:
        base = rows[0]["score_features_no_breakdown_s"]
        for row in rows[1:]:
            ratio = row["score_features_no_breakdown_s"] / base
            print(f"{row['pairs']} vs {rows[0]['pairs']} pairs: {ratio:.1f}x the time "
                  f"for {row['pairs'] / rows[0]['pairs']:.0f}x the pairs")


if __name__ == "__main__":
    main()
