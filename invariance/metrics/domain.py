"""Domain classifier: can a linear model tell clean from cluttered features?

A closed-form ridge classifier on standardised features, cross-validated with folds over
pairs, tested by permuting views within pairs (Ojala & Garriga, JMLR 11, 2010, test 1),
with an interval of the held-out accuracy valid for cross-validation (pair bootstrap
joined with the inverted permutation test) and the proxy A-distance (Ben-David et al.,
NIPS 2006).
"""

from __future__ import annotations

import numpy as np
from threadpoolctl import threadpool_limits

from invariance.errors import InvarianceError
from invariance.readings import small_sample_note

# A small log-spaced grid of inverse regularisation strengths on standardised features.
# Ganin et al. (JMLR 2016, section 3.2) pick the linear classifier's C over a range and
# keep the best held-out error; four decades cover strong regularisation (needed when
# d >> n) to mild (common practice).
DEFAULT_CS = (1e-3, 1e-2, 1e-1, 1.0)

# The ridge penalty that stands for an inverse strength C: the logistic loss
# log(1 + exp(-y f)) is log 2 - y f / 2 + f^2 / 8 + O(f^4) at f = 0, so C * sum(loss) +
# |w|^2 / 2 is, to second order, (C / 8) (sum((2 y - f)^2) + (4 / C) |w|^2) + const: ridge
# with penalty 4 / C (its sign predictions do not depend on the target scale 2).
_RIDGE_PER_INVERSE_C = 4.0

# Held-out pairs per outer fold below which the fold accuracy is too coarse to be useful
# (a fold needs both domains of at least two scenes; common practice).
MIN_PAIRS_PER_FOLD = 2

# Rabanser, Guennemann & Lipton, NeurIPS 2019, section 3.2: domain classifiers do poorly
# with 100 samples or fewer.
SMALL_SAMPLE_PAIRS = 100

# Pairs used at most; above this a seeded subsample bounds the time and memory of the
# permutation products (the 95% interval is then about +-1.4 points wide, enough to read).
MAX_PAIRS = 5000

# Permutations of the test by default: the Monte Carlo p-value's standard error at
# p = 0.05 is sqrt(0.05 * 0.95 / 1000) = 0.007 (Ojala & Garriga 2010 use 1000).
DEFAULT_PERMUTATIONS = 1000
# Fewest permutations accepted: with B permutations the smallest p-value is 1 / (B + 1),
# and B = 19 is the least that can reach p = 0.05 (common practice).
MIN_PERMUTATIONS = 20

# Pair-bootstrap resamples of the interval (Efron & Tibshirani 1993, ch. 13, recommend
# >= 1000 for percentiles), and its two-sided level.
BOOTSTRAP_RESAMPLES = 2000
CONFIDENCE = 0.95

# Threads of the BLAS products: on the busy 2-core test machine one thread ran a call
# (n=120, d=32, 1000 permutations) in 0.15 s against 1.1 s with two (oversubscribed cores
# stall threaded products; tests/benchmarks/bench_stats.py shows the effect).
_FIT_THREADS = 1

# Columns whose training standard deviation is below this multiple of float64 epsilon
# times their magnitude are constant: scikit-learn's StandardScaler treats them the same.
_CONSTANT_EPS = 10.0


def _check_int(name, value, low):
    """Return ``value`` as int if it is an integer >= ``low``, else a clear error."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
        raise InvarianceError(f"{name} must be an integer >= {low}; got {value!r}")
    return int(value)


# Largest feature magnitude accepted: the statistics sum squares of up to ~1e8 entries, and
# (1e100)^2 * 1e8 = 1e208 stays far below float64's 1.8e308.
MAX_ABS_FEATURE = 1e100
# float32 overflows at 3.4e38: squares of values above 1e15 summed over 1e8 entries would,
# so such arrays are computed in float64.
_FLOAT32_SAFE_ABS = 1e15


def _checked_magnitude(name, arr):
    peak = float(np.max(np.abs(arr))) if arr.size else 0.0
    if peak > MAX_ABS_FEATURE:
        raise InvarianceError(
            f"{name} features reach {peak:.3g}, too large to square without overflow (limit "
            f"{MAX_ABS_FEATURE:.0e}): divide both feature matrices by one constant first"
        )
    if arr.dtype != np.float64 and peak > _FLOAT32_SAFE_ABS:
        arr = arr.astype(np.float64)
    return arr


def _validate_pairs(clean, cluttered, *, min_pairs=1):
    """Return ``clean`` and ``cluttered`` as 2-D float arrays of equal shape."""
    clean = np.asarray(clean)
    cluttered = np.asarray(cluttered)
    if clean.ndim != 2 or cluttered.ndim != 2:
        raise InvarianceError(
            f"clean and cluttered features must be 2-D (n_pairs, d); got shapes "
            f"{clean.shape} and {cluttered.shape}: reshape to one row per image"
        )
    if clean.shape != cluttered.shape:
        raise InvarianceError(
            f"clean features have shape {clean.shape} but cluttered features have shape "
            f"{cluttered.shape}: give one row per pair, in the same order, same layer"
        )
    if not np.issubdtype(clean.dtype, np.floating):
        clean = clean.astype(np.float64)
    if not np.issubdtype(cluttered.dtype, np.floating):
        cluttered = cluttered.astype(np.float64)
    if clean.shape[1] == 0:
        raise InvarianceError(
            f"the features have 0 columns (shape {clean.shape}): give at least one feature per "
            f"image (check the layer or the arrays you saved)"
        )
    for name, arr in (("clean", clean), ("cluttered", cluttered)):
        bad = ~np.isfinite(arr).all(axis=1)
        if bad.any():
            rows = ", ".join(map(str, np.flatnonzero(bad)[:5])) + (", ..." if bad.sum() > 5 else "")
            raise InvarianceError(
                f"{name} features contain NaN or inf in {int(bad.sum())} of "
                f"{arr.shape[0]} rows (rows {rows}): remove those pairs or fix the feature extraction"
            )
    clean = _checked_magnitude("clean", clean)
    cluttered = _checked_magnitude("cluttered", cluttered)
    if clean.dtype != cluttered.dtype:
        clean, cluttered = clean.astype(np.float64), cluttered.astype(np.float64)
    if clean.shape[0] < min_pairs:
        raise InvarianceError(
            f"only {clean.shape[0]} pairs of features; need at least {min_pairs}: "
            f"add more pairs"
        )
    return clean, cluttered


def check_groups(groups, n, *, what="pairs"):
    """Group labels as an int array of shape (n,) (codes 0..G-1), or None for one group a row.

    Parameters
    ----------
    groups : array-like of shape (n,) or None
        Any hashable labels (episode names, numbers); rows that share a label are one unit
        of every split and resample.
    n : int
        Rows expected.

    Returns
    -------
    ndarray of int or None
    """
    if groups is None:
        return None
    values = np.asarray(groups)
    if values.ndim != 1 or values.shape[0] != n:
        raise InvarianceError(
            f"groups has shape {values.shape}; it needs one group label per {what[:-1]} ({n},): "
            f"give the episode of each row, in the order of the features"
        )
    # Whole numbers keep their numeric order, so codes passed back in come out unchanged and
    # the same data give the same folds (and p-values) whether names or codes are passed;
    # as text, 10 would sort before 2.
    keys = values if values.dtype.kind in "iub" else values.astype(str)
    _, codes = np.unique(keys, return_inverse=True)
    return codes.astype(np.intp)


def grouping_info(groups, n, *, what="pair"):
    """The ``grouping`` record of a result: the unit of every split and how many there are."""
    if groups is None:
        return {"unit": what, "groups": int(n)}
    return {"unit": "group", "groups": int(np.unique(groups).size)}


def _group_partition(codes, folds, seed):
    """Groups shuffled (seeded), then dealt to the fold with the fewest rows so far.

    Folds of near-equal row counts even when episodes differ in length (greedy
    longest-first packing after a seeded shuffle; common practice).
    """
    n_groups = int(codes.max()) + 1
    if n_groups < folds:
        raise InvarianceError(
            f"only {n_groups} groups (episodes) for {folds} folds; every fold needs a whole "
            f"group: add episodes or lower folds"
        )
    sizes = np.bincount(codes, minlength=n_groups)
    order = np.random.default_rng(seed).permutation(n_groups)
    order = order[np.argsort(-sizes[order], kind="stable")]
    load, fold_of = np.zeros(folds), np.empty(n_groups, dtype=np.intp)
    for g in order:
        k = int(np.argmin(load))
        fold_of[g], load[k] = k, load[k] + sizes[g]
    return fold_of


def paired_folds(n_pairs, folds, *, seed=0, groups=None):
    """Grouped K-fold splits over pairs for rows stacked as [clean; cluttered].

    Pair indices are shuffled by a seeded permutation and cut into ``folds`` contiguous
    groups of near-equal size; a held-out fold holds both images of its scenes.

    Parameters
    ----------
    n_pairs : int
        Number of pairs; rows ``i`` and ``n_pairs + i`` of the stacked matrix are pair i.
    folds : int
        Number of folds, at least 2.
    seed : int
        Seed of the permutation of pair indices.

    groups : ndarray of int, optional
        Group code per pair (:func:`check_groups`): all pairs of a group (an episode) are
        held out together, so correlated frames of one episode never sit on both sides.

    Returns
    -------
    list of (train, test) tuples of int arrays
        Row indices into the stacked ``2 * n_pairs`` matrix. Training rows are ordered
        [clean of the training pairs; cluttered of the same pairs, same order].
    """
    if groups is not None:
        fold_of = _group_partition(groups, folds, seed)[groups]
        held_sets = [np.flatnonzero(fold_of == k) for k in range(folds)]
    else:
        order = np.random.default_rng(seed).permutation(n_pairs)
        held_sets = [order[held] for held in np.array_split(np.arange(n_pairs), folds)]
    splits = []
    for held in held_sets:
        test_pairs = np.sort(held)
        train_pairs = np.setdiff1d(np.arange(n_pairs), test_pairs)
        train = np.concatenate([train_pairs, train_pairs + n_pairs])
        test = np.concatenate([test_pairs, test_pairs + n_pairs])
        splits.append((train, test))
    return splits


def _check_params(folds, seed, Cs, permutations):
    _check_int("folds", folds, 2)
    _check_int("seed", seed, 0)
    Cs = tuple(float(c) for c in np.atleast_1d(Cs))
    if not Cs or not all(np.isfinite(c) and c > 0 for c in Cs):
        raise InvarianceError(f"Cs must be one or more finite values > 0; got {Cs!r}")
    _check_int("permutations", permutations, 0)
    if 0 < permutations < MIN_PERMUTATIONS:
        raise InvarianceError(
            f"permutations={permutations} can reach no p-value below 1/(B+1) = "
            f"{1 / (permutations + 1):.3g}; give at least {MIN_PERMUTATIONS} (1000 is the "
            f"default), or 0 for the accuracy without a test"
        )
    # strongest penalty first, so ties in the inner search go to it
    return tuple(sorted(set(Cs)))


def _standardised(X, train, test):
    """Training and held-out rows scaled by the training rows' mean and sd.

    Constant columns (sd within rounding of zero) become zero instead of noise.
    """
    mean = X[train].mean(axis=0)
    sd = X[train].std(axis=0)
    constant = sd <= _CONSTANT_EPS * np.finfo(np.float64).eps * np.maximum(np.abs(mean), 1.0)
    scale = np.where(constant, np.inf, sd)
    return (X[train] - mean) / scale, (X[test] - mean) / scale


def _basis(Z):
    """Thin SVD Z = U diag(S) V' of a centred matrix, via the smaller Gram matrix.

    Directions with squared singular values below the Gram matrix's rounding level
    (largest eigenvalue * max(shape) * eps, as numpy.linalg.matrix_rank) are dropped.
    """
    rows, cols = Z.shape
    primal = cols <= rows
    ev, W = np.linalg.eigh(Z.T @ Z if primal else Z @ Z.T)
    top = max(ev[-1], 0.0) if ev.size else 0.0
    keep = ev > top * max(rows, cols) * np.finfo(np.float64).eps
    S, W = np.sqrt(ev[keep]), W[:, keep]
    if primal:
        return (Z @ W) / S, S, W
    return W, S, (Z.T @ W) / S


def _pair_deletion_error(U, S, M, signs, lam):
    """Leave-one-pair-out squared error of ridge with penalty ``lam``, every sign column.

    For penalised least squares with an unpenalised intercept the residuals of a fit
    without block b are (I - H_bb)^-1 r_b, with H = 11'/N + U diag(S^2/(S^2+lam)) U' the
    hat matrix and r the full-fit residuals (the leave-one-out shortcut of linear
    smoothers, Hastie, Tibshirani & Friedman, The Elements of Statistical Learning, 2nd
    ed., 2009, ch. 7, from memory; the block form follows from the Woodbury identity and
    the tests check it against refits). Both images of a scene leave together. The N x columns
    products run in ``U.dtype`` (float32 halves their time; the errors only rank penalties).
    """
    m, N = U.shape[0] // 2, U.shape[0]
    h = S**2 / (S**2 + lam)
    fitted = U @ (h[:, None] * M).astype(U.dtype)
    r_clean, r_clutter = -signs - fitted[:m], signs - fitted[m:]
    Uc, Ut = U[:m].astype(np.float64), U[m:].astype(np.float64)
    h11, h22, h12 = 1 / N + Uc**2 @ h, 1 / N + Ut**2 @ h, 1 / N + (Uc * Ut) @ h
    det = (1 - h11) * (1 - h22) - h12**2
    # rows of (I - H_bb)^-1, as columns of the residuals' dtype
    a, b, c = ((v / det)[:, None].astype(U.dtype) for v in (1 - h22, h12, 1 - h11))
    e_clean, e_clutter = a * r_clean + b * r_clutter, b * r_clean + c * r_clutter
    return np.einsum("ij,ij->j", e_clean, e_clean, dtype=np.float64) + np.einsum(
        "ij,ij->j", e_clutter, e_clutter, dtype=np.float64)


def _fold_scores(Z_train, Z_test, signs, lams):
    """Held-out decision values of one fold for every column of within-pair signs.

    The training rows are [clean; cluttered] of m pairs with labels [-s; s] for a sign
    column s (s = 1: the observed labels; a swap flips a pair's sign). Ridge on centred
    features has w = V diag(S / (S^2 + lam)) U'y and U'y = (U_clutter - U_clean)' s, so
    every column costs one product with a matrix fixed by the features alone.

    Returns
    -------
    scores : ndarray (n_test_rows, columns)
    pick : ndarray (columns,)
        Index into ``lams`` chosen per column (by the least pair-deletion error).
    rank : int
        Directions of the standardised training features that the fit can use.
    """
    m = Z_train.shape[0] // 2
    U, S, V = _basis(Z_train)
    M = (U[m:] - U[:m]).T @ signs
    if len(lams) > 1:
        U32, signs32 = U.astype(np.float32), signs.astype(np.float32)
        errors = np.stack([_pair_deletion_error(U32, S, M, signs32, lam) for lam in lams])
        pick = np.argmin(errors, axis=0)  # first minimum: the strongest penalty
    else:
        pick = np.zeros(signs.shape[1], dtype=int)
    T = Z_test @ V
    scores = np.zeros((Z_test.shape[0], signs.shape[1]))
    for i, lam in enumerate(lams):
        cols = np.flatnonzero(pick == i)
        if cols.size:
            scores[:, cols] = T @ ((S / (S**2 + lam))[:, None] * M[:, cols])
    return scores, pick, S.size


def _sign_matrix(n, permutations, seed, groups=None):
    """Column 0 all ones (the observed labels), then one random swap pattern a column.

    With groups, one flip per group, shared by all its pairs: under the null the two
    domains' recordings of one episode are exchangeable as wholes, not frame by frame.
    """
    signs = np.ones((n, permutations + 1))  # a stream of its own, apart from the subsample's
    units = n if groups is None else int(groups.max()) + 1
    flips = np.random.default_rng([seed, 2]).integers(0, 2, size=(units, permutations))
    signs[:, 1:] -= 2.0 * (flips if groups is None else flips[groups])
    return signs


def _standardised_gap(gap):
    """Sum of a fold's within-pair score gaps over their root mean square, per column.

    sqrt(q) * mean / rms for q pairs, a monotone function of the fold's one-sample t of
    the gaps, free of the score scale that moves with the penalty (common practice).
    """
    rms = np.sqrt(np.mean(gap**2, axis=0))
    return np.divide(gap.sum(axis=0), rms, out=np.zeros_like(rms), where=rms > 0)


def _cross_validated(X, n, folds, seed, Cs, permutations, groups=None):
    """Held-out statistics of every sign column (column 0: observed), and the observed fit.

    Returns a dict: ``correct`` (held-out images classified right), ``ordered`` (pairs
    whose cluttered image scores higher, ties one half), ``gap`` (the summed
    :func:`_standardised_gap`), one entry per column; ``decision``, ``C`` per fold, ``rank``.
    """
    lams = [_RIDGE_PER_INVERSE_C / c for c in Cs]
    signs = _sign_matrix(n, permutations, seed, groups)
    out = {key: np.zeros(permutations + 1) for key in ("correct", "ordered", "gap")}
    decision, chosen, rank = np.empty(2 * n), [], 0
    for train, test in paired_folds(n, folds, seed=seed, groups=groups):
        pairs_train, pairs_test = train[: len(train) // 2], test[: len(test) // 2]
        Z_train, Z_test = _standardised(X, train, test)
        scores, pick, fold_rank = _fold_scores(Z_train, Z_test, signs[pairs_train], lams)
        q, s = len(pairs_test), signs[pairs_test]
        a, b = scores[:q], scores[q:]
        # a positive decision value means "cluttered", as LogisticRegression.predict
        out["correct"] += ((a > 0) == (s < 0)).sum(axis=0) + ((b > 0) == (s > 0)).sum(axis=0)
        gap = s * (b - a)
        out["ordered"] += (gap > 0).sum(axis=0) + 0.5 * (gap == 0).sum(axis=0)
        out["gap"] += _standardised_gap(gap)
        decision[pairs_test], decision[pairs_test + n] = a[:, 0], b[:, 0]
        chosen.append(Cs[pick[0]])
        rank = max(rank, fold_rank)
    out.update(decision=decision, C=chosen, rank=rank)
    return out


def _group_bootstrap_ci(row_values, groups, seed):
    """Percentile interval of a mean over rows, resampling whole groups (episodes).

    The cluster bootstrap (Davison & Hinkley, Bootstrap Methods and their Application,
    1997, section 3.8): each resample draws G groups with replacement and takes the mean
    over all their rows, so the interval reflects the correlation within an episode.
    """
    sums = np.bincount(groups, weights=row_values)
    sizes = np.bincount(groups).astype(np.float64)
    G = sizes.size
    counts = np.random.default_rng([seed, 3]).multinomial(G, np.full(G, 1.0 / G), size=BOOTSTRAP_RESAMPLES)
    means = (counts @ sums) / (counts @ sizes)
    tail = (1 - CONFIDENCE) / 2
    low, high = np.quantile(means, [tail, 1 - tail])
    return [float(low), float(high)]


def _pair_bootstrap_ci(pair_correct, seed):
    """Percentile interval of the mean held-out correctness, resampling pairs.

    Each pair's correctness (0, 1/2 or 1: the share of its two images classified right)
    is one unit (Efron & Tibshirani, An Introduction to the Bootstrap, 1993, ch. 13). The
    mean of n draws from values {0, 1/2, 1} depends only on how many of each were drawn,
    so a resample is one multinomial draw over the three values' observed shares.
    """
    n = len(pair_correct)
    values = np.array([0.0, 0.5, 1.0])
    shares = np.array([np.mean(pair_correct == v) for v in values])
    counts = np.random.default_rng([seed, 3]).multinomial(n, shares, size=BOOTSTRAP_RESAMPLES)
    means = counts @ values / n
    tail = (1 - CONFIDENCE) / 2
    low, high = np.quantile(means, [tail, 1 - tail])
    return [float(low), float(high)]


def _interval(accuracy, pair_correct, permuted, seed, groups=None):
    """95% interval of the held-out accuracy and how it was made.

    The pair bootstrap treats pairs as independent, but cross-validated predictions are
    not (they share training pairs): under the nulls of tests/nulls.py the accuracy's
    spread was 1.25-1.35x the bootstrap's and its interval covered 0.5 in only 86-91% of
    runs. So with permutations the interval also holds the permutation test's inversion
    under a shift model (Ernst, Statistical Science 19, 2004; from memory): the values t
    for which ``accuracy - t`` lies inside the 2.5-97.5% range of the permuted accuracies'
    deviations from 0.5. At t = 0.5 that is the two-sided permutation test, so the
    coverage of 0.5 under the null is at least 95% up to Monte Carlo error; the union with
    the bootstrap keeps the interval no narrower than the bootstrap's where the shift
    model is too narrow (accuracy far from chance). Measured: coverage of 0.5 0.935-0.99
    over 36 null cells; of the expected accuracy under a shift, 0.925-0.975.
    """
    if groups is None:
        low, high = _pair_bootstrap_ci(pair_correct, seed)
        method = f"pair bootstrap percentile, {BOOTSTRAP_RESAMPLES} resamples"
    else:
        low, high = _group_bootstrap_ci(pair_correct, groups, seed)
        method = f"group (episode) bootstrap percentile, {BOOTSTRAP_RESAMPLES} resamples"
    if permuted.size:
        tail = (1 - CONFIDENCE) / 2
        q_low = float(np.quantile(permuted, tail, method="lower"))
        q_high = float(np.quantile(permuted, 1 - tail, method="higher"))
        low = min(low, accuracy - (q_high - 0.5))
        high = max(high, accuracy + (0.5 - q_low))
        method += f", joined with the inverted permutation test ({permuted.size} permutations)"
    return [max(0.0, low), min(1.0, high)], f"{method}, 95%"


def _p_value(stat):
    """(1 + #{b: T_b >= T_0}) / (B + 1) over the permuted columns (Ojala & Garriga 2010)."""
    if stat.size == 1:
        return None
    return float((1 + np.sum(stat[1:] >= stat[0])) / stat.size)


def domain_classifier(clean, cluttered, *, folds=5, seed=0, Cs=DEFAULT_CS, max_pairs=MAX_PAIRS,
                      permutations=DEFAULT_PERMUTATIONS, groups=None):
    """Held-out accuracy of a linear classifier telling clean from cluttered features, tested.

    The classifier is ridge regression on +-1 labels (a linear discriminant with shrunk
    total covariance) on features standardised within each training fold, K folds over
    pairs (a scene's two images are always held out together). Its penalty 4/C matches
    the logistic loss to second order (see ``_RIDGE_PER_INVERSE_C``); with several ``Cs``
    it is chosen in every training fold by the least leave-one-pair-out squared error,
    in closed form for the whole grid through one eigendecomposition per fold (the
    n x n dual one when d exceeds the training rows).

    The test permutes views within pairs and recomputes the whole cross-validated
    statistic, penalty search included (Ojala & Garriga, JMLR 11, 2010, test 1):
    p = (b + 1) / (B + 1), exact for any B under the paired null. A swap leaves the
    features unchanged and flips both labels of a pair, and the fit is linear in the
    labels, so all B permutations of a fold are one matrix product.

    Chosen by measurement (tests/benchmarks/bench_calibration.py; 200 runs, 200
    permutations). Leave-one-pair-out, generalised cross-validation (Golub, Heath & Wahba,
    Technometrics 1979), a Ledoit-Wolf penalty and a fixed C = 0.01 had equal power within
    noise (+-0.035); a fixed C = 1 lost power when d >> n (0.17 against 0.25 at n=120,
    d=512). Leave-one-pair-out kept the accuracy of the logistic regression this replaced
    where GCV did not, with training rows fewer than features and twin rows (mean of 30
    runs, paired_shared, n=60, d=128, 0.2 sd: 0.680 against GCV 0.651, Ledoit-Wolf 0.668,
    logistic 0.673), at 1.7-2.1 s against GCV's 1.2 s (n=2000, d=512, B=1000, one
    thread).

    The reported ``p_value`` tests the within-pair gap of held-out decision values
    (cluttered minus clean, summed per fold over its root mean square). All statistics
    tried are exact (0 of 36 null cells outside the 99% band), but the accuracy test is
    conservative under a shared scene component (ties; 0.5% rejections at n=60, d=128)
    and the gap test had the most power, gap / accuracy: 1.00 / 0.975 (iid, n=120, d=32,
    0.35 sd in a quarter of the dimensions), 0.57 / 0.455 (iid, 0.2 sd), 0.395 / 0.13
    (paired_shared, 0.05 sd), 0.995 / 0.72 (heavy_tailed, 0.1 sd), 0.985 / 0.76
    (relu_sparse, 0.2 sd), 0.88 / 0.345 (paired_shared, n=60, d=512, 0.05 sd). The share
    of pairs ordered, tried as a third statistic, lay between the two (0.955, 0.33 and
    0.81 in the first, third and last of these with a GCV search).

    Parameters
    ----------
    clean, cluttered : ndarray of shape (n_pairs, d)
        Paired features; row i of each is the same scene.
    folds : int, default=5
        Outer folds over pairs. Needs ``n_pairs >= 2 * folds``.
    seed : int, default=0
        Seed of the fold assignment, the permutations and the bootstrap.
    Cs : sequence of float, default=(1e-3, 1e-2, 1e-1, 1)
        Inverse regularisation strengths to choose from (penalty 4 / C); one value fixes C.
    max_pairs : int, default=5000
        Above this many pairs a seeded random subsample of ``max_pairs`` pairs is
        used (reported in ``method``) to bound the time.
    permutations : int, default=1000
        Within-pair swaps of the test; at least 20, or 0 for the accuracy alone
        (``p_value`` None, the interval from the bootstrap only).
    groups : array-like of shape (n_pairs,), optional
        Group (episode) of each pair. All pairs of a group share a fold and one swap of
        the permutation test, and the interval resamples groups: frames of one episode
        are correlated, so the episode, not the frame, is the independent unit (Ojala &
        Garriga's test stays exact when whole exchangeable units are permuted). Needs at
        least ``folds`` groups. Default: every pair its own group.

    Returns
    -------
    dict
        ``accuracy`` (held-out, over all 2 n_pairs images); ``ci`` (95%, see
        :func:`_interval`) and ``ci_method``; ``proxy_a_distance`` max(0, 2 (1 - 2 err))
        (Ben-David et al., NIPS 2006; Ganin et al., JMLR 2016, eq. 3); ``paired_accuracy``
        (share of pairs whose cluttered image scores higher, ties one half);
        ``p_value`` = ``p_value_paired`` (the gap test), ``p_value_accuracy`` (the
        accuracy's permutation test), ``p_value_method``, ``permutations``;
        ``classifier``; ``folds``, ``n_test``, ``C`` (chosen per fold for the observed
        labels), ``method`` ("exact" or "subsample of N pairs"), ``pairs_used``;
        ``decision`` (held-out decision value per pair used, shape (pairs_used, 2):
        clean, cluttered; positive means "cluttered"); ``small_sample`` / ``note`` when
        n_pairs <= 100 (Rabanser et al., NeurIPS 2019, section 3.2), ``note`` also when
        every feature is constant (accuracy 0.5, p-value 1).
    """
    Cs = _check_params(folds, seed, Cs, permutations)
    _check_int("max_pairs", max_pairs, MIN_PAIRS_PER_FOLD * folds)
    clean, cluttered = _validate_pairs(clean, cluttered)
    n = clean.shape[0]
    groups = check_groups(groups, n)
    method = "exact"
    if n > max_pairs:
        # a stream separate from the fold permutation's, so both stay seeded
        keep = np.sort(np.random.default_rng([seed, 1]).choice(n, max_pairs, replace=False))
        clean, cluttered, n = clean[keep], cluttered[keep], max_pairs
        method = f"subsample of {n} pairs"
        if groups is not None:
            groups = np.unique(groups[keep], return_inverse=True)[1]
    if n < MIN_PAIRS_PER_FOLD * folds:
        raise InvarianceError(
            f"only {n} pairs for {folds} folds; the domain classifier needs at least "
            f"{MIN_PAIRS_PER_FOLD * folds} pairs ({MIN_PAIRS_PER_FOLD} per fold): add "
            f"pairs or lower folds"
        )
    X = np.vstack([clean, cluttered]).astype(np.float64)
    with threadpool_limits(limits=_FIT_THREADS):
        fit = _cross_validated(X, n, folds, seed, Cs, permutations, groups)
    out = _summarise(fit, seed, groups)
    out.update(folds=int(folds), C=fit["C"], method=method, pairs_used=n, permutations=permutations,
               grouping=grouping_info(groups, n))
    search = f"chosen per fold and permutation by leave-one-pair-out error among C = {list(Cs)}"
    out["classifier"] = "ridge on standardised features, penalty 4/C, " + (
        search if len(Cs) > 1 else f"C = {Cs[0]}")
    notes = ["every feature is constant within the training folds: nothing separates the "
             "domains, so the accuracy is chance by construction"] if fit["rank"] == 0 else []
    if n <= SMALL_SAMPLE_PAIRS:
        out["small_sample"] = True
        notes.append(small_sample_note(n))
    if notes:
        out["note"] = "; ".join(notes)
    return out


def _summarise(fit, seed, groups=None):
    decision, correct, ordered = fit["decision"], fit["correct"], fit["ordered"]
    n = decision.size // 2
    a, b = decision[:n], decision[n:]
    pair_correct = ((a <= 0).astype(float) + (b > 0)) / 2
    accuracy = float(correct[0] / (2 * n))
    ci, ci_method = _interval(accuracy, pair_correct, correct[1:] / (2 * n), seed, groups)
    p_paired = _p_value(fit["gap"])
    B = correct.size - 1
    return {
        "accuracy": accuracy,
        "ci": ci,
        "ci_method": ci_method,
        # d_A takes the best hypothesis of a class closed under complement, so its error
        # is at most 1/2 (Ben-David et al., NIPS 2006): below-chance accuracy floors at 0
        "proxy_a_distance": max(0.0, 2.0 * (1.0 - 2.0 * (1.0 - accuracy))),
        "paired_accuracy": float(ordered[0] / n),
        "p_value": p_paired,
        "p_value_paired": p_paired,
        "p_value_accuracy": _p_value(correct),
        "p_value_method": (
            f"permutation of views within {'pairs' if groups is None else 'groups (one swap per episode)'}, "
            f"{B} permutations (Ojala & Garriga 2010); "
            f"statistic: within-pair gap of held-out decision values, standardised per fold"
            if B else "not tested (permutations=0)"
        ),
        "n_test": int(2 * n),
        "decision": decision.reshape(2, -1).T.copy(),
    }


# ---------------------------------------------------------------------------------------
# Unpaired domains: two samples with no scene in common (sim vs real, bench vs site).


def _validate_samples(a, b):
    """Two 2-D float arrays with the same number of columns (any row counts)."""
    a, b = np.asarray(a), np.asarray(b)
    if a.ndim != 2 or b.ndim != 2 or a.shape[1] != b.shape[1]:
        raise InvarianceError(
            f"the two domains' features must be 2-D with the same columns; got shapes {a.shape} "
            f"and {b.shape}: use the same encoder and layer for both"
        )
    # _validate_pairs checks finiteness and magnitude; it needs equal shapes, so each alone
    a = _validate_pairs(a, a)[0]
    b = _validate_pairs(b, b)[0]
    if a.dtype != b.dtype:
        a, b = a.astype(np.float64), b.astype(np.float64)
    return a, b


def sample_groups(groups_a, groups_b, n_a, n_b):
    """One int code per row of [A; B]; a domain's groups never merge with the other's.

    ``None`` makes every row of that domain its own group.
    """
    codes = []
    offset = 0
    for groups, n in ((groups_a, n_a), (groups_b, n_b)):
        g = check_groups(groups, n, what="rows")
        g = np.arange(n) if g is None else g
        codes.append(g + offset)
        offset += int(g.max()) + 1 if n else 0
    return np.concatenate(codes)


def stratified_group_folds(codes, domain_of_group, folds, seed):
    """Fold of each group: each domain's groups dealt separately, so every fold holds both.

    Within a domain, groups are shuffled (seeded) and packed into the fold with the
    fewest rows (:func:`_group_partition`).
    """
    fold_of = np.empty(domain_of_group.size, dtype=np.intp)
    for dom in (0, 1):
        members = np.flatnonzero(domain_of_group == dom)
        local = np.full(codes.max() + 1, -1)
        local[members] = np.arange(members.size)
        rows = np.flatnonzero(np.isin(codes, members))
        fold_of[members] = _group_partition(local[codes[rows]], folds, [seed, dom])
    return fold_of


def _label_matrix(domain_of_group, codes, permutations, seed):
    """Column 0 the observed +-1 domain labels per row; then labels with groups permuted.

    The ordinary permutation null of a two-sample test (Gretton et al., JMLR 13, 2012,
    section 8; Ojala & Garriga 2010): the domain labels are shuffled over the pooled
    units, here whole groups, keeping how many groups each domain has.
    """
    rng = np.random.default_rng([seed, 2])
    G = domain_of_group.size
    cols = [domain_of_group] + [domain_of_group[rng.permutation(G)] for _ in range(permutations)]
    return 2.0 * np.stack(cols, axis=1)[codes] - 1.0


def _loo_error(U, S, y, lam):
    """Leave-one-row-out squared error of ridge with an unpenalised intercept, per column.

    e_i = r_i / (1 - H_ii), H = 11'/N + U diag(S^2/(S^2+lam)) U' (Hastie, Tibshirani &
    Friedman, ESL 2nd ed., 2009, eq. 7.52 for linear smoothers; from memory).
    """
    h = S**2 / (S**2 + lam)
    resid = y - y.mean(axis=0) - U @ (h[:, None] * (U.T @ y))
    lev = 1.0 / U.shape[0] + (U**2) @ h
    return (((resid / (1.0 - lev)[:, None]) ** 2).sum(axis=0))


def _unpaired_fold(Z_train, Z_test, y_train, lams):
    """Held-out decision values (no intercept) of one fold, every label column."""
    U, S, V = _basis(Z_train)
    if len(lams) > 1:
        pick = np.argmin(np.stack([_loo_error(U, S, y_train, lam) for lam in lams]), axis=0)
    else:
        pick = np.zeros(y_train.shape[1], dtype=int)
    M, T = U.T @ y_train, Z_test @ V
    scores = np.zeros((Z_test.shape[0], y_train.shape[1]))
    for i, lam in enumerate(lams):
        cols = np.flatnonzero(pick == i)
        if cols.size:
            scores[:, cols] = T @ ((S / (S**2 + lam))[:, None] * M[:, cols])
    # fitted training values of the observed column: Z w = U diag(S) V'V coef
    fitted = (U * S) @ ((S / (S**2 + lams[pick[0]])) * M[:, 0])
    # threshold of the observed labels: midway between the classes' fitted means, so an
    # unequal number of rows per domain does not tilt the balanced accuracy
    obs = y_train[:, 0]
    threshold = 0.5 * (fitted[obs > 0].mean() + fitted[obs < 0].mean())
    return scores, pick[0], threshold, S.size


def _unpaired_cv(X, labels, fold_of_row, folds, Cs):
    """Held-out statistic per label column, and the observed column's decisions."""
    lams = [_RIDGE_PER_INVERSE_C / c for c in Cs]
    stat = np.zeros(labels.shape[1])
    predicted, chosen, rank = np.zeros(X.shape[0], dtype=bool), [], 0
    for k in range(folds):
        test, train = fold_of_row == k, fold_of_row != k
        Z_train, Z_test = _standardised(X, np.flatnonzero(train), np.flatnonzero(test))
        scores, pick, threshold, fold_rank = _unpaired_fold(Z_train, Z_test, labels[train], lams)
        predicted[test] = scores[:, 0] > threshold
        stat += _mean_difference(scores, labels[test])
        chosen.append(Cs[pick])
        rank = max(rank, fold_rank)
    return {"stat": stat, "predicted": predicted, "C": chosen, "rank": rank}


def _mean_difference(scores, y):
    """Per column: mean held-out score of the +1 rows minus the -1 rows, over the fold's sd.

    Dividing by the fold's spread removes the score scale that moves with the penalty
    (common practice); the permutation test is exact for any statistic.
    """
    pos, neg = y > 0, y < 0
    n_pos, n_neg = np.maximum(pos.sum(0), 1), np.maximum(neg.sum(0), 1)
    diff = (scores * pos).sum(0) / n_pos - (scores * neg).sum(0) / n_neg
    sd = scores.std(axis=0)
    return np.divide(diff, sd, out=np.zeros_like(diff), where=sd > 0)


def _balanced_bootstrap(correct, is_b, codes, seed):
    """Cluster-bootstrap interval of the balanced accuracy, groups resampled per domain."""
    rng = np.random.default_rng([seed, 3])
    means = []
    for dom in (False, True):
        rows = is_b == dom
        sums = np.bincount(codes[rows], weights=correct[rows].astype(float))
        sizes = np.bincount(codes[rows]).astype(float)
        keep = sizes > 0
        sums, sizes = sums[keep], sizes[keep]
        G = sizes.size
        counts = rng.multinomial(G, np.full(G, 1.0 / G), size=BOOTSTRAP_RESAMPLES)
        means.append((counts @ sums) / (counts @ sizes))
    tail = (1 - CONFIDENCE) / 2
    low, high = np.quantile((means[0] + means[1]) / 2, [tail, 1 - tail])
    return [float(low), float(high)]


def unpaired_domain_classifier(a, b, *, groups_a=None, groups_b=None, folds=5, seed=0, Cs=DEFAULT_CS,
                               permutations=DEFAULT_PERMUTATIONS):
    """Held-out balanced accuracy of a linear classifier telling domain A from domain B.

    For two samples with no scene in common: the classifier two-sample test of
    Lopez-Paz & Oquab (ICLR 2017) with the same ridge classifier and penalty search as
    :func:`domain_classifier` (leave-one-row-out error in closed form), K folds over
    groups stratified by domain (an episode is never split), and an exact permutation
    test (Ojala & Garriga, JMLR 11, 2010, test 1) that reassigns the domain labels of
    whole groups and reruns the cross-validation. The accuracy is balanced (mean of the
    two domains' held-out accuracies) so chance stays 0.5 with unequal sample sizes.

    Parameters
    ----------
    a, b : ndarray of shape (n_a, d), (n_b, d)
        Features of the two domains.
    groups_a, groups_b : array-like, optional
        Group (episode) of each row; default every row its own group. Each domain needs at
        least ``folds`` groups.
    folds, seed, Cs, permutations
        As :func:`domain_classifier`.

    Returns
    -------
    dict
        ``accuracy`` (balanced), ``ci`` (cluster bootstrap over groups, per domain),
        ``ci_method``, ``proxy_a_distance``, ``p_value``, ``p_value_method``,
        ``permutations``, ``classifier``, ``folds``, ``n_test``, ``C``, ``method``,
        ``rows_used`` ([n_a, n_b]) and ``grouping``.
    """
    Cs = _check_params(folds, seed, Cs, permutations)
    a, b = _validate_samples(a, b)
    codes = sample_groups(groups_a, groups_b, a.shape[0], b.shape[0])
    is_b = np.r_[np.zeros(a.shape[0], bool), np.ones(b.shape[0], bool)]
    domain_of_group = np.zeros(codes.max() + 1, dtype=float)
    domain_of_group[codes[is_b]] = 1.0
    fold_of_row = stratified_group_folds(codes, domain_of_group, folds, seed)[codes]
    X = np.vstack([a, b]).astype(np.float64)
    with threadpool_limits(limits=_FIT_THREADS):
        fit = _unpaired_cv(X, _label_matrix(domain_of_group, codes, permutations, seed), fold_of_row, folds, Cs)
    correct = fit["predicted"] == is_b
    accuracy = float((correct[~is_b].mean() + correct[is_b].mean()) / 2)
    n_groups = [int(np.unique(codes[~is_b]).size), int(np.unique(codes[is_b]).size)]
    return {
        "accuracy": accuracy,
        "ci": _balanced_bootstrap(correct, is_b, codes, seed),
        "ci_method": f"group bootstrap percentile of the balanced accuracy, groups resampled within each "
                     f"domain, {BOOTSTRAP_RESAMPLES} resamples, 95%",
        "proxy_a_distance": max(0.0, 2.0 * (1.0 - 2.0 * (1.0 - accuracy))),
        "p_value": _p_value(fit["stat"]),
        "p_value_method": (f"permutation of domain labels over whole groups, {permutations} permutations "
                           f"(Ojala & Garriga 2010); statistic: held-out mean decision difference, "
                           f"standardised per fold" if permutations else "not tested (permutations=0)"),
        "permutations": permutations,
        "classifier": "ridge on standardised features, penalty 4/C, chosen per fold and permutation by "
                      f"leave-one-row-out error among C = {list(Cs)}",
        "folds": int(folds), "n_test": int(X.shape[0]), "C": fit["C"], "method": "exact",
        "rows_used": [int(a.shape[0]), int(b.shape[0])],
        "grouping": {"unit": "group" if groups_a is not None or groups_b is not None else "row",
                     "groups": n_groups},
    }
