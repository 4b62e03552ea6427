"""Statistics at scale against the exact estimators and against scipy / scikit-learn."""

import numpy as np
import pytest
from scipy import stats
from sklearn.linear_model import Ridge
from sklearn.preprocessing import StandardScaler

from invariance.features_dir import ShardWriter, identity_sha256
from invariance.metrics import cka, domain, drift, mmd
from invariance.metrics import scale
from tests.conftest import paired_gaussians


def _to_directory(path, clean, cluttered, shard=37, dtype="float32"):
    ident = {"spec": "synthetic", "weights_sha256": None, "state_sha256": None, "code_sha256": None,
             "preprocess": None, "layers": ["output"]}
    ident["identity_sha256"] = identity_sha256(ident)
    n = clean.shape[0]
    plan = [list(range(s, min(s + shard, n))) for s in range(0, n, shard)]
    with ShardWriter(path) as w:
        w.begin(ident, [[f"p{i}" for i in idx] for idx in plan], dtype=dtype)
        for k, idx in enumerate(plan):
            w.write(k, {"output": (clean[idx], cluttered[idx])})
        w.finish()
    return path


def test_block_mmd_one_block_is_the_paired_unbiased_mmd(tmp_path):
    x, y = paired_gaussians(60, 5, seed=1, shift=0.3)
    bw = mmd.median_bandwidth(np.vstack([x, y]))
    # pooled bandwidth over all 2n rows is the exact test's median heuristic (Gretton et al., JMLR 2012)
    assert scale.pooled_bandwidth(scale.as_source((x, y))) == pytest.approx(bw, rel=1e-12)
    # blocks of B pairs: the mean of the per-block paired U-statistics of Gretton et al. (JMLR 2012)
    out = scale.block_mmd((x, y), block_size=20, bandwidth=bw)
    blocks = [mmd.mmd2_unbiased(x[s:s + 20], y[s:s + 20], bw, paired=True) for s in (0, 20, 40)]
    assert out["mmd2"] == pytest.approx(np.mean(blocks), rel=1e-10)
    assert out["blocks"] == 3 and out["pairs_used"] == 60
    # Zaremba, Gretton & Blaschko (NeurIPS 2013), sec. 3: z = mean / (sd / sqrt(blocks)), normal tail
    z = np.mean(blocks) / (np.std(blocks, ddof=1) / np.sqrt(3))
    assert out["p_value"] == pytest.approx(stats.norm.sf(z), rel=1e-9)
    # the same from a features directory whose shards (37 rows) cut across blocks
    on_disk = scale.block_mmd(_to_directory(tmp_path / "f", x, y, dtype="float64"), block_size=20, bandwidth=bw)
    assert on_disk["mmd2"] == pytest.approx(out["mmd2"], rel=1e-12)


def test_block_mmd_is_calibrated_under_the_paired_null_and_detects_a_shift():
    # 200 null data sets at the 5% level: the rejection count must fall in the central 99.9%
    # of Binomial(200, 0.05) (scipy.stats.binom); a normal approximation over 40 blocks
    # fixed bandwidth 4: each coordinate of a row has variance 2 here, so |x - x'|^2 ~ 2 * 2 * 4 = 16
    rejections = sum(scale.block_mmd(paired_gaussians(800, 4, seed=s), block_size=20, bandwidth=4.0)["p_value"]
                     < 0.05 for s in range(200))
    low, high = stats.binom.ppf([0.0005, 0.9995], 200, 0.05)
    assert low <= rejections <= high
    assert scale.block_mmd(paired_gaussians(1600, 4, seed=0, shift=0.3))["p_value"] < 1e-3


def test_streaming_cka_equals_the_exact_estimators(tmp_path):
    x, y = paired_gaussians(150, 12, seed=4, shift=0.1)
    y = y @ np.random.default_rng(0).normal(size=(12, 12))  # a linear map: CKA well below 1
    out = scale.streaming_cka(_to_directory(tmp_path / "f", x, y, dtype="float64"))
    # Kornblith et al. (ICML 2019) linear CKA; Song et al. (JMLR 2012, eq. 5) debiased form
    assert out["cka_linear"] == pytest.approx(cka.linear_cka(x, y), rel=1e-10)
    assert out["cka"] == pytest.approx(cka.debiased_cka(x, y), rel=1e-9)


def test_streaming_drift_matches_the_exact_drift():
    x, y = paired_gaussians(800, 16, seed=5, shift=0.2)
    exact = drift.paired_drift(x, y, seed=0)
    out = scale.streaming_drift((x, y), seed=0)
    assert out["relative_drift"] == pytest.approx(exact["relative_drift"], rel=1e-12)
    assert out["typical_distance"] == pytest.approx(exact["typical_distance"], rel=1e-12)
    assert out["pair_retrieval_top1"] == exact["pair_retrieval_top1"]  # gallery holds all 800 pairs
    # different interval constructions: both 95% intervals must cover each other's centre and
    # have widths within a factor 1.5 (common practice for comparing interval methods)
    (a, b), (c, d) = exact["relative_drift_ci"], out["relative_drift_ci"]
    assert a < out["relative_drift"] < b and c < exact["relative_drift"] < d
    assert 1 / 1.5 < (d - c) / (b - a) < 1.5


def test_streaming_domain_classifier_fold_fit_equals_scikit_learn_ridge():
    rng = np.random.default_rng(3)
    X = rng.normal(size=(300, 6)) * [1, 2, 3, 1, 1, 5] + 2
    y = np.where(np.arange(300) % 2, 1.0, -1.0)
    moments = {"n": 300, "s": X.sum(0), "ss": X.T @ X, "t": X[y > 0].sum(0) - X[y < 0].sum(0)}
    mu, sd, w = scale._ridge_from_moments(moments, lam=4.0)
    # scikit-learn's Ridge on StandardScaler features (population sd), same penalty, with intercept
    Z = StandardScaler().fit_transform(X)
    ref = Ridge(alpha=4.0).fit(Z, y)
    np.testing.assert_allclose(((X - mu) / sd) @ w, ref.predict(Z), rtol=1e-9, atol=1e-9)


def test_streaming_domain_classifier_power_and_null(tmp_path):
    x, y = paired_gaussians(3000, 8, seed=6, shift=0.15)
    shifted = scale.streaming_domain_classifier(_to_directory(tmp_path / "f", x, y, shard=500))
    assert shifted["accuracy"] > 0.55 and shifted["p_value"] < 1e-6
    x0, y0 = paired_gaussians(3000, 8, seed=7)
    null = scale.streaming_domain_classifier((x0, y0))
    assert null["ci"][0] < 0.5 < null["ci"][1] + 0.02 and null["p_value"] > 0.001


def test_subsample_domain_classifier_is_the_exact_one_on_its_subsample(tmp_path):
    x, y = paired_gaussians(260, 6, seed=8, shift=0.3)
    exact = domain.domain_classifier(x, y, max_pairs=120, permutations=50, seed=2)
    out = scale.subsample_domain_classifier(_to_directory(tmp_path / "f", x, y, dtype="float64"), max_pairs=120,
                                            permutations=50, seed=2)
    assert out["accuracy"] == exact["accuracy"] and out["p_value"] == exact["p_value"]
    assert out["method"] == exact["method"] == "subsample of 120 pairs"
    assert 0.5 < out["detectable_accuracy"] < 1


def test_detectable_accuracy_against_the_normal_approximation():
    # one-sided binomial power (exact) vs the usual normal formula
    # p = 1/2 + (z_a * 0.5 + z_b * sqrt(p(1-p))) / sqrt(n), solved by iteration (common practice)
    n = 10_000
    p = 0.5
    for _ in range(50):
        p = 0.5 + (stats.norm.ppf(0.95) * 0.5 + stats.norm.ppf(0.8) * np.sqrt(p * (1 - p))) / np.sqrt(n)
    assert scale.detectable_accuracy(n) == pytest.approx(p, abs=2e-3)
    k = stats.binom.isf(0.05, n, 0.5) + 1
    assert stats.binom.sf(k - 1, n, scale.detectable_accuracy(n)) == pytest.approx(0.8, abs=1e-6)


def test_float32_shards_agree_with_float64_arithmetic(tmp_path):
    # float32 shards use float32 products with float64 sums; against the exact float64
    # estimators they must agree to float32 precision (common practice: ~1e-6 relative)
    x, y = paired_gaussians(700, 24, seed=9, shift=0.1)
    x, y = (x + 5).astype(np.float32), (y + 5).astype(np.float32)  # a large mean, as ReLU features have
    path = _to_directory(tmp_path / "f", x, y, shard=128)
    out = scale.streaming_cka(path)
    assert out["cka_linear"] == pytest.approx(cka.linear_cka(x, y), rel=1e-5)
    assert out["cka"] == pytest.approx(cka.debiased_cka(x, y), rel=1e-4)
    bw = mmd.median_bandwidth(np.vstack([x, y]).astype(np.float64))
    blocks = scale.block_mmd(path, block_size=350, bandwidth=bw)
    exact = np.mean([mmd.mmd2_unbiased(x[s:s + 350], y[s:s + 350], bw, paired=True) for s in (0, 350)])
    assert blocks["mmd2"] == pytest.approx(exact, rel=1e-4, abs=1e-7)
    a = scale.streaming_domain_classifier(path, seed=1)
    b = scale.streaming_domain_classifier((x.astype(np.float64), y.astype(np.float64)), seed=1)
    assert abs(a["accuracy"] - b["accuracy"]) <= 2 / 1400  # at most a couple of borderline images flip


def test_synthetic_bench_shards_and_the_estimate(tmp_path):
    from invariance.features_dir import FeaturesDirectory
    from invariance.scale_bench import estimate, write_synthetic_features

    path = write_synthetic_features(tmp_path / "f", 3000, 16, shard_size=1000, shift=0.5)
    feats = FeaturesDirectory(path)
    assert (feats.n_pairs, feats.dims["output"], feats.dtype, len(feats.shard_records)) == (3000, 16, np.float16, 3)
    clean, cluttered = feats.arrays()
    # the generator's clutter shift (0.5 per dimension) is the mean difference, to its standard error
    assert (cluttered - clean).mean() == pytest.approx(0.5, abs=0.01)
    rows = estimate(1_000_000, pairs_per_s_per_worker=100.0, statistics_s=600.0, workers=(1, 10))
    # 1e6 pairs / (100 pairs/s x w workers), plus the statistics once
    assert [r["extract_h"] for r in rows] == pytest.approx([1e4 / 3600, 1e3 / 3600])
    assert rows[1]["total_h"] == pytest.approx((1000 + 600) / 3600)
