"""All invariance metrics on one pair of feature matrices, with breakdowns by factor.

``score_features`` is the ``metrics`` object of the result JSON (docs/design.md) plus the
per-factor ``breakdowns``, per-pair drift, a 2-D projection for the report and warnings.
Every value is a plain Python number, string or list; a metric that cannot be computed
is ``{"not_computable": reason}`` and no NaN or infinity ever reaches the output.
"""

from __future__ import annotations

import math
import tokenize
from pathlib import Path

import numpy as np
from sklearn.decomposition import PCA
from threadpoolctl import threadpool_limits

from invariance import breakdowns as _bd
from invariance.errors import InvalidParameter, InvarianceError
from invariance.options import ScoringOptions
from invariance.metrics import cka as _cka
from invariance.metrics import domain as _domain
from invariance.metrics import drift as _drift
from invariance.metrics import mmd as _mmd
from invariance.metrics import probe as _probe

# Pairs drawn (seeded) for the 2-D projection in the report: enough to see the two
# clouds, few enough to keep the JSON and the plot light (common practice).
PROJECTION_MAX_PAIRS = 500

# Decimals kept in the projection coordinates; the plot cannot show more.
PROJECTION_DECIMALS = 4

# Two centred rows are rank one, so their CKA is 1 whatever the features: CKA needs 3.
CKA_MIN_PAIRS = _cka.DEBIASED_MIN_PAIRS

# BLAS/OpenMP threads while scoring. The work is small dense algebra (fits of a few
# thousand rows, a 1,000 x 512 SVD, one n x n kernel). On a 2-core machine shared with
# other jobs, threaded runs were 5-30x slower than one thread (PCA SVD 27x, probes 18x,
# domain classifier 5-11x) and no faster when the cores were free
# (tests/benchmarks/bench_stats.py prints the ratios), so scoring is single-threaded.
_THREADS = 1

# Subgroups scored at once (threads; None: one per core, at most
# invariance.breakdowns.MAX_WORKERS). On the shared 2-core test machine (load average 7-9)
# a thread pool was no faster than one subgroup after another: best of 2 runs 7.81 s
# against 7.58 s for 2,000 x 512-d with 4 x 3 breakdowns, 0.75 s against 0.72 s for 200
# pairs, with more CPU time spent. So subgroups run one after another;
# tests/benchmarks/bench_stats.py prints the ratio for a machine with free cores.
_WORKERS = 1


def _min_pairs(folds):
    """Pairs needed for the whole score, and for a subgroup's tests: every metric computable."""
    return max(_domain.MIN_PAIRS_PER_FOLD * folds, _mmd.MIN_PAIRS)


def _scoring_options(options):
    if options is None:
        return ScoringOptions()
    if not isinstance(options, ScoringOptions):
        raise InvalidParameter("options", f"options={options!r} is not valid; pass a ScoringOptions")
    return options


def _check_columns(kind, columns, n):
    if columns is None:
        return {}
    if not isinstance(columns, dict):
        raise InvarianceError(
            f"{kind} must be a dict of column name to array; got {type(columns).__name__}"
        )
    out = {}
    for name, values in columns.items():
        values = np.asarray(values)
        if values.shape != (n,):
            raise InvarianceError(
                f"{kind} column {name!r} has shape {values.shape}; it needs one value per "
                f"pair ({n},): give labels in the same order as the features"
            )
        out[str(name)] = values
    return out


def _not_computable(n, need):
    return {"not_computable": f"only {n} pairs; need {need}"}


def _guard(fn, *args, **kwargs):
    """Run a metric; a degenerate input becomes ``not_computable`` instead of a crash."""
    try:
        return fn(*args, **kwargs)
    except InvarianceError as err:
        return {"not_computable": str(err)}


def _drift_summary(full):
    if "not_computable" in full:
        return full
    keys = (
        "relative_drift",
        "relative_drift_ci",
        "ci_method",
        "typical_distance",
        "pair_retrieval_top1",
    )
    return {key: full[key] for key in keys if key in full}


class _Layer:
    """The work one feature matrix pair shares between its whole set and its subgroups.

    The MMD kernel matrix of all pairs is built once (one bandwidth, the median
    heuristic over all pairs) and every subgroup's test is a slice of it
    (:class:`invariance.metrics.mmd.PairedKernel`); the other metrics see the subgroup's
    rows. ``metrics(idx)`` is seeded by itself, so subgroups may run in any order or
    on several threads.
    """

    def __init__(self, clean, cluttered, tasks, options, groups=None):
        self.clean, self.cluttered, self.tasks, self.groups = clean, cluttered, tasks, groups
        self.seed, self.permutations, self.folds = options.seed, options.permutations, options.folds
        try:
            self.kernel = _mmd.PairedKernel(clean, cluttered)
        except InvarianceError as err:
            self.kernel = {"not_computable": str(err)}

    def rows(self, idx):
        if idx is None:
            return self.clean, self.cluttered, self.tasks
        return self.clean[idx], self.cluttered[idx], {k: v[idx] for k, v in self.tasks.items()}

    def group_rows(self, idx):
        """Group codes of the pairs ``idx`` (renumbered), or None without groups."""
        if self.groups is None:
            return None
        return self.groups if idx is None else np.unique(self.groups[idx], return_inverse=True)[1]

    def drift(self, idx=None):
        clean, cluttered, _ = self.rows(idx)
        if clean.shape[0] < _drift.MIN_PAIRS:
            return _not_computable(clean.shape[0], _drift.MIN_PAIRS)
        return _guard(_drift.paired_drift, clean, cluttered, seed=self.seed, groups=self.group_rows(idx))

    def mmd(self, idx=None):
        n = self.clean.shape[0] if idx is None else idx.size
        if n < _mmd.MIN_PAIRS:
            return _not_computable(n, _mmd.MIN_PAIRS)
        if isinstance(self.kernel, dict):
            return dict(self.kernel)
        return _guard(self.kernel.test, idx, permutations=self.permutations, seed=self.seed, groups=self.groups)

    def domain(self, clean, cluttered, groups=None):
        n, need = clean.shape[0], _domain.MIN_PAIRS_PER_FOLD * self.folds
        if n < need:
            return _not_computable(n, need)
        result = _guard(_domain.domain_classifier, clean, cluttered, folds=self.folds,
                        seed=self.seed, permutations=self.permutations, groups=groups)
        result.pop("decision", None)
        return result

    def metrics(self, idx=None, drift=None):
        """Every metric on the pairs ``idx`` (default all); ``drift`` if already computed."""
        clean, cluttered, tasks = self.rows(idx)
        drift = self.drift(idx) if drift is None else drift
        groups = self.group_rows(idx)
        out = {"domain_classifier": self.domain(clean, cluttered, groups), "mmd": self.mmd(idx)}
        if tasks:
            out["probe"] = _probe.linear_probes(clean, cluttered, tasks, seed=self.seed, groups=groups)
        out["paired_drift"] = _drift_summary(drift)
        if clean.shape[0] < CKA_MIN_PAIRS:
            out["cka"] = _not_computable(clean.shape[0], CKA_MIN_PAIRS)
            out["cka_linear"] = out["cka"]
        else:
            # debiased CKA is the reported one: linear CKA drifts towards 1 when d is large
            # against n (Nguyen, Raghu & Kornblith, ICLR 2021); linear kept under its own key
            out["cka"] = _guard(_cka.debiased_cka, clean, cluttered)
            out["cka_linear"] = _guard(_cka.linear_cka, clean, cluttered)
        return out


def _breakdowns(layer, factors, folds):
    """``breakdowns``, the Holm correction note, skipped subgroups and their warnings."""
    groups, unlabelled = _bd.subgroups(factors)
    need = _min_pairs(folds)
    skipped = _bd.skipped(
        groups, need,
        f"the subgroup tests need {need} pairs (domain classifier: {_domain.MIN_PAIRS_PER_FOLD} "
        f"per fold x {folds} folds; MMD: {_mmd.MIN_PAIRS}); measures that need fewer are kept",
    )
    breakdowns = _bd.run(groups, layer.metrics, workers=_WORKERS)
    correction = _bd.correct(breakdowns)
    return breakdowns, correction, skipped, _bd.warnings(skipped, unlabelled, need)


def _tsne(pooled, seed):
    """2-D t-SNE of the same points (van der Maaten & Hinton, JMLR 9, 2008), PCA-initialised
    for stability; perplexity 30 (sklearn's default), lowered for small samples since it
    must stay below the number of points."""
    from sklearn.manifold import TSNE

    perplexity = float(min(30.0, (pooled.shape[0] - 1) / 3.0))
    coords = TSNE(n_components=2, perplexity=perplexity, init="pca", random_state=seed).fit_transform(pooled)
    return np.round(coords, PROJECTION_DECIMALS)


def _projection(clean, cluttered, seed, tsne=False):
    n = clean.shape[0]
    indices = np.arange(n)
    if n > PROJECTION_MAX_PAIRS:
        rng = np.random.default_rng(seed)
        indices = np.sort(rng.choice(n, PROJECTION_MAX_PAIRS, replace=False))
    pooled = np.vstack([clean[indices], cluttered[indices]]).astype(np.float64)
    if pooled.shape[1] < 2:
        return {"not_computable": "features have fewer than 2 dimensions"}
    if np.ptp(pooled, axis=0).max() == 0:
        return {"not_computable": "all feature vectors are identical"}
    pca = PCA(n_components=2, svd_solver="full").fit(pooled)
    coords = np.round(pca.transform(pooled), PROJECTION_DECIMALS)
    m = indices.size
    out = {
        "method": "pca",
        "clean": coords[:m].tolist(),
        "cluttered": coords[m:].tolist(),
        "indices": indices.tolist(),
        "explained_variance_ratio": np.round(
            pca.explained_variance_ratio_, PROJECTION_DECIMALS
        ).tolist(),
    }
    if tsne:
        embedded = _tsne(pooled, seed)
        out["tsne"] = {"clean": embedded[:m].tolist(), "cluttered": embedded[m:].tolist()}
    return out


def _feature_warnings(clean, cluttered):
    warnings = []
    # constant over both domains, without stacking a copy of both matrices
    same = (np.ptp(clean, axis=0) == 0) & (np.ptp(cluttered, axis=0) == 0)
    constant = int((same & (clean[0] == cluttered[0])).sum())
    if constant:
        warnings.append(
            f"{constant} of {clean.shape[1]} feature columns are constant over all images; "
            f"they carry no information"
        )
    duplicates = clean.shape[0] - np.unique(clean, axis=0).shape[0]
    if duplicates:
        warnings.append(
            f"{duplicates} clean feature rows repeat another pair's row; check that the pairs "
            f"are different scenes"
        )
    if np.array_equal(clean, cluttered):
        warnings.append("clean and cluttered features are identical for every pair")
    return warnings


def _metric_warnings(metrics):
    warnings = []
    domain = metrics["domain_classifier"]
    if "note" in domain:
        warnings.append(domain["note"])
    sampled = (("domain_classifier", "domain classifier"), ("mmd", "MMD permutation test"))
    for name, label in sampled:
        method = metrics[name].get("method", "exact")
        if method != "exact":
            warnings.append(f"{label} ran on a seeded {method}")
    for name, value in metrics.items():
        if isinstance(value, dict) and "not_computable" in value:
            warnings.append(f"{name} not computable: {value['not_computable']}")
    return warnings


def _plain(value):
    """Convert numpy scalars and arrays into JSON-ready Python values."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, np.ndarray):
        return [_plain(v) for v in value.tolist()]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value)
    return value


def _check_finite(value, path="result"):
    """Raise if any float in a nested dict or list is NaN or infinite (never valid JSON)."""
    if isinstance(value, dict):
        for key, item in value.items():
            _check_finite(item, f"{path}.{key}")
    elif isinstance(value, list):
        for i, item in enumerate(value):
            _check_finite(item, f"{path}[{i}]")
    elif isinstance(value, float) and not math.isfinite(value):
        raise RuntimeError(
            f"non-finite value {value} at {path}; a metric must report not_computable instead"
        )


def score_features(
    clean,
    cluttered,
    *,
    tasks=None,
    factors=None,
    names=None,
    options=None,
    groups=None,
):
    """Every invariance metric on paired clean / cluttered features.

    Parameters
    ----------
    clean, cluttered : ndarray of shape (n_pairs, d)
        Paired features; row i of each is the same scene.
    tasks : dict of str to ndarray, optional
        Task labels per pair for the linear probes (``str`` arrays are classes,
        numeric arrays are regression targets).
    factors : dict of str to ndarray, optional
        Clutter descriptions per pair (``factor_*`` and ``level`` columns); every
        metric is repeated on the pairs that share each value.
    names : sequence of str, optional
        A name per pair for the per-pair drift list; default the row index.
    options : ScoringOptions, optional
        Seed (every split, permutation, bootstrap and subsample), permutations of the
        MMD and domain-classifier tests, domain-classifier folds and whether to add a
        t-SNE view (``projection["tsne"]``); default ``ScoringOptions()``.
    groups : array-like of shape (n_pairs,), optional
        Group (episode) of each pair. Every split (domain-classifier folds, probe
        train/test), every permutation (one swap per group) and every bootstrap (whole
        groups) then treats the group as the unit: frames of one episode are strongly
        correlated, so counting them as independent would inflate the domain classifier
        and narrow the intervals. Default: each pair is its own group (docs/sources.md).

    Returns
    -------
    dict
        ``metrics`` (``domain_classifier``, ``mmd``, ``probe`` when tasks are given,
        ``paired_drift``, ``cka``), ``breakdowns`` ({column: {value: {"pairs", "metrics"}}};
        each subgroup's domain-classifier and MMD entries add ``p_value_adjusted``, Holm
        1979 across the subgroups), ``breakdowns_correction`` (how they were adjusted),
        ``breakdowns_skipped`` (subgroups too small for the tests, with the reason),
        ``pairs`` ([{"name", "drift"}]), ``projection`` (2-D PCA of a seeded subsample of
        at most 500 pairs, with their ``indices``), ``warnings`` and ``grouping`` (``unit``
        "pair" or "group", ``groups``, and for groups the rows per group).

    Raises
    ------
    InvarianceError
        Bad shapes, NaN or inf rows, fewer pairs than the metrics need, or label and
        name lists of the wrong length.
    """
    options = _scoring_options(options)
    with threadpool_limits(limits=_THREADS):
        result = _score(clean, cluttered, tasks, factors, names, options, groups)
    result = _plain(result)
    _check_finite(result)
    return result


def _validated(clean, cluttered, folds):
    clean, cluttered = _domain._validate_pairs(clean, cluttered)
    need = _min_pairs(folds)
    if clean.shape[0] < need:
        raise InvarianceError(
            f"only {clean.shape[0]} pairs of features; need at least {need} (the domain "
            f"classifier holds out {_domain.MIN_PAIRS_PER_FOLD} pairs in each of {folds} folds, "
            f"the MMD test needs {_mmd.MIN_PAIRS}): add pairs or lower folds"
        )
    return clean, cluttered


def _score(clean, cluttered, tasks, factors, names, options, groups=None):
    clean, cluttered = _validated(clean, cluttered, options.folds)
    n = clean.shape[0]
    groups = _domain.check_groups(groups, n)
    if groups is not None and groups.max() + 1 < options.folds:
        raise InvarianceError(
            f"only {groups.max() + 1} groups (episodes); the domain classifier needs at least "
            f"{options.folds}, one whole group per fold: add episodes or lower folds"
        )
    tasks = _check_columns("tasks", tasks, n)
    factors = _check_columns("factors", factors, n)
    if names is None:
        names = [str(i) for i in range(n)]
    elif len(names) != n:
        raise InvarianceError(
            f"names has {len(names)} entries for {n} pairs: give one name per pair"
        )
    layer = _Layer(clean, cluttered, tasks, options, groups)
    drift = layer.drift()
    metrics = layer.metrics(drift=drift)
    breakdowns, correction, skipped, group_warnings = _breakdowns(layer, factors, options.folds)
    per_pair = drift.get("per_pair")
    return {
        "metrics": metrics,
        "breakdowns": breakdowns,
        "breakdowns_correction": correction,
        "breakdowns_skipped": skipped,
        "pairs": [
            {"name": str(names[i]), "drift": None if per_pair is None else float(per_pair[i])}
            for i in range(n)
        ],
        "projection": _projection(clean, cluttered, options.seed, options.tsne),
        "warnings": _feature_warnings(clean, cluttered) + _metric_warnings(metrics) + group_warnings,
        "grouping": _grouping(groups, n),
    }


def _grouping(groups, n):
    """The result's ``grouping``: the unit of every split, resample and permutation."""
    if groups is None:
        return {"unit": "pair", "groups": int(n),
                "note": "no groups given: each pair is its own unit"}
    sizes = np.bincount(groups)
    return {"unit": "group", "groups": int(sizes.size), "rows_per_group": [int(sizes.min()), int(sizes.max())],
            "note": "splits, permutations and bootstrap resamples keep each group whole; p-values and "
                    "intervals count groups, not frames"}


def load_feature_files(clean_path, cluttered_path):
    """Read paired feature matrices from two ``.npy`` files (no pickles).

    Parameters
    ----------
    clean_path, cluttered_path : str or Path
        ``.npy`` files of shape (n_pairs, d), row i of each the same scene.

    Returns
    -------
    clean, cluttered : ndarray of shape (n_pairs, d)
        As float32 or float64 (integer arrays become float64).
    """
    clean = _load_npy(clean_path)
    cluttered = _load_npy(cluttered_path)
    if clean.shape != cluttered.shape:
        raise InvarianceError(
            f"{clean_path} has shape {clean.shape} but {cluttered_path} has shape "
            f"{cluttered.shape}: both need one row per pair, in the same order"
        )
    return clean, cluttered


def _check_npy_header(path):
    """Refuse a .npy file whose header promises more data than the file holds.

    Reading such a file would first try to allocate what the header claims (a 112-byte
    file may claim terabytes).
    """
    try:
        with open(path, "rb") as fh:
            version = np.lib.format.read_magic(fh)
            read = {(1, 0): np.lib.format.read_array_header_1_0, (2, 0): np.lib.format.read_array_header_2_0}
            if version not in read:
                raise ValueError(f"unsupported .npy format version {version}")
            shape, _, dtype = read[version](fh)
            offset = fh.tell()
    except (ValueError, OSError, EOFError, SyntaxError, tokenize.TokenError) as err:
        # The header is a Python literal (NEP 1); an unclosed bracket makes the tokenizer
        # raise TokenError, which is neither ValueError nor SyntaxError.
        reason = str(err).splitlines()[0] if str(err) else type(err).__name__
        raise InvarianceError(f"{path}: not a readable numeric .npy array ({reason}); save it with numpy.save") from None
    if dtype.hasobject:
        raise InvarianceError(f"{path}: not a readable numeric .npy array (it holds Python objects, which are never loaded); save a numeric array with numpy.save")
    claimed = int(np.prod(shape, dtype=object)) * dtype.itemsize
    actual = path.stat().st_size - offset
    if claimed != actual:
        raise InvarianceError(
            f"{path}: the header claims shape {tuple(shape)} ({claimed:,} bytes) but the file holds {actual:,} "
            f"bytes of data; the file is truncated or corrupt, save it again with numpy.save"
        )


def _load_npy(path):
    path = Path(path)
    if not path.is_file():
        raise InvarianceError(f"{path}: no such file; give the path of a .npy feature matrix")
    _check_npy_header(path)
    try:
        array = np.load(path, allow_pickle=False)
    except (ValueError, OSError, EOFError) as err:
        reason = str(err).splitlines()[0] if str(err) else type(err).__name__
        raise InvarianceError(
            f"{path}: not a readable numeric .npy array ({reason}); save it with numpy.save"
        ) from None
    if not isinstance(array, np.ndarray) or array.ndim != 2:
        shape = getattr(array, "shape", None)
        raise InvarianceError(f"{path}: expected a 2-D array (n_pairs, d); got shape {shape}")
    if array.dtype.kind not in "fiu":
        raise InvarianceError(f"{path}: expected numbers; got dtype {array.dtype}")
    if array.dtype.kind != "f":
        array = array.astype(np.float64)
    bad = ~np.isfinite(array).all(axis=1)
    if bad.any():
        raise InvarianceError(
            f"{path}: {int(bad.sum())} of {array.shape[0]} rows contain NaN or inf; remove "
            f"those pairs from both files"
        )
    return array


# Why each paired-only measure is left out of an unpaired result (the ``not_computed`` dict).
UNPAIRED_REASONS = {
    "paired_drift": "needs the two views of one scene; unpaired domains share no scene, and a made-up "
                    "pairing would measure the pairing, not the clutter",
    "pair_retrieval_top1": "needs each B row's own A scene to retrieve; unpaired domains have none",
    "cka": "compares two representations of the same inputs row by row; unpaired rows are different inputs",
    "within_pair_swaps": "the paired permutation null swaps views within a scene; unpaired data use the "
                         "ordinary permutation null over the pooled sample instead",
}


def _unpaired_projection(a, b, seed):
    """2-D PCA of at most PROJECTION_MAX_PAIRS rows of each domain (seeded subsamples)."""
    rng = np.random.default_rng(seed)
    picks = [np.sort(rng.choice(x.shape[0], PROJECTION_MAX_PAIRS, replace=False)) if x.shape[0] > PROJECTION_MAX_PAIRS
             else np.arange(x.shape[0]) for x in (a, b)]
    pooled = np.vstack([a[picks[0]], b[picks[1]]]).astype(np.float64)
    if pooled.shape[1] < 2 or np.ptp(pooled, axis=0).max() == 0:
        return {"not_computable": "features have fewer than 2 dimensions or are all identical"}
    pca = PCA(n_components=2, svd_solver="full").fit(pooled)
    coords = np.round(pca.transform(pooled), PROJECTION_DECIMALS)
    m = picks[0].size
    return {"method": "pca", "clean": coords[:m].tolist(), "cluttered": coords[m:].tolist(),
            "indices": picks[0].tolist(), "indices_b": picks[1].tolist(),
            "explained_variance_ratio": np.round(pca.explained_variance_ratio_, PROJECTION_DECIMALS).tolist()}


def unpaired_minimum(folds):
    """Rows and groups each domain needs for the unpaired tests (and each breakdown subgroup).

    Rows: the domain classifier's :data:`~invariance.metrics.domain.MIN_PAIRS_PER_FOLD`
    per fold, at least the MMD test's :data:`~invariance.metrics.mmd.MIN_PAIRS`; groups: one
    whole group per fold.
    """
    return max(_domain.MIN_PAIRS_PER_FOLD * folds, _mmd.MIN_PAIRS), int(folds)


def check_unpaired_size(label, rows, units, folds):
    """Raise a clear error when domain ``label`` has too few rows or groups for the tests.

    Parameters
    ----------
    label : str
        ``"A"`` or ``"B"``, for the message.
    rows : int or None
        Rows (frames) of the domain; ``None`` when not known before decoding (videos).
    units : int
        Groups (episodes) of the domain, or its rows when every row is its own group.
    folds : int
        Domain-classifier folds.
    """
    need, need_groups = unpaired_minimum(folds)
    if (rows is not None and rows < need) or units < need_groups:
        shown = "an unknown number of" if rows is None else rows
        raise InvarianceError(
            f"domain {label} has {shown} rows in {units} groups; need at least {need} rows and "
            f"{need_groups} groups (one whole group per fold): add episodes or lower folds"
        )


def _check_unpaired_sizes(a, b, groups_a, groups_b, folds):
    for label, x, g in (("A", a, groups_a), ("B", b, groups_b)):
        units = x.shape[0] if g is None else np.unique(np.asarray(g).astype(str)).size
        check_unpaired_size(label, x.shape[0], units, folds)


def _two_sample_tests(a, b, groups_a, groups_b, options, bandwidth=None):
    """The unpaired domain classifier and MMD test; a degenerate input is ``not_computable``."""
    return {
        "domain_classifier": _guard(_domain.unpaired_domain_classifier, a, b, groups_a=groups_a, groups_b=groups_b,
                                    folds=options.folds, seed=options.seed, permutations=options.permutations),
        "mmd": _guard(_mmd.unpaired_permutation_test, a, b, groups_a=groups_a, groups_b=groups_b,
                      permutations=max(options.permutations, 1), seed=options.seed, bandwidth=bandwidth),
    }


def _unpaired_subgroup_metrics(a, b, groups_a, groups_b, options, bandwidth):
    """``metrics_of(pooled indices)``: the two unpaired tests on one subgroup's rows."""
    n_a = a.shape[0]

    def rows_of(groups, idx):
        return None if groups is None else np.asarray(groups)[idx]

    def metrics_of(idx):
        ia, ib = _bd.domain_rows(idx, n_a)
        return _two_sample_tests(a[ia], b[ib], rows_of(groups_a, ia), rows_of(groups_b, ib), options, bandwidth)

    return metrics_of


def _unpaired_breakdowns(a, b, groups_a, groups_b, factors_a, factors_b, options, bandwidth):
    """``breakdowns``, their Holm note, skipped subgroups and warnings of two unpaired domains.

    A subgroup is the rows of A and of B sharing a factor value (docs/sources.md); every
    subgroup's MMD uses the whole sample's bandwidth, as the paired subgroups share one
    kernel, so the subgroups' MMD^2 are on one scale.
    """
    n_a = a.shape[0]
    factors_a = _check_columns("factors_a", factors_a, n_a)
    factors_b = _check_columns("factors_b", factors_b, b.shape[0])
    groups, one_sided, unlabelled = _bd.unpaired_subgroups(factors_a, factors_b, n_a)
    codes = _domain.sample_groups(groups_a, groups_b, n_a, b.shape[0])
    need, need_groups = unpaired_minimum(options.folds)
    groups, small = _bd.unpaired_skipped(
        groups, n_a, codes, need, need_groups,
        f"the unpaired subgroup tests need {need} rows and {need_groups} groups in each domain (domain classifier: "
        f"{_domain.MIN_PAIRS_PER_FOLD} rows and one whole group per fold x {options.folds} folds; MMD: "
        f"{_mmd.MIN_PAIRS} rows)")
    metrics_of = _unpaired_subgroup_metrics(a, b, groups_a, groups_b, options, bandwidth)
    breakdowns = _bd.run(groups, metrics_of, workers=_WORKERS,
                         counts=lambda idx: _bd.unpaired_counts(idx, n_a, codes))
    correction = _bd.correct(breakdowns)
    warnings = _bd.unpaired_warnings(small, one_sided, unlabelled, need, need_groups)
    return breakdowns, correction, small + one_sided, warnings


def _unpaired_metrics(a, b, groups_a, groups_b, tasks_a, tasks_b, options):
    metrics = _two_sample_tests(a, b, groups_a, groups_b, options)
    if tasks_a and tasks_b:
        metrics["probe"] = _probe.unpaired_probes(a, b, _check_columns("tasks_a", tasks_a, a.shape[0]),
                                                  _check_columns("tasks_b", tasks_b, b.shape[0]),
                                                  groups_a=groups_a, groups_b=groups_b, seed=options.seed)
    return metrics


def score_unpaired_features(a, b, *, groups_a=None, groups_b=None, tasks_a=None, tasks_b=None, factors_a=None,
                            factors_b=None, options=None):
    """Every measure that has an unpaired form, on two samples with no scene in common.

    Domain classifier with folds over groups stratified by domain and a permutation test
    of group labels (:func:`invariance.metrics.domain.unpaired_domain_classifier`), MMD with
    the ordinary permutation null over the pooled sample (Gretton et al., JMLR 13, 2012;
    :func:`invariance.metrics.mmd.unpaired_permutation_test`), and probes trained on A and
    scored on held-out A and on B (:func:`invariance.metrics.probe.unpaired_probes`). The
    paired-only measures are absent from ``metrics`` and listed in ``not_computed`` with
    the reason. In the result, ``clean`` stands for domain A and ``cluttered`` for B.

    With factor columns on both sides, the domain classifier and MMD are repeated on the
    rows of A and of B that share each factor value, with Holm-adjusted p-values across
    the subgroups (Holm, Scand. J. Statist. 6, 1979), as the paired breakdowns.

    Parameters
    ----------
    a, b : ndarray of shape (n_a, d), (n_b, d)
        Features of domain A (the reference, e.g. the lab bench) and domain B.
    groups_a, groups_b : array-like, optional
        Group (episode) per row; default every row its own group.
    tasks_a, tasks_b : dict of str to ndarray, optional
        Probe labels per row; labels present in both domains are probed.
    factors_a, factors_b : dict of str to ndarray, optional
        Clutter descriptions per row (``factor_*`` and ``level`` columns); a column is
        broken down when both domains carry it, and listed in ``breakdowns_skipped`` when
        only one does.
    options : ScoringOptions, optional

    Returns
    -------
    dict
        ``metrics``, ``not_computed``, ``breakdowns`` (``{column: {value: {"rows": [n_a,
        n_b], "groups": [g_a, g_b], "metrics": {"domain_classifier", "mmd"}}}}``, each test
        with ``p_value_adjusted``), ``breakdowns_correction``, ``breakdowns_skipped``,
        ``pairs`` (empty), ``projection``, ``warnings``, ``grouping`` and ``pairing``
        ("unpaired").
    """
    options = _scoring_options(options)
    a, b = _domain._validate_samples(a, b)
    _check_unpaired_sizes(a, b, groups_a, groups_b, options.folds)
    with threadpool_limits(limits=_THREADS):
        metrics = _unpaired_metrics(a, b, groups_a, groups_b, tasks_a, tasks_b, options)
        breakdowns, correction, skipped, breakdown_warnings = _unpaired_breakdowns(
            a, b, groups_a, groups_b, factors_a, factors_b, options, metrics["mmd"].get("bandwidth"))
        projection = _unpaired_projection(a, b, options.seed)
    warnings = [f"{name} not computable: {value['not_computable']}"
                for name, value in metrics.items() if isinstance(value, dict) and "not_computable" in value]
    result = {
        "metrics": metrics, "not_computed": dict(UNPAIRED_REASONS), "pairing": "unpaired",
        "breakdowns": breakdowns, "breakdowns_correction": correction, "breakdowns_skipped": skipped,
        "pairs": [], "projection": projection,
        "warnings": warnings + ["unpaired domains: drift, pair retrieval and CKA are not computed (see not_computed)"]
                    + breakdown_warnings,
        "grouping": {"unit": "group" if groups_a is not None or groups_b is not None else "row",
                     "groups": metrics["domain_classifier"].get("grouping", {}).get("groups"),
                     "note": "splits and permutations keep each group whole; p-values and intervals count "
                             "groups, not frames"},
    }
    result = _plain(result)
    _check_finite(result)
    return result
