"""The cost model behind `invariance bench` (the timings themselves are printed, never asserted)."""

import pytest

from invariance.bench import bench_align_step, estimate_seconds
from invariance.metrics.mmd import MAX_PAIRS


def test_estimate_scales_extraction_with_images_and_statistics_with_pairs_squared():
    # The cost model is common practice (no published source): extraction is linear in the
    # images; the exact unbiased MMD^2 needs the n x n kernel matrix (Gretton et al., JMLR 13,
    # 2012, Lemma 6), hence quadratic in pairs up to the subsample cap.
    extraction = {"extract_images_per_s": 100.0}
    statistics = {"pairs": 1000, "seconds": 2.0}
    est = estimate_seconds(1000, extraction, statistics)
    assert est["extract_s"] == pytest.approx(20.0)  # 2,000 images at 100 img/s
    assert est["statistics_s"] == pytest.approx(2.0)
    # below the exact-MMD cap the kernel matrix grows with the square of the pairs
    assert estimate_seconds(2000, extraction, statistics)["statistics_s"] == pytest.approx(8.0)
    # beyond the cap MMD is subsampled, so the cost stops growing quadratically
    far = estimate_seconds(100 * MAX_PAIRS, extraction, statistics)["statistics_s"]
    assert far == pytest.approx(2.0 * 100 * MAX_PAIRS / 1000)


def test_align_step_bench_times_the_same_network_three_ways():
    # The cached-trunk figure stands for the alignment step only if the cached trunk followed
    # by the trained tail computes the whole network (common practice: float32 re-association
    # stays within 1e-4 on these activations). The timings themselves are printed, not asserted.
    fig = bench_align_step(image_size=64, batch_size=4, steps=1)
    assert fig["split_max_abs_error"] < 1e-4
    assert all(fig[k] > 0 for k in ("whole_network_step_s", "frozen_trunk_rerun_step_s", "cached_trunk_step_s"))
