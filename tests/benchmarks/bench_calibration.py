"""Calibration, power and speed of the domain classifier's tests (prints tables).

    python tests/benchmarks/bench_calibration.py                  # everything (about 15 min on 2 cores)
    python tests/benchmarks/bench_calibration.py --only calibration --reps 200
    python tests/benchmarks/bench_calibration.py --only speed

Calibration: under each null of tests/nulls.py, the share of runs with p <= 0.05 must lie
inside the binomial 99% band around 5% for that many runs (scipy.stats.binom), and the
95% interval must cover 0.5 in >= 93% of runs. Both tests share their permutations, so
their rates come from the same runs. Power: a shift of 0.35 sd in a quarter of the
dimensions (tests/nulls.py ``shifted``) at n = 120, d = 32, and smaller shifts that tell
the two statistics apart. Coverage of the true accuracy: under a shift, how often the
interval holds the expected held-out accuracy of the same procedure trained on as many
pairs as a training fold, estimated on fresh pairs. Speed: one call at n = 2000, d = 512,
1000 permutations, beside the logistic-regression classifier with a binomial test that
preceded it (re-created here with scikit-learn). Figures vary with machine load.
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

from nulls import KINDS, null, shifted  # noqa: E402

from invariance.metrics import domain  # noqa: E402

ALPHA = 0.05
# the acceptance: rejection inside the binomial 99% band, coverage >= 93%
BAND = 0.99
MIN_COVERAGE = 0.93


def band(reps, alpha=ALPHA, level=BAND):
    """Rejection rates a level-alpha test stays within in ``level`` of ``reps``-run studies."""
    tail = (1 - level) / 2
    return binom.ppf(tail, reps, alpha) / reps, binom.isf(tail, reps, alpha) / reps


def run_cell(gen, kind, n, d, reps, permutations, seed=0, **kw):
    """Rejection rates of both statistics and coverage of 0.5 over ``reps`` runs."""
    paired = accuracy = covered = 0
    for r in range(reps):
        clean, cluttered = gen(kind, n, d, np.random.default_rng([seed, n, d, r]), **kw)
        out = domain.domain_classifier(clean, cluttered, seed=r, permutations=permutations)
        paired += out["p_value_paired"] <= ALPHA
        accuracy += out["p_value_accuracy"] <= ALPHA
        covered += out["ci"][0] <= 0.5 <= out["ci"][1]
    return paired / reps, accuracy / reps, covered / reps


def calibration(kinds, ns, ds, reps, permutations):
    low, high = band(reps)
    print(f"\nNull calibration: {reps} runs a cell, {permutations} permutations, alpha = {ALPHA}; "
          f"99% band of the rejection rate [{low:.3f}, {high:.3f}]; coverage of 0.5 >= {MIN_COVERAGE}")
    print(f"{'null':14s} {'n':>4s} {'d':>4s} {'reject paired':>13s} {'reject acc':>10s} "
          f"{'cover 0.5':>9s}  verdict   seconds")
    failures = 0
    for kind in kinds:
        for n in ns:
            for d in ds:
                start = time.perf_counter()
                paired, acc, cover = run_cell(null, kind, n, d, reps, permutations)
                # the verdict is on the reported (paired) test and the interval; the
                # accuracy test's rate is shown beside it
                ok = low <= paired <= high and cover >= MIN_COVERAGE
                failures += not ok
                print(f"{kind:14s} {n:4d} {d:4d} {paired:13.3f} {acc:10.3f} {cover:9.3f}  "
                      f"{'ok' if ok else 'OUTSIDE':8s} {time.perf_counter() - start:7.1f}", flush=True)
    print(f"cells outside: {failures}")


def power(reps, permutations):
    print(f"\nPower: share of {reps} runs with p <= {ALPHA} ({permutations} permutations); "
          f"shift in sd of a quarter of the dimensions")
    print(f"{'kind':14s} {'n':>4s} {'d':>4s} {'shift':>5s} {'paired':>7s} {'accuracy':>8s}")
    cells = [(kind, 120, 32, 0.35) for kind in KINDS]
    cells += [("iid", 120, 32, 0.2), ("paired_shared", 120, 32, 0.05),
              ("heavy_tailed", 120, 32, 0.1), ("relu_sparse", 120, 32, 0.2),
              ("iid", 120, 512, 0.07), ("paired_shared", 60, 512, 0.05)]
    for kind, n, d, size in cells:
        paired, acc, _ = run_cell(shifted, kind, n, d, reps, permutations, seed=1, shift=size)
        print(f"{kind:14s} {n:4d} {d:4d} {size:5.2f} {paired:7.3f} {acc:8.3f}", flush=True)


def _expected_accuracy(kind, n, d, folds, size, fits=100, fresh=5000):
    """Mean accuracy on fresh pairs of the classifier fitted on one training fold's pairs."""
    m = n - n // folds  # the larger training folds of np.array_split hold n - floor(n/k)
    lams = [domain._RIDGE_PER_INVERSE_C / c for c in sorted(domain.DEFAULT_CS)]
    accs = []
    for f in range(fits):
        rng = np.random.default_rng([7, n, d, f])
        train = np.vstack(shifted(kind, m, d, rng, shift=size))
        test = np.vstack(shifted(kind, fresh, d, rng, shift=size))
        X = np.vstack([train, test])
        Z_train, Z_test = domain._standardised(X, np.arange(2 * m), np.arange(2 * m, len(X)))
        scores, _, _ = domain._fold_scores(Z_train, Z_test, np.ones((m, 1)), lams)
        accs.append(((scores[:fresh, 0] <= 0).sum() + (scores[fresh:, 0] > 0).sum()) / (2 * fresh))
    return float(np.mean(accs))


def true_coverage(reps, permutations):
    print(f"\nCoverage of the expected accuracy under a shift ({reps} runs, 5 folds, "
          f"{permutations} permutations)")
    print(f"{'kind':14s} {'n':>4s} {'d':>4s} {'shift':>5s} {'expected acc':>12s} {'mean acc':>8s} {'coverage':>8s}")
    for kind, n, d, size in (("iid", 120, 32, 0.35), ("paired_shared", 120, 32, 0.35),
                             ("heavy_tailed", 120, 32, 0.35), ("relu_sparse", 400, 128, 0.35)):
        target = _expected_accuracy(kind, n, d, 5, size)
        hits, accs = 0, []
        for r in range(reps):
            clean, cluttered = shifted(kind, n, d, np.random.default_rng([3, n, d, r]), shift=size)
            out = domain.domain_classifier(clean, cluttered, seed=r, permutations=permutations)
            hits += out["ci"][0] <= target <= out["ci"][1]
            accs.append(out["accuracy"])
        print(f"{kind:14s} {n:4d} {d:4d} {size:5.2f} {target:12.3f} {np.mean(accs):8.3f} "
              f"{hits / reps:8.3f}", flush=True)


def _logistic_binomial(clean, cluttered, folds=5, seed=0, Cs=(1e-3, 1e-2, 1e-1, 1.0)):
    """The classifier before this one: standardised L2 logistic regression, C chosen by an
    inner grouped 3-fold search, pooled held-out accuracy, one-sided binomial p-value."""
    from scipy.stats import binomtest
    from sklearn.linear_model import LogisticRegressionCV
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler
    from threadpoolctl import threadpool_limits

    import inspect

    # pure L2 and the simplified attributes, as the earlier module asked of scikit-learn >= 1.9
    extra = ({"l1_ratios": (0.0,), "use_legacy_attributes": False}
             if "use_legacy_attributes" in inspect.signature(LogisticRegressionCV).parameters else {})
    n = len(clean)
    X, y = np.vstack([clean, cluttered]), np.r_[np.zeros(n), np.ones(n)]
    correct = 0
    with threadpool_limits(limits=1):
        for train, test in domain.paired_folds(n, folds, seed=seed):
            inner = domain.paired_folds(len(train) // 2, 3, seed=seed)
            model = make_pipeline(StandardScaler(), LogisticRegressionCV(
                Cs=list(Cs), cv=inner, scoring="accuracy", max_iter=2000, **extra))
            model.fit(X[train], y[train])
            correct += int((model.predict(X[test]) == y[test]).sum())
    return correct / (2 * n), binomtest(correct, 2 * n, 0.5, alternative="greater").pvalue


def agreement(reps=30):
    """Mean held-out accuracy of the ridge classifier and of the logistic regression."""
    print(f"\nAgreement with the logistic-regression classifier (mean accuracy over {reps} runs)")
    print(f"{'data':34s} {'ridge':>6s} {'logistic':>8s} {'mean |diff|':>11s}")
    for kind, n, d, size in (("iid", 120, 32, 0.35), ("paired_shared", 60, 128, 0.2),
                             ("relu_sparse", 120, 16, 0.35)):
        pairs = [shifted(kind, n, d, np.random.default_rng([11, r]), shift=size) for r in range(reps)]
        ridge = np.array([domain.domain_classifier(a, b, seed=r, permutations=0)["accuracy"]
                          for r, (a, b) in enumerate(pairs)])
        logistic = np.array([_logistic_binomial(a, b, seed=r)[0] for r, (a, b) in enumerate(pairs)])
        print(f"{kind + f' n={n} d={d} shift={size}':34s} {ridge.mean():6.3f} {logistic.mean():8.3f} "
              f"{np.abs(ridge - logistic).mean():11.3f}", flush=True)
    import test_blended_digits as digits

    images, _ = digits._clean_digits()
    clean, cluttered = digits._encoder(images), digits._encoder(digits._blended(images))
    ridge = domain.domain_classifier(clean, cluttered, permutations=0)["accuracy"]
    print(f"{'blended digits (tests/)':34s} {ridge:6.3f} {_logistic_binomial(clean, cluttered)[0]:8.3f}")


def speed(n=2000, d=512, permutations=1000):
    clean, cluttered = shifted("paired_shared", n, d, np.random.default_rng(0), shift=0.05)
    print(f"\nSpeed: one call at n = {n}, d = {d} (seconds, this machine, now)")
    start = time.perf_counter()
    out = domain.domain_classifier(clean, cluttered, permutations=permutations)
    new = time.perf_counter() - start
    print(f"  ridge + {permutations} permutations: {new:7.2f} s  accuracy {out['accuracy']:.3f}")
    start = time.perf_counter()
    acc, _ = _logistic_binomial(clean, cluttered)
    old = time.perf_counter() - start
    print(f"  logistic regression + binomial test: {old:7.2f} s  accuracy {acc:.3f}")


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--only", choices=("calibration", "power", "coverage", "agreement", "speed"))
    parser.add_argument("--reps", type=int, default=200)
    parser.add_argument("--permutations", type=int, default=200)
    parser.add_argument("--kinds", nargs="*", default=list(KINDS))
    parser.add_argument("--pairs", type=int, nargs="*", default=[60, 120, 400])
    parser.add_argument("--dims", type=int, nargs="*", default=[16, 128, 512])
    args = parser.parse_args()
    if args.only in (None, "calibration"):
        calibration(args.kinds, args.pairs, args.dims, args.reps, args.permutations)
    if args.only in (None, "power"):
        power(args.reps, args.permutations)
    if args.only in (None, "coverage"):
        true_coverage(args.reps, args.permutations)
    if args.only in (None, "agreement"):
        agreement()
    if args.only in (None, "speed"):
        speed()


if __name__ == "__main__":
    main()
