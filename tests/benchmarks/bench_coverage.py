"""Coverage of the 95% intervals of the relative drift and of the probe gap (prints tables).

    python tests/benchmarks/bench_coverage.py                  # both grids, 1,000 runs a cell
    python tests/benchmarks/bench_coverage.py --what drift --reps 400 --exact
    python tests/benchmarks/bench_coverage.py --what probe --n 60

Drift: for each feature family and number of pairs, the share of runs whose interval
holds the true relative drift, computed once on a large independent sample of the same
generator (mean cosine drift over 200,000 pairs / median cosine distance of 2 million
random pairs of different scenes). Columns: the interval before (percentile bootstrap of
the per-pair drifts, median held fixed), the same with BCa, and the pair bootstrap that
recomputes mean and median (``paired_drift``; plain and expanded percentile). ``--exact``
adds the pair bootstrap with the median recomputed exactly from the resampled rows
(slow: O(resamples x n^2) a run).

Probe: paired nulls (views exchangeable within pairs, so the true clean - cluttered gap of
any probe is 0), labels that depend on the scene only through the mean of both views
(which keeps the null), test_fraction 0.3. Columns: coverage of 0 by the plain
percentile, BCa, expanded percentile and symmetric expanded percentile intervals of the
gap from the same resamples, by ``linear_probes``' own ``gap_ci``, and the share of runs
read ``decodable``.

A cell's Monte Carlo standard error is sqrt(p (1 - p) / runs): 0.7 points at 95% and
1,000 runs.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
from scipy.spatial.distance import pdist, squareform
from scipy.stats import bootstrap, norm

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

from nulls import null  # noqa: E402

from invariance.metrics import drift as drift_mod  # noqa: E402
from invariance.metrics import probe as probe_mod  # noqa: E402

RESAMPLES = 2000
TRUTH_PAIRS = 200_000
TRUTH_SCENE_PAIRS = 2_000_000
# Scene factors of the "few factors" families: encoder features of photographs have a
# few dominant directions (common practice); 4 is an arbitrary small number.
FACTORS = 4


def _few_factors(observe):
    def generate(n, d, rng):
        mixing = np.random.default_rng(99).standard_normal((FACTORS, d)) / np.sqrt(FACTORS)
        scene = rng.standard_normal((n, FACTORS)) @ mixing + 0.3 * rng.standard_normal((n, d))
        views = [scene + 0.3 * rng.standard_normal((n, d)) for _ in range(2)]
        return observe(views[0]), observe(views[1])

    return generate


def _lognormal(n, d, rng):
    clean, cluttered = null("paired_shared", n, d, rng)
    return np.exp(clean), np.exp(cluttered)


DRIFT_FAMILIES = {
    "gaussian": lambda n, d, rng: null("paired_shared", n, d, rng),
    "relu_sparse": lambda n, d, rng: null("relu_sparse", n, d, rng),
    "heavy_tailed": lambda n, d, rng: null("heavy_tailed", n, d, rng),
    "lognormal": _lognormal,
    "few_factors_gaussian": _few_factors(lambda v: v + 1.0),
    "few_factors_relu": _few_factors(lambda v: np.maximum(v, 0.0)),
    "few_factors_lognormal": _few_factors(np.exp),
}


def _unit(A):
    return A / np.linalg.norm(A, axis=1, keepdims=True)


def _true_drift(generate, d, rng):
    clean, cluttered = generate(TRUTH_PAIRS, d, rng)
    keep = (np.abs(clean).sum(1) > 0) & (np.abs(cluttered).sum(1) > 0)
    clean, cluttered = _unit(clean[keep]), _unit(cluttered[keep])
    mean = (0.5 * ((clean - cluttered) ** 2).sum(1)).mean()
    i, j = rng.integers(0, clean.shape[0], (2, TRUTH_SCENE_PAIRS))
    i, j = i[i != j], j[i != j]
    return mean / np.median(0.5 * ((clean[i] - clean[j]) ** 2).sum(1))


def _exact_resampled_ratios(raw, scene, seed):
    """Pair bootstrap recomputing the median from the resampled rows (distinct origins)."""
    n = raw.size
    distance = squareform(scene)
    upper = np.triu_indices(n, 1)
    rng = np.random.default_rng(seed)
    out = np.empty(RESAMPLES)
    for b in range(RESAMPLES):
        idx = rng.integers(0, n, n)
        i, j = idx[upper[0]], idx[upper[1]]
        keep = i != j
        out[b] = raw[idx].mean() / np.median(distance[i[keep], j[keep]])
    return out


def _expanded(values, n):
    low, high = probe_mod._expanded_levels(n)
    return tuple(np.percentile(values, [low, high]))


def _drift_intervals(clean, cluttered, seed, exact):
    clean_u, cluttered_u = _unit(clean), _unit(cluttered)
    n = clean.shape[0]
    rows = drift_mod._typical_rows(n)
    scene = drift_mod._scene_distances(clean_u, rows)
    typical = float(np.median(scene))
    raw = 0.5 * ((clean_u - cluttered_u) ** 2).sum(1)
    rng = np.random.default_rng(seed)
    out = {}
    for method in ("percentile", "BCa"):
        res = bootstrap((raw / typical,), np.mean, n_resamples=RESAMPLES, method=method, rng=rng)
        out[f"fixed median, {method}"] = tuple(res.confidence_interval)
    ratios = drift_mod._resampled_ratios(raw, rows, scene, typical, seed, RESAMPLES)
    out["both, percentile"] = tuple(np.percentile(ratios, [2.5, 97.5]))
    out["both, expanded"] = _expanded(ratios, n)
    reported = drift_mod.paired_drift(clean, cluttered, seed=seed)["relative_drift_ci"]
    out["paired_drift"] = tuple(reported)
    if exact:
        out["both exact, percentile"] = tuple(
            np.percentile(_exact_resampled_ratios(raw, scene, seed), [2.5, 97.5])
        )
    return out


def _drift_grid(ns, d, reps, exact):
    print(f"\nRelative drift: coverage of the true value by nominal 95% intervals, d = {d}, "
          f"{reps} runs a cell, {RESAMPLES} resamples")
    header = None
    for name, generate in DRIFT_FAMILIES.items():
        truth = _true_drift(generate, d, np.random.default_rng(12345))
        for n in ns:
            rng = np.random.default_rng(n)
            hits, start = {}, time.perf_counter()
            for rep in range(reps):
                clean, cluttered = generate(n, d, rng)
                if not (np.abs(clean).sum(1) > 0).all() or not (np.abs(cluttered).sum(1) > 0).all():
                    continue  # a zero row: not computable, as paired_drift says
                for method, (low, high) in _drift_intervals(clean, cluttered, rep, exact).items():
                    hits.setdefault(method, []).append(low <= truth <= high)
            if header is None:
                header = list(hits)
                print(f"{'family':24s} {'n':>4s} {'truth':>7s} " + " ".join(f"{m:>24s}" for m in header))
            cells = " ".join(f"{np.mean(hits[m]):24.3f}" for m in header)
            print(f"{name:24s} {n:4d} {truth:7.4f} {cells}   ({len(hits[header[0]])} runs, "
                  f"{time.perf_counter() - start:.0f} s)", flush=True)


def _probe_tasks(clean, cluttered, rng):
    """Labels that see the scene only through the mean of both views (keeps the null)."""
    both = 0.5 * (clean + cluttered)
    n = both.shape[0]
    signal = both[:, 0] - np.median(both[:, 0])
    return {
        "two classes, informative": np.where(signal > 0, "a", "b").astype(object),
        "90/10 classes, no information": np.where(rng.random(n) < 0.9, "a", "b").astype(object),
        "number, informative": signal + 0.5 * signal.std() * rng.standard_normal(n),
        "number, no information": rng.standard_normal(n),
    }


def _gap_intervals(kind, y, preds, seed):
    """Percentile, BCa, expanded and symmetric expanded intervals from the same resamples."""
    gaps = probe_mod._resampled_differences(kind, y, preds, seed, RESAMPLES)[0]

    def gap(keep):
        return probe_mod._score(kind, y[keep], preds["clean"][keep]) - probe_mod._score(
            kind, y[keep], preds["cluttered"][keep])

    everything = np.arange(y.size)
    observed = gap(everything)
    jack = np.array([gap(np.delete(everything, i)) for i in range(y.size)])
    spread = jack.mean() - jack
    denom = 6.0 * ((spread**2).sum()) ** 1.5
    accel = (spread**3).sum() / denom if denom > 0 else 0.0
    z0 = norm.ppf(np.clip((gaps < observed).mean() + 0.5 * (gaps == observed).mean(), 1e-6, 1 - 1e-6))
    z = norm.ppf([0.025, 0.975])
    levels = norm.cdf(z0 + (z0 + z) / (1.0 - accel * (z0 + z)))
    return {"percentile": tuple(np.percentile(gaps, [2.5, 97.5])),
            "BCa": tuple(np.percentile(gaps, 100.0 * levels)),
            "expanded": probe_mod._interval(gaps, observed, y.size, symmetric=False),
            "symmetric": probe_mod._interval(gaps, observed, y.size, symmetric=True)}


def _probe_run(clean, cluttered, tasks, seed):
    """linear_probes' entries, with the plain and BCa intervals of the same predictions."""
    captured = []
    chosen = probe_mod._bootstrap

    def capture(kind, y, preds, point, seed_, resamples):
        captured.append(_gap_intervals(kind, y, preds, seed_))
        return chosen(kind, y, preds, point, seed_, resamples)

    probe_mod._bootstrap = capture
    try:
        result = probe_mod.linear_probes(clean, cluttered, tasks, seed=seed)
    finally:
        probe_mod._bootstrap = chosen
    others = iter(captured)
    return {name: (entry, next(others)) for name, entry in result.items() if "not_computable" not in entry}


_PROBE_COLUMNS = ("percentile", "BCa", "expanded", "symmetric", "linear_probes")


def _probe_grid(ns, d, reps):
    print(f"\nProbe gap under paired nulls: coverage of the true gap 0 by nominal 95% intervals, "
          f"d = {d}, {reps} runs a cell, test_fraction 0.3; 'symmetric' is the expanded "
          f"interval's width centred on the gap; last column: share read decodable")
    print(f"{'null':14s} {'n':>4s} {'test':>4s} {'task':30s} "
          + " ".join(f"{c:>13s}" for c in _PROBE_COLUMNS) + f" {'decodable':>9s}")
    for kind in ("paired_shared", "heavy_tailed", "relu_sparse"):
        for n in ns:
            rng = np.random.default_rng(n + 7)
            rows = {}
            for rep in range(reps):
                clean, cluttered = null(kind, n, d, rng)
                tasks = _probe_tasks(clean, cluttered, rng)
                for task, (entry, others) in _probe_run(clean, cluttered, tasks, rep).items():
                    row = rows.setdefault(task, {"test": entry["n_test"], "decodable": []})
                    others["linear_probes"] = entry["gap_ci"]
                    for column in _PROBE_COLUMNS:
                        low, high = others[column]
                        row.setdefault(column, []).append(low <= 0.0 <= high)
                    row["decodable"].append(entry["decodable"])
            for task, row in rows.items():
                cells = " ".join(f"{np.mean(row[c]):13.3f}" for c in _PROBE_COLUMNS)
                print(f"{kind:14s} {n:4d} {row['test']:4d} {task:30s} {cells} "
                      f"{np.mean(row['decodable']):9.3f}", flush=True)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--what", choices=("drift", "probe", "both"), default="both")
    parser.add_argument("--n", type=int, nargs="+", default=[60, 120, 400], help="pairs per run")
    parser.add_argument("--d", type=int, default=64, help="feature width")
    parser.add_argument("--reps", type=int, default=1000, help="runs per cell")
    parser.add_argument("--exact", action="store_true", help="add the exact-median drift bootstrap")
    args = parser.parse_args()
    if args.what in ("drift", "both"):
        _drift_grid(args.n, args.d, args.reps, args.exact)
    if args.what in ("probe", "both"):
        _probe_grid(args.n, args.d, args.reps)


if __name__ == "__main__":
    main()
