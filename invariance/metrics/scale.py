"""Statistics for a million pairs: streaming passes over a features directory, bounded memory.

Each function reads its input shard by shard (a :class:`~invariance.features_dir.FeaturesDirectory`)
or in row chunks (a pair of arrays), so memory is O(chunk x d + d^2), never O(n x d) or
O(n^2). Costs are stated per function for n pairs of d-dimensional features. Where a
quantity is estimated differently from the exact estimators of :mod:`invariance.metrics`
the result says how (``method``); on inputs small enough for both, the tests check that
they agree.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from invariance.errors import InvarianceError
from invariance.metrics import domain as _domain
from invariance.metrics import drift as _drift
from invariance.metrics.cka import DEBIASED_MIN_PAIRS, _SELF_HSIC_ROUNDING
from invariance.metrics.mmd import MEDIAN_MAX_POINTS, MIN_PAIRS, gaussian_kernel, median_bandwidth
from invariance.validation import check_float, check_int, check_seed

# Rows per chunk when the input is a pair of arrays (a features directory reads whole
# shards): 4,096 rows of 512-d float64 are 16 MiB per view (common practice).
CHUNK_ROWS = 4096
# Largest block of the block MMD: three B x B float64 kernels of 2,048 rows are 96 MiB.
MAX_BLOCK = 2048
# Pairs in the retrieval gallery: a 4,000 x 4,000 similarity in blocks, as the exact
# metric computes up to its own typical-row limit (common practice for a bounded cost).
RETRIEVAL_GALLERY = 4000
# Confidence of the normal intervals (as the exact metrics' 95%).
CONFIDENCE = 0.95
# Smallest accepted positive scale (bandwidth, C): the smallest normal float64.
_TINY = float(np.finfo(np.float64).tiny)


class _Arrays:
    """Two paired in-memory arrays seen through the reader interface of a features directory."""

    def __init__(self, clean, cluttered):
        self.clean, self.cluttered = _domain._validate_pairs(clean, cluttered)
        self.n_pairs, self.dtype = self.clean.shape[0], self.clean.dtype

    def iter_shards(self, layer=None):
        for start in range(0, self.n_pairs, CHUNK_ROWS):
            yield self.clean[start:start + CHUNK_ROWS], self.cluttered[start:start + CHUNK_ROWS]

    def rows(self, indices, layer=None, dtype=np.float64):
        idx = np.asarray(indices, dtype=np.int64)
        return self.clean[idx].astype(dtype), self.cluttered[idx].astype(dtype)


def as_source(features):
    """A streaming source from a features directory (path or reader) or ``(clean, cluttered)``."""
    from invariance.features_dir import FeaturesDirectory

    if isinstance(features, FeaturesDirectory):
        return features
    if isinstance(features, tuple) and len(features) == 2:
        return _Arrays(*features)
    return FeaturesDirectory(features)


def _work_dtype(source):
    """float64 for float64 features, else float32: the products need no more digits than the
    features hold (float16 or float32 shards), and float32 products run about twice as fast.
    Every sum across rows is accumulated in float64."""
    return np.float64 if np.dtype(source.dtype) == np.float64 else np.float32


def _chunks(source, layer):
    """(clean, cluttered) chunks in the work dtype, NaN and inf refused."""
    dtype = _work_dtype(source)
    for a, b in source.iter_shards(layer):
        a, b = np.asarray(a, dtype=dtype), np.asarray(b, dtype=dtype)
        if not (np.isfinite(a).all() and np.isfinite(b).all()):
            raise InvarianceError(f"{getattr(source, 'path', 'features')}: NaN or infinite features; extract again "
                                  "and check the encoder's weights and input normalisation")
        yield a, b


def _even_rows(n, most):
    return np.linspace(0, n - 1, most).round().astype(int) if n > most else np.arange(n)


# --- MMD: the B-test ------------------------------------------------------------------------


def _block_statistic(X, Y, bandwidth):
    """Paired unbiased MMD^2 of one block (Gretton et al., JMLR 2012, the U-statistic over pairs)."""
    b = X.shape[0]
    total = 0.0
    for P, Q, weight in ((X, X, 1.0), (Y, Y, 1.0), (X, Y, -2.0)):
        k = gaussian_kernel(P, Q, bandwidth)  # in the work dtype; summed in float64
        total += weight * (k.sum(dtype=np.float64) - np.trace(k, dtype=np.float64))
    return total / (b * (b - 1))


def pooled_bandwidth(source, layer=None, max_points=MEDIAN_MAX_POINTS):
    """Median heuristic on up to ``max_points`` pooled rows (evenly spaced pairs, both views).

    With 2 n <= ``max_points`` this is :func:`invariance.metrics.mmd.median_bandwidth` of
    all pooled rows, the exact test's bandwidth.
    """
    rows = _even_rows(source.n_pairs, max(1, max_points // 2))
    clean, cluttered = source.rows(rows, layer)
    return median_bandwidth(np.vstack([clean, cluttered]), max_points=max_points)


def block_mmd(features, *, block_size=None, bandwidth=None, layer=None):
    """Block MMD test, the B-test (Zaremba, Gretton & Blaschko, NeurIPS 2013).

    The pairs are cut into consecutive blocks of B pairs; each block gives the paired
    unbiased MMD^2 of Gretton et al. (JMLR 2012) with one Gaussian bandwidth; the test
    statistic is their mean, asymptotically normal, with its variance estimated from the
    spread of the block statistics (Zaremba et al. 2013, section 3), so
    p = 1 - Phi(mean / (sd / sqrt(blocks))), one-sided (MMD^2 > 0 under the alternative).
    The default B = sqrt(n) is the paper's choice, which keeps the test consistent.
    Blocks are independent when pairs are: give pairs in an order where consecutive
    pairs are not correlated (frames of one episode are), or use ``block_size`` = frames
    per episode so that blocks hold whole episodes.

    Cost: O(n B d) time (n / B blocks of B^2 d), O(B^2 + chunk d) memory; 1,000,000 x
    512-d with B = 1,000 is ~3e12 flops.

    Parameters
    ----------
    features : path, FeaturesDirectory or (clean, cluttered)
    block_size : int, optional
        Pairs per block (2-2048); default round(sqrt(n)).
    bandwidth : float, optional
        Kernel length scale; default the median heuristic (:func:`pooled_bandwidth`).
    layer : str, optional

    Returns
    -------
    dict
        ``mmd2`` (mean block statistic), ``p_value``, ``z``, ``blocks``, ``block_size``,
        ``bandwidth``, ``pairs_used`` (n less the remainder of the last block),
        ``method``.
    """
    source = as_source(features)
    n = source.n_pairs
    if n < MIN_PAIRS:
        raise InvarianceError(f"the block MMD needs at least {MIN_PAIRS} pairs; got {n}")
    default = int(min(MAX_BLOCK, max(2, round(np.sqrt(n)))))
    B = check_int("block_size", default if block_size is None else block_size, low=2, high=min(MAX_BLOCK, n))
    bw = pooled_bandwidth(source, layer) if bandwidth is None else check_float("bandwidth", bandwidth, low=_TINY)
    etas, carry = [], None
    for a, b in _chunks(source, layer):
        if carry is not None:
            a, b = np.vstack([carry[0], a]), np.vstack([carry[1], b])
        full = (a.shape[0] // B) * B
        for s in range(0, full, B):
            etas.append(_block_statistic(a[s:s + B], b[s:s + B], bw))
        carry = (a[full:], b[full:])
    etas = np.asarray(etas)
    if etas.size < 2:
        raise InvarianceError(f"block_size={B} leaves fewer than 2 blocks of {n} pairs; pass a smaller block_size")
    mean, se = float(etas.mean()), float(etas.std(ddof=1) / np.sqrt(etas.size))
    z = mean / se if se > 0 else (np.inf if mean > 0 else 0.0)
    return {"mmd2": mean, "p_value": float(stats.norm.sf(z)) if np.isfinite(z) else 0.0, "z": float(min(z, 1e300)),
            "blocks": int(etas.size), "block_size": B, "bandwidth": bw, "pairs_used": int(etas.size * B),
            "method": f"block MMD (B-test, Zaremba et al. 2013), {etas.size} blocks of {B} pairs"}


# --- CKA in two passes ------------------------------------------------------------------------


def _means(source, layer):
    n, sx, sy = 0, 0.0, 0.0
    for a, b in _chunks(source, layer):
        n, sx, sy = n + a.shape[0], sx + a.sum(0, dtype=np.float64), sy + b.sum(0, dtype=np.float64)
    return sx / n, sy / n, n


def streaming_cka(features, *, layer=None):
    """Linear and debiased CKA from two streaming passes (Kornblith et al., ICML 2019;
    Song et al., JMLR 2012, eq. 5, the unbiased HSIC, as in :mod:`invariance.metrics.cka`).

    Pass 1 takes the column means; pass 2 sums the centred cross-products X'X, Y'Y, Y'X
    (d x d each) and the row norms' sums, which is all either estimator needs:
    |Y'X|_F^2 = <XX', YY'>_F. Same values as the exact functions up to rounding.

    Cost: O(n d^2) time (two passes), O(d^2 + chunk d) memory.

    Returns
    -------
    dict
        ``cka`` (debiased; ``None`` with ``cka_note`` when its self-similarity is not
        positive), ``cka_linear``, ``pairs``.
    """
    source = as_source(features)
    mx, my, n = _means(source, layer)
    if n < DEBIASED_MIN_PAIRS:
        raise InvarianceError(f"CKA needs at least {DEBIASED_MIN_PAIRS} pairs; got {n}")
    d = mx.size
    xx, yy, yx = np.zeros((d, d)), np.zeros((d, d)), np.zeros((d, d))
    kx = {"sum": 0.0, "sq": 0.0}
    ky = {"sum": 0.0, "sq": 0.0}
    kxy = 0.0
    for a, b in _chunks(source, layer):
        a, b = (a - mx).astype(a.dtype), (b - my).astype(b.dtype)  # centred in float64, then work dtype
        xx += a.T @ a
        yy += b.T @ b
        yx += b.T @ a
        na, nb = (a * a).sum(1, dtype=np.float64), (b * b).sum(1, dtype=np.float64)
        kx["sum"] += na.sum(); kx["sq"] += na @ na  # noqa: E702 - paired running sums
        ky["sum"] += nb.sum(); ky["sq"] += nb @ nb  # noqa: E702
        kxy += na @ nb
    if np.all(np.diag(xx) == 0) or np.all(np.diag(yy) == 0):
        raise InvarianceError("CKA is undefined when one feature matrix is constant across rows: check that "
                              "the encoder output varies between images")
    cross, cxx, cyy = float((yx * yx).sum()), float((xx * xx).sum()), float((yy * yy).sum())
    out = {"cka_linear": float(min(1.0, cross / np.sqrt(cxx * cyy))), "pairs": int(n)}
    hxy = _unbiased_moments(cross, kx["sum"], ky["sum"], kxy, n)
    hxx = _unbiased_moments(cxx, kx["sum"], kx["sum"], kx["sq"], n)
    hyy = _unbiased_moments(cyy, ky["sum"], ky["sum"], ky["sq"], n)
    if not (hxx > _SELF_HSIC_ROUNDING * (kx["sum"] / n) ** 2 and hyy > _SELF_HSIC_ROUNDING * (ky["sum"] / n) ** 2):
        out.update(cka=None, cka_note="the unbiased self-similarity is not positive; add pairs")
    else:
        out["cka"] = float(np.clip(hxy / np.sqrt(hxx * hyy), -1.0, 1.0))
    return out


def _unbiased_moments(cross, sum_kx, sum_ky, kx_dot_ky, n):
    """:func:`invariance.metrics.cka._unbiased_hsic` from running sums: it needs only
    sum(kx), sum(ky) and kx . ky of the squared row norms (Song et al., JMLR 2012, eq. 5)."""
    return (cross - kx_dot_ky + sum_kx * sum_ky / ((n - 1) * (n - 2)) - 2.0 * kx_dot_ky / (n - 2)) / (n * (n - 3))


# --- drift ---------------------------------------------------------------------------------


def streaming_drift(features, *, seed=0, resamples=_drift.BOOTSTRAP_RESAMPLES, layer=None,
                    gallery=RETRIEVAL_GALLERY):
    """Paired drift and pair retrieval in one streaming pass (see :func:`invariance.metrics.drift.paired_drift`).

    The per-pair drift (1 - cos) / typical and the typical distance (median cosine
    distance of up to 3,000 evenly spaced clean rows) are the exact metric's. The
    interval differs: the exact bootstrap costs O(resamples x n), so here the mean drift
    is taken as normal (central limit theorem; its standard error from the pass) and the
    median's uncertainty from the exact metric's resampling of the typical rows
    (``_resampled_typical``, Bahadur representation); each resample divides one draw of
    each, a 95% percentile interval. The covariance of the two is neglected: the typical
    rows are at most 3,000 of n pairs. Retrieval top-1 is measured in a gallery of
    ``gallery`` evenly spaced pairs (exact when n <= gallery; a larger gallery makes
    retrieval harder, so compare it at equal gallery sizes only).

    Cost: O(n d) time for the pass, O(3000^2 d + gallery^2 d) for the median and the
    retrieval, O(resamples x 3000) for the interval; O(chunk d + 3000^2) memory.

    Returns
    -------
    dict
        ``relative_drift``, ``relative_drift_ci``, ``ci_method``, ``typical_distance``,
        ``pair_retrieval_top1``, ``retrieval_gallery``, ``pairs``.
    """
    seed, resamples = check_seed(seed), check_int("resamples", resamples, low=100)
    source = as_source(features)
    n = source.n_pairs
    if n < _drift.MIN_PAIRS:
        raise InvarianceError(f"drift needs at least {_drift.MIN_PAIRS} pairs; got {n}")
    rows = _drift._typical_rows(n)
    typical_clean, _ = source.rows(rows, layer)
    norms = np.linalg.norm(typical_clean, axis=1)
    if (norms == 0).any():
        return {"not_computable": "some pairs have an all-zero feature vector, so their cosine distance is undefined"}
    scene = _drift._scene_distances(_drift._unit_rows(typical_clean, norms), np.arange(rows.size))
    typical = float(np.median(scene))
    if not typical > _drift._ROUNDING:
        return {"not_computable": "the clean features of different scenes point the same way (median cosine "
                                  "distance 0), so there is no scene scale to compare with"}
    total, squares, zero = 0.0, 0.0, 0
    for a, b in _chunks(source, layer):
        na, nb = np.linalg.norm(a, axis=1), np.linalg.norm(b, axis=1)
        zero += int(((na == 0) | (nb == 0)).sum())
        if zero:
            continue
        raw = _drift._half_squared_distance(a / na[:, None], b / nb[:, None])
        total, squares = total + raw.sum(), squares + raw @ raw
    if zero:
        return {"not_computable": f"{zero} pairs have an all-zero feature vector, so their cosine distance is undefined"}
    mean = total / n
    sd = np.sqrt(max(0.0, squares / n - mean * mean) * n / (n - 1))
    interval = _drift_interval(mean, sd / np.sqrt(n), rows, scene, typical, seed, resamples)
    keep = _even_rows(n, gallery)
    clean_g, cluttered_g = source.rows(keep, layer)
    unit = [_drift._unit_rows(m, np.linalg.norm(m, axis=1)) for m in (clean_g, cluttered_g)]
    return {"relative_drift": mean / typical, "relative_drift_ci": interval,
            "ci_method": f"normal mean drift x resampled median of {rows.size} typical rows (Bahadur), "
                         f"{resamples} resamples, 95%",
            "typical_distance": typical, "pair_retrieval_top1": _drift._retrieval_top1(*unit),
            "retrieval_gallery": int(keep.size), "pairs": int(n)}


def _drift_interval(mean, se, rows, scene, typical, seed, resamples):
    rng = np.random.default_rng(seed)
    m = rows.size
    weights = rng.multinomial(m, np.full(m, 1.0 / m), size=resamples).astype(np.float64)
    sorted_scene = np.sort(scene)
    medians = _drift._resampled_typical(sorted_scene, _drift._row_influence(scene, typical), weights)
    floor = sorted_scene[min(sorted_scene.size - 1, np.searchsorted(sorted_scene, _drift._ROUNDING, side="right"))]
    ratios = (mean + se * rng.standard_normal(resamples)) / np.maximum(medians, floor)
    low, high = np.percentile(ratios, [100 * (1 - CONFIDENCE) / 2, 100 * (1 + CONFIDENCE) / 2])
    return [float(low), float(high)]


# --- domain classifier ---------------------------------------------------------------------


def detectable_accuracy(n_test, *, alpha=0.05, power=0.8):
    """Smallest true held-out accuracy a test on ``n_test`` held-out images detects with
    probability ``power``: the one-sided exact binomial test of accuracy = 1/2 at level
    ``alpha`` (binomial power calculation, e.g. Chow, Shao & Wang, "Sample size
    calculations in clinical research", 2008, ch. 4; from memory). It treats the images
    as independent; the two views of a pair are not, so read it as optimistic.

    Cost: O(log n_test) binomial evaluations.

    Returns
    -------
    float
        Accuracy in (1/2, 1].
    """
    n_test = check_int("n_test", n_test, low=2)
    alpha = check_float("alpha", alpha, low=0, high=0.5, include_low=False)
    power = check_float("power", power, low=0, high=1, include_low=False, include_high=False)
    # reject when the correct count k >= k_crit, the smallest k with P(K >= k | 1/2) <= alpha
    k_crit = int(stats.binom.isf(alpha, n_test, 0.5)) + 1
    if stats.binom.sf(k_crit - 1, n_test, 1.0) < power:
        return 1.0
    from scipy.optimize import brentq

    return float(brentq(lambda p: stats.binom.sf(k_crit - 1, n_test, p) - power, 0.5, 1.0, xtol=1e-10))


def subsample_domain_classifier(features, *, max_pairs=_domain.MAX_PAIRS, folds=5, seed=0,
                                permutations=_domain.DEFAULT_PERMUTATIONS, layer=None, alpha=0.05, power=0.8):
    """The exact domain classifier (:func:`invariance.metrics.domain.domain_classifier`) on a
    seeded subsample of ``max_pairs`` pairs, read shard by shard, with that subsample's power.

    The subsample is the one ``domain_classifier`` itself draws above ``max_pairs``, so on
    arrays the two give the same numbers. ``detectable_accuracy`` says what it can see:
    the smallest true accuracy its held-out images detect with probability ``power``.

    Cost: O(n) to draw the rows (only those rows are read), then the exact classifier's
    O(B x folds x m^2) for m = max_pairs pairs (~2 s at 2,000 x 512-d, 1,000 permutations).

    Returns
    -------
    dict
        The exact classifier's result with ``method`` ("subsample of m pairs" or "exact"),
        ``pairs_used``, ``pairs_total``, ``detectable_accuracy``, ``power``, ``alpha``.
    """
    source = as_source(features)
    n, m = source.n_pairs, check_int("max_pairs", max_pairs, low=_domain.MIN_PAIRS_PER_FOLD * folds)
    keep = np.arange(n) if n <= m else np.sort(np.random.default_rng([seed, 1]).choice(n, m, replace=False))
    clean, cluttered = source.rows(keep, layer)
    out = _domain.domain_classifier(clean, cluttered, folds=folds, seed=seed, permutations=permutations,
                                    max_pairs=max(m, keep.size))
    out.update(method="exact" if n <= m else f"subsample of {keep.size} pairs", pairs_used=int(keep.size),
               pairs_total=int(n), detectable_accuracy=detectable_accuracy(out["n_test"], alpha=alpha, power=power),
               power=power, alpha=alpha)
    return out


def _fold_moments(source, layer, fold_of, folds):
    """Per fold: row count, and sums of x - c, (x - c)(x - c)' (both views) and cluttered - clean.

    The shift c (the first chunk's mean) keeps S - N mu mu' from cancelling digits when
    the features' mean is large against their spread (ReLU features).
    """
    moments, shift, start = None, None, 0
    for a, b in _chunks(source, layer):
        f = fold_of[start:start + a.shape[0]]
        start += a.shape[0]
        if moments is None:
            d = a.shape[1]
            shift = (a.mean(0, dtype=np.float64) + b.mean(0, dtype=np.float64)) / 2
            moments = [dict(n=0, s=np.zeros(d), ss=np.zeros((d, d)), t=np.zeros(d)) for _ in range(folds)]
        a, b = (a - shift).astype(a.dtype), (b - shift).astype(b.dtype)
        for k in np.unique(f):
            xa, xb = a[f == k], b[f == k]
            mk = moments[k]
            mk["n"] += 2 * xa.shape[0]
            mk["s"] += xa.sum(0, dtype=np.float64) + xb.sum(0, dtype=np.float64)
            mk["ss"] += xa.T @ xa + xb.T @ xb
            mk["t"] += xb.sum(0, dtype=np.float64) - xa.sum(0, dtype=np.float64)
    return moments, shift


def _ridge_from_moments(train, lam, shift=0.0):
    """Ridge on standardised features with +-1 labels (cluttered +1) from summed moments.

    Balanced labels make the intercept 0 after centring; with sums taken around ``shift``,
    mu = shift + s / N, Z = (X - mu) / sd gives Z'Z = D^-1 (S - s s' / N) D^-1 and
    Z'y = D^-1 t. Returns (mu, sd, w).
    """
    N = train["n"]
    mu = shift + train["s"] / N
    cov = train["ss"] - np.outer(train["s"], train["s"]) / N
    sd = np.sqrt(np.maximum(np.diag(cov) / N, 0.0))
    sd[sd == 0] = 1.0  # a constant column stays 0 after centring
    zz = cov / np.outer(sd, sd)
    w = np.linalg.solve(zz + lam * np.eye(zz.shape[0]), train["t"] / sd)
    return mu, sd, w


def streaming_domain_classifier(features, *, folds=5, seed=0, C=1.0, layer=None):
    """Cross-validated linear domain classifier on all pairs, in two streaming passes.

    Ridge regression on +-1 labels over standardised features (the exact classifier's
    model, penalty 4 / C, here with one fixed C: with tens of thousands of training rows
    per fold the penalty hardly moves the fit), K folds over pairs (both views of a scene
    on one side). Pass 1 sums each fold's moments; each fold's fit is the solve of a
    d x d system from the other folds' sums; pass 2 scores the held-out pairs.

    The test is the sign test on the within-pair gaps g_i = f(cluttered_i) - f(clean_i)
    of held-out pairs: under the paired null the two views are exchangeable and the
    classifier never saw the pair, so each non-zero gap is positive with probability 1/2
    independently, and P(#positive >= observed) is exact binomial (a sign test; Conover,
    "Practical nonparametric statistics", 1999, section 3.4; from memory). The accuracy's
    95% interval is normal over pairs (each pair scores 0, 1/2 or 1).

    Cost: O(n d^2) time for the moments, O(folds d^3) for the solves, O(n d) for the
    scores; O(folds d^2 + n) memory (the fold of each pair).

    Returns
    -------
    dict
        ``accuracy``, ``ci``, ``ci_method``, ``proxy_a_distance``, ``p_value``,
        ``p_value_method``, ``paired_accuracy``, ``folds``, ``C``, ``n_test``,
        ``method`` ("all pairs, streaming"), ``pairs_used``.
    """
    folds, seed = check_int("folds", folds, low=2, high=50), check_seed(seed)
    C = check_float("C", C, low=_TINY)
    source = as_source(features)
    n = source.n_pairs
    if n < _domain.MIN_PAIRS_PER_FOLD * folds:
        raise InvarianceError(f"only {n} pairs for {folds} folds; add pairs or lower folds")
    fold_of = np.random.default_rng([seed, 2]).permutation(n) % folds  # balanced folds over pairs
    moments, shift = _fold_moments(source, layer, fold_of, folds)
    lam = _domain._RIDGE_PER_INVERSE_C / C
    fits = []
    for k in range(folds):
        train = {key: sum(moments[j][key] for j in range(folds) if j != k) for key in ("n", "s", "ss", "t")}
        fits.append(_ridge_from_moments(train, lam, shift))
    pair_score, positive, nonzero, start = np.empty(n), 0, 0, 0
    for a, b in _chunks(source, layer):
        f = fold_of[start:start + a.shape[0]]
        fa, fb = np.empty(a.shape[0]), np.empty(a.shape[0])
        for k in np.unique(f):
            mu, sd, w = fits[k]
            fa[f == k], fb[f == k] = ((a[f == k] - mu) / sd) @ w, ((b[f == k] - mu) / sd) @ w
        pair_score[start:start + a.shape[0]] = ((fa <= 0).astype(float) + (fb > 0)) / 2
        gap = fb - fa
        positive, nonzero = positive + int((gap > 0).sum()), nonzero + int((gap != 0).sum())
        start += a.shape[0]
    return _streaming_summary(pair_score, positive, nonzero, folds, C)


def _streaming_summary(pair_score, positive, nonzero, folds, C):
    n = pair_score.size
    accuracy = float(pair_score.mean())
    half = stats.norm.ppf(0.5 + CONFIDENCE / 2) * pair_score.std(ddof=1) / np.sqrt(n)
    p = float(stats.binomtest(positive, nonzero, 0.5, alternative="greater").pvalue) if nonzero else 1.0
    return {"accuracy": accuracy, "ci": [max(0.0, accuracy - half), min(1.0, accuracy + half)],
            "ci_method": "normal interval over pairs, 95%",
            "proxy_a_distance": max(0.0, 2.0 * (1.0 - 2.0 * (1.0 - accuracy))),
            "p_value": p, "p_value_method": "sign test of held-out within-pair decision gaps (exact binomial)",
            "paired_accuracy": positive / n, "folds": folds, "C": C, "n_test": int(2 * n),
            "classifier": f"ridge on standardised features, penalty 4/C, C = {C}",
            "method": "all pairs, streaming", "pairs_used": int(n)}


# --- all of them -----------------------------------------------------------------------------


def scale_statistics(features, *, layer=None, seed=0, folds=5, permutations=_domain.DEFAULT_PERMUTATIONS,
                     subsample_pairs=_domain.MAX_PAIRS, block_size=None, timings=None):
    """Every statistic of this module on one features directory (or pair of arrays).

    Cost: the sum of the parts; five streaming passes over the features (CKA two, the
    domain classifier two, drift one), plus reads of the subsample, gallery and typical
    rows. Memory O(folds d^2 + block^2 + chunk d + n) whatever n.

    Parameters
    ----------
    features : path, FeaturesDirectory or (clean, cluttered)
    layer : str, optional
    seed, folds, permutations : as in :class:`invariance.options.ScoringOptions`
    subsample_pairs : int, default=5000
        Pairs of the exact (permutation-tested) domain classifier's subsample.
    block_size : int, optional
        Block MMD block size; default sqrt(n).
    timings : dict, optional
        Filled with seconds per statistic.

    Returns
    -------
    dict
        ``domain_classifier`` (all pairs, streaming), ``domain_classifier_subsample``
        (exact on a seeded subsample, with its detectable accuracy), ``mmd`` (block
        test), ``paired_drift``, ``cka``, ``cka_linear``, ``pairs``.
    """
    import time

    source = as_source(features)
    timings = {} if timings is None else timings
    out = {"pairs": int(source.n_pairs)}
    steps = (
        ("domain_classifier", lambda: streaming_domain_classifier(source, folds=folds, seed=seed, layer=layer)),
        ("domain_classifier_subsample", lambda: _without_decision(subsample_domain_classifier(
            source, max_pairs=subsample_pairs, folds=folds, seed=seed, permutations=permutations, layer=layer))),
        ("mmd", lambda: block_mmd(source, block_size=block_size, layer=layer)),
        ("paired_drift", lambda: streaming_drift(source, seed=seed, layer=layer)),
        ("cka", lambda: streaming_cka(source, layer=layer)),
    )
    for name, step in steps:
        start = time.perf_counter()
        value = step()
        timings[name] = time.perf_counter() - start
        if name == "cka":
            out["cka_linear"] = value["cka_linear"]
            value = value["cka"] if value["cka"] is not None else {"not_computable": value["cka_note"]}
        out[name] = value
    return out


def _without_decision(result):
    result.pop("decision", None)  # per-pair decision values: for the report of an exact run only
    return result
