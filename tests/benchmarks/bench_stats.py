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

# ResNet-18 at 224 px on the project's reference CPU (the figure; `invariance bench`
# measures it on this machine), for the share of extraction time.
EXTRACT_IMAGES_PER_S = 16.0


def _features(n, d, seed=0):
    """The statistics benchmark's pairs: one task, 4 factor columns of 3 levels each."""
    from invariance.bench import _stat_features

    return _stat_features(n, d, seed=seed)


def _timed(fn, *args, **kwargs):
    start = time.perf_counter()
    out = fn(*args, **kwargs)
    return out, time.perf_counter() - start


def _per_metric(figures, clean, cluttered, tasks, permutations):
    from invariance.metrics import domain, linear_cka, linear_probes, paired_drift
    from invariance.metrics.mmd import PairedKernel

    _, figures["domain_classifier_s"] = _timed(domain.domain_classifier, clean, cluttered,
                                               permutations=permutations)
    # the same call with the BLAS default thread count, for the ratio in this run
    single, domain._FIT_THREADS = domain._FIT_THREADS, None
    _, figures["domain_classifier_default_threads_s"] = _timed(
        domain.domain_classifier, clean, cluttered, permutations=permutations)
    domain._FIT_THREADS = single
    kernel, figures["mmd_kernel_s"] = _timed(PairedKernel, clean, cluttered)
    _, figures["mmd_test_s"] = _timed(kernel.test, permutations=permutations)
    _, figures["probe_s"] = _timed(linear_probes, clean, cluttered, tasks)
    _, figures["drift_s"] = _timed(paired_drift, clean, cluttered)
    _, figures["cka_s"] = _timed(linear_cka, clean, cluttered)


def run_one(n, d, permutations, per_metric):
    from invariance import scoring
    from invariance.options import ScoringOptions

    clean, cluttered, tasks, factors = _features(n, d)
    options = ScoringOptions(permutations=permutations, seed=0)
    figures = {"pairs": n, "dim": d, "permutations": permutations, "factors": "4 x 3 levels"}
    if per_metric:
        _per_metric(figures, clean, cluttered, tasks, permutations)
    result, figures["score_features_no_breakdown_s"] = _timed(
        scoring.score_features, clean, cluttered, tasks=tasks, options=options)
    figures["mmd_method"] = result["metrics"]["mmd"]["method"]
    if per_metric:
        single, scoring._THREADS = scoring._THREADS, None
        _, figures["score_features_default_threads_s"] = _timed(
            scoring.score_features, clean, cluttered, tasks=tasks, options=options)
        scoring._THREADS = single
    _, figures["score_features_with_breakdowns_s"] = _timed(
        scoring.score_features, clean, cluttered, tasks=tasks, factors=factors, options=options)
    if per_metric:
        workers, scoring._WORKERS = scoring._WORKERS, None
        _, figures["score_features_with_breakdowns_thread_pool_s"] = _timed(
            scoring.score_features, clean, cluttered, tasks=tasks, factors=factors, options=options)
        scoring._WORKERS = workers
    # Linux reports ru_maxrss in KiB
    figures["peak_rss_mib"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    figures["input_mib"] = (clean.nbytes + cluttered.nbytes) / 2**20
    return figures


def _ratios(rows):
    for row in rows:
        if "domain_classifier_default_threads_s" in row:
            ratio = row["domain_classifier_default_threads_s"] / row["domain_classifier_s"]
            print(f"{row['pairs']} pairs: domain classifier {ratio:.1f}x slower with default "
                  f"BLAS threads than single-threaded")
        if "score_features_default_threads_s" in row:
            ratio = row["score_features_default_threads_s"] / row["score_features_no_breakdown_s"]
            print(f"{row['pairs']} pairs: score_features {ratio:.1f}x slower with default "
                  f"BLAS threads than single-threaded")
        if "score_features_with_breakdowns_thread_pool_s" in row:
            ratio = row["score_features_with_breakdowns_s"] / row["score_features_with_breakdowns_thread_pool_s"]
            print(f"{row['pairs']} pairs: breakdowns on a thread pool (one worker per core) {ratio:.2f}x "
                  f"as fast as one after another")
        share = row["score_features_with_breakdowns_s"] / (2 * row["pairs"] / EXTRACT_IMAGES_PER_S)
        print(f"{row['pairs']} pairs: statistics with 4 x 3 breakdowns take {share:.1%} of extracting "
              f"them at {EXTRACT_IMAGES_PER_S:g} img/s (target <= 10%)")
    if len(rows) > 1:
        base = rows[0]["score_features_no_breakdown_s"]
        for row in rows[1:]:
            ratio = row["score_features_no_breakdown_s"] / base
            print(f"{row['pairs']} vs {rows[0]['pairs']} pairs: {ratio:.1f}x the time "
                  f"for {row['pairs'] / rows[0]['pairs']:.0f}x the pairs")


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
    _ratios(rows)


if __name__ == "__main__":
    main()
