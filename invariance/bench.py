"""What a run costs on this machine: every figure beside its reference, measured in one run.

Speed is reported as ratios measured back to back in one process, because the machines
this runs on are shared and absolute timings drift (common practice for noisy hosts).
"""

from __future__ import annotations

import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

# Targets from the project's issues; each figure is printed beside its target.
TARGETS = {
    "extract_over_bare": 1.15,  # end-to-end extraction within 1.15x of the bare forward pass
    "warm_cache_speedup": 20.0,  # a warm-cache rerun at least 20x faster
    "stats_share": 0.10,  # statistics under 10% of the extraction time, 2,000 x 512-d
    "feature_memory_gib": 1.0,  # 5,000 pairs of 512-d features, above the model's own memory
    "stats_memory_gib": 4.0,  # 20,000 x 512-d statistics peak memory
    "align_step_ratio": 0.40,  # cached-trunk step of the last ResNet-18 block vs a whole-network step
    "scenes_pairs_per_s": 200.0,  # scene generation at 128 px on one core
    "episode_over_bare": 1.15,  # extraction from an HDF5 episode file vs the bare forward pass
}


def _timed(fn) -> tuple[float, object]:
    start = time.perf_counter()
    out = fn()
    return time.perf_counter() - start, out


def bench_scenes(pairs: int = 200, size: int = 128) -> dict:
    """Scene generation rate at ``size`` px: rendering alone, and rendering plus PNG writing."""
    from .scenes import generate_scenes, pair_rng, render_pair

    render_s, _ = _timed(lambda: [render_pair(pair_rng(0, i), size) for i in range(pairs)])
    with tempfile.TemporaryDirectory(dir=os.getcwd() if os.access(os.getcwd(), os.W_OK) else None) as tmp:
        write_s, _ = _timed(lambda: generate_scenes(Path(tmp) / "s", pairs=pairs, size=size, seed=0))
    return {"pairs": pairs, "size_px": size, "render_pairs_per_s": pairs / render_s,
            "render_and_write_pairs_per_s": pairs / write_s}


def bare_forward_seconds(images, encoder, batch_size: int) -> float:
    """Seconds of the bare forward pass over preloaded image tensors, after one warm-up batch."""
    import torch

    with torch.inference_mode():
        encoder.module(images[:2])  # warm-up
        start = time.perf_counter()
        for i in range(0, len(images), batch_size):
            encoder.module(images[i : i + batch_size])
        return time.perf_counter() - start


def bench_extraction(pairs, spec: str = "torchvision:resnet18", *, image_size: int | None = 224,
                     batch_size: int = 32) -> dict:
    """End-to-end extraction vs the bare forward pass on preloaded tensors; cold vs warm cache."""
    import torch

    from .data import load_rgb
    from .encoders import extract_features, load_encoder
    from .options import ExtractionOptions

    encoder = load_encoder(spec, device="cpu", image_size=image_size)
    images = torch.stack([encoder.preprocess(load_rgb(p)) for pair in zip(pairs.clean, pairs.cluttered) for p in pair])
    bare_before = bare_forward_seconds(images, encoder, batch_size)
    with tempfile.TemporaryDirectory() as cache:
        cold_s, _ = _timed(lambda: extract_features(pairs, encoder, progress=False, options=ExtractionOptions(batch_size=batch_size, cache_dir=cache)))
        warm_s, _ = _timed(lambda: extract_features(pairs, encoder, progress=False, options=ExtractionOptions(batch_size=batch_size, cache_dir=cache)))
    bare_after = bare_forward_seconds(images, encoder, batch_size)
    bare_s = (bare_before + bare_after) / 2  # the host is shared: average the bracketing runs
    n_images = len(images)
    return {"spec": spec, "image_size": image_size, "pairs": len(pairs), "bare_forward_s": bare_s,
            "bare_images_per_s": n_images / bare_s, "extract_s": cold_s, "extract_images_per_s": n_images / cold_s,
            "extract_over_bare": cold_s / bare_s, "warm_cache_s": warm_s, "warm_cache_speedup": cold_s / warm_s}


# Breakdown columns of the statistics benchmark: four clutter factors of three levels each,
# as in the generated sample scenes (surface, distractors, lighting, level).
STAT_FACTORS = 4
STAT_LEVELS = 3


def _stat_features(n_pairs: int, dim: int, factors: int = STAT_FACTORS, levels: int = STAT_LEVELS, seed: int = 0):
    """Synthetic float32 pairs (scene + noise, clutter adds a small shift), one task and
    ``factors`` seeded factor columns of ``levels`` values each."""
    rng = np.random.default_rng(seed)
    scene = rng.normal(size=(n_pairs, dim)).astype(np.float32)
    clean = scene + 0.5 * rng.normal(size=scene.shape).astype(np.float32)
    cluttered = scene + 0.5 * rng.normal(size=scene.shape).astype(np.float32) + 0.1
    tasks = {"part": np.array(["bolt", "nut", "gear", "washer"])[np.arange(n_pairs) % 4]}
    columns = {f"factor_{k}": (1 + rng.integers(0, levels, n_pairs)).astype(str) for k in range(factors)}
    return clean, cluttered, tasks, columns


def bench_statistics(n_pairs: int = 2000, dim: int = 512, permutations: int = 1000, *,
                     factors: int = STAT_FACTORS, levels: int = STAT_LEVELS,
                     extract_images_per_s: float | None = None, compare_workers: bool = False) -> dict:
    """The whole statistics stage (all metrics, breakdowns by ``factors`` x ``levels``) on
    synthetic paired features.

    With ``extract_images_per_s`` (measured in the same run) the figures add the seconds
    extracting these pairs would take and ``share_of_extraction``. With ``compare_workers``
    the same call also runs its subgroups on a thread pool (one worker per core), for the
    ratio in this run.
    """
    from . import scoring
    from .options import ScoringOptions

    clean, cluttered, tasks, columns = _stat_features(n_pairs, dim, factors, levels)
    options = ScoringOptions(permutations=permutations, seed=0)
    seconds, _ = _timed(lambda: scoring.score_features(clean, cluttered, tasks=tasks, factors=columns, options=options))
    out = {"pairs": n_pairs, "dim": dim, "permutations": permutations, "factors": factors, "levels": levels,
           "seconds": seconds}
    if compare_workers:
        default, scoring._WORKERS = scoring._WORKERS, None
        try:
            out["thread_pool_seconds"], _ = _timed(
                lambda: scoring.score_features(clean, cluttered, tasks=tasks, factors=columns, options=options))
        finally:
            scoring._WORKERS = default
        out["thread_pool_speedup"] = seconds / out["thread_pool_seconds"]
    if extract_images_per_s:
        out["extract_s"] = 2 * n_pairs / extract_images_per_s
        out["share_of_extraction"] = seconds / out["extract_s"]
    return out


_STATS_MEMORY_CHILD = """
import resource, sys, numpy as np
from invariance.options import ScoringOptions
from invariance.scoring import score_features
n, d = int(sys.argv[1]), int(sys.argv[2])
rng = np.random.default_rng(0)
x = rng.normal(size=(n, d)).astype(np.float32)
y = x + 0.5 * rng.normal(size=(n, d)).astype(np.float32)
before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
score_features(x, y, options=ScoringOptions(permutations=200, seed=0))
print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss, before)
"""


def bench_statistics_memory(n_pairs: int = 20000, dim: int = 512) -> dict:
    """Peak resident memory of the statistics stage, in a fresh process (its own figure only)."""
    start = time.perf_counter()
    out = subprocess.run([sys.executable, "-c", _STATS_MEMORY_CHILD, str(n_pairs), str(dim)],
                         capture_output=True, text=True, check=True)
    peak_kib, before_kib = (int(v) for v in out.stdout.split())
    return {"pairs": n_pairs, "dim": dim, "peak_rss_gib": peak_kib / 2**20, "before_gib": before_kib / 2**20,
            "seconds": time.perf_counter() - start}


def tiny_512d_encoder():
    """A nearly free 512-d encoder, so the memory figure is the extraction pipeline's own."""
    from torch import nn

    model = nn.Sequential(nn.AdaptiveAvgPool2d(2), nn.Flatten(), nn.Linear(12, 512))
    model.invariance_preprocess = {"image_size": 32}
    return model


_FEATURE_MEMORY_CHILD = """
import sys
from pathlib import Path
from invariance.bench import _peak_rss_kib, _reset_peak_rss
from invariance.data import PairSet, discover_pairs
from invariance.encoders import extract_features, load_encoder
from invariance.options import ExtractionOptions
n = int(sys.argv[1])
base = discover_pairs(sys.argv[2])
idx = [i % len(base) for i in range(n)]
pairs = PairSet.from_paths([base.clean[i] for i in idx], [base.cluttered[i] for i in idx], [str(i) for i in range(n)])
encoder = load_encoder("python:invariance.bench:tiny_512d_encoder", device="cpu")
extract_features(pairs.subset(range(4)), encoder, progress=False)  # model and libraries loaded
before = _reset_peak_rss()
clean, cluttered = extract_features(pairs, encoder, progress=False, options=ExtractionOptions(batch_size=64))["output"]
print(_peak_rss_kib(), before, clean.shape[1])
"""


def _status_kib(field: str) -> int | None:
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith(field + ":"):
                return int(line.split()[1])
    except OSError:
        pass
    return None


def _reset_peak_rss() -> int:
    """Reset the peak-RSS mark to the current RSS (Linux: writing 5 to clear_refs, proc(5))
    and return the current RSS in KiB; elsewhere the peak keeps start-up (an upper bound)."""
    try:
        Path("/proc/self/clear_refs").write_text("5")
    except OSError:
        pass
    return _status_kib("VmRSS") or resource.getrusage(resource.RUSAGE_SELF).ru_maxrss


def _peak_rss_kib() -> int:
    return _status_kib("VmHWM") or resource.getrusage(resource.RUSAGE_SELF).ru_maxrss


def bench_feature_memory(sample_dir, n_pairs: int = 5000) -> dict:
    """Peak memory that extracting ``n_pairs`` of 512-d features adds above the loaded model,
    in a fresh process (images reused from ``sample_dir``)."""
    start = time.perf_counter()
    out = subprocess.run([sys.executable, "-c", _FEATURE_MEMORY_CHILD, str(n_pairs), str(sample_dir)],
                         capture_output=True, text=True, check=True)
    peak_kib, before_kib, dim = (int(v) for v in out.stdout.split())
    return {"pairs": n_pairs, "dim": dim, "peak_above_model_gib": (peak_kib - before_kib) / 2**20,
            "seconds": time.perf_counter() - start}


def bench_align_step(image_size: int = 128, batch_size: int = 32, steps: int = 5) -> dict:
    """Cost of one alignment step of ResNet-18's last block (``layer4``) with the frozen trunk
    cached, against a step that trains the whole network end to end (backward through every
    layer) and against one that re-runs the frozen trunk forward every step (no backward
    through it, the cheapest step without a cache). Each step is the alignment's own: the
    discriminator through gradient reversal, the anchor on the original features, and the
    paired and mean-matching terms between the batch's two halves (as clean and cluttered).

    By operation count the cached step is about 0.25x the end-to-end step and 0.5x the
    frozen re-run (layer4 is about a quarter of ResNet-18's forward cost, a backward about
    twice a forward).
    """
    import torch
    from torch.nn import functional as F

    from .align import domain_loss, make_discriminator, mean_matching_loss, paired_drift_loss, split_module, whitening
    from .encoders import load_encoder

    torch.manual_seed(0)
    module = load_encoder("torchvision:resnet18", device="cpu").module.eval()
    x = torch.randn(batch_size, 3, image_size, image_size)
    trunk, tail, _ = split_module(module, "layer4", x[:2])
    with torch.no_grad():
        cached = trunk(x)  # what alignment stores once per image
        anchor = tail(cached)
        # the cached step is only a fair stand-in if trunk then tail is the whole network
        split_error = float((anchor - module(x)).abs().max())
    disc = make_discriminator(anchor.shape[1], torch.Generator().manual_seed(0))
    half = batch_size // 2
    white = whitening(anchor)
    tail_opt = torch.optim.Adam([*tail.parameters(), *disc.parameters()], lr=1e-5)
    whole_opt = torch.optim.Adam([*module.parameters(), *disc.parameters()], lr=1e-5)

    def step(optimizer, features):
        clean, cluttered = features[:half], features[half : 2 * half]
        loss = (domain_loss(disc, clean, cluttered, 1.0)[0] + F.mse_loss(features, anchor)
                + paired_drift_loss(clean, cluttered)
                + mean_matching_loss(clean, cluttered, white))
        optimizer.zero_grad(set_to_none=True)
        loss.backward()
        optimizer.step()

    def rerun_trunk():
        with torch.no_grad():
            return trunk(x)

    variants = {
        "whole": lambda: step(whole_opt, module(x)),
        "frozen": lambda: step(tail_opt, tail(rerun_trunk())),
        "cached": lambda: step(tail_opt, tail(cached)),
    }
    seconds = dict.fromkeys(variants, 0.0)
    for fn in variants.values():  # warm-up
        fn()
    for _ in range(steps):  # alternate so machine noise hits every variant alike
        for name, fn in variants.items():
            seconds[name] += _timed(fn)[0]
    return {"image_size": image_size, "batch_size": batch_size, "split_max_abs_error": split_error,
            "whole_network_step_s": seconds["whole"] / steps,
            "frozen_trunk_rerun_step_s": seconds["frozen"] / steps,
            "cached_trunk_step_s": seconds["cached"] / steps,
            "align_step_ratio": seconds["cached"] / seconds["whole"],
            "cached_over_frozen_rerun": seconds["cached"] / seconds["frozen"]}


def estimate_seconds(n_pairs: int, extraction: dict, statistics: dict) -> dict:
    """Rough time for ``n_pairs``: extraction scales with images, statistics with pairs squared
    up to the exact-MMD limit (the kernel matrix), linearly beyond it (subsampled MMD)."""
    from .metrics.mmd import MAX_PAIRS

    extract = 2 * n_pairs / extraction["extract_images_per_s"]
    ratio = n_pairs / statistics["pairs"]
    capped = min(n_pairs, MAX_PAIRS) / statistics["pairs"]
    stats = statistics["seconds"] * max(ratio, capped**2)
    return {"pairs": n_pairs, "extract_s": extract, "statistics_s": stats, "total_s": extract + stats}


def _line(label, value, unit, target=None, better="below"):
    text = f"{label:<50} {value:10.3f} {unit:<7}"
    if target is not None:
        ok = value <= target if better == "below" else value >= target
        text += f"   target {'<=' if better == 'below' else '>='} {target:g}  {'met' if ok else 'NOT met'}"
    return text


def run_bench(*, spec: str = "torchvision:resnet18", pairs: int | None = None, quick: bool = False, echo=print) -> dict:
    """Measure every figure and print it beside its target; returns the figures as a dict."""
    from .data import discover_pairs
    from .demo import sample_images_dir
    from .scenes import generate_scenes

    figures = {"targets": TARGETS, "cpu_count": os.cpu_count()}
    n_sample = 40 if quick else 200
    sample = sample_images_dir()
    with tempfile.TemporaryDirectory() as tmp:
        if sample is None:
            sample = generate_scenes(Path(tmp) / "sample", pairs=n_sample, size=128, seed=7)
        data = discover_pairs(sample).subset(range(n_sample))
        echo(f"measuring on {len(data)} pairs from {sample} ({os.cpu_count()} CPU cores)")
        ex = figures["extraction"] = bench_extraction(data, spec, image_size=224)
        _report_rest(figures, ex, sample, spec, pairs, quick, echo)
    return figures


def _report_rest(figures, ex, sample, spec, pairs, quick, echo):
    echo(_line(f"bare forward pass ({spec}, 224 px)", ex["bare_images_per_s"], "img/s"))
    echo(_line("end-to-end extraction", ex["extract_images_per_s"], "img/s"))
    echo(_line("extraction / bare forward pass", ex["extract_over_bare"], "x", TARGETS["extract_over_bare"]))
    echo(_line("warm-cache speed-up", ex["warm_cache_speedup"], "x", TARGETS["warm_cache_speedup"], "above"))

    st = figures["statistics"] = bench_statistics(500 if quick else 2000, 512, 1000)
    extract_same = 2 * st["pairs"] / ex["extract_images_per_s"]
    st["share_of_extraction"] = st["seconds"] / extract_same
    echo(_line(f"statistics, {st['pairs']} pairs x 512-d, 1000 perms", st["seconds"], "s"))
    echo(_line("statistics / extraction of the same pairs", st["share_of_extraction"], "", TARGETS["stats_share"]))

    if not quick:
        fm = figures["feature_memory"] = bench_feature_memory(sample, 5000)
        echo(_line("extracting 5,000 pairs x 512-d, peak above model", fm["peak_above_model_gib"], "GiB",
                   TARGETS["feature_memory_gib"]))
        sm = figures["statistics_memory"] = bench_statistics_memory(20000, 512)
        echo(_line("statistics peak memory, 20,000 x 512-d", sm["peak_rss_gib"], "GiB", TARGETS["stats_memory_gib"]))

    al = figures["alignment"] = bench_align_step(128, 32, 3 if quick else 5)
    echo(_line("align step, whole network (ResNet-18, 128 px)", al["whole_network_step_s"], "s"))
    echo(_line("align step, frozen trunk re-run, layer4 trained", al["frozen_trunk_rerun_step_s"], "s"))
    echo(_line("align step, cached trunk, layer4 trained", al["cached_trunk_step_s"], "s"))
    echo(_line("cached / whole-network step", al["align_step_ratio"], "", TARGETS["align_step_ratio"]))
    echo(_line("cached / frozen-trunk re-run step", al["cached_over_frozen_rerun"], ""))

    sc = figures["scenes"] = bench_scenes(50 if quick else 200, 128)
    echo(_line("scene rendering, 128 px", sc["render_pairs_per_s"], "pairs/s", TARGETS["scenes_pairs_per_s"], "above"))
    echo(_line("scene rendering + PNG writing, 128 px", sc["render_and_write_pairs_per_s"], "pairs/s"))

    from .encoders import load_encoder
    from .sources.timing import time_episode_extraction

    ep = figures["episode_source"] = time_episode_extraction(load_encoder(spec, device="cpu"),
                                                             episodes=4 if quick else 8)
    echo(_line(f"HDF5 episode extraction / bare pass ({ep['frames']} frames)", ep["ratio"], "x",
               TARGETS["episode_over_bare"]))

    if pairs:
        est = figures["estimate"] = estimate_seconds(pairs, ex, figures["statistics"])
        echo(f"estimate for {pairs:,} pairs with {spec} at 224 px: extraction {est['extract_s'] / 60:.1f} min, "
             f"statistics {est['statistics_s'] / 60:.1f} min, total {est['total_s'] / 60:.1f} min")
        from .scale_bench import run_scale_bench

        # Engine pairs are few because each engine extracts them with the full encoder;
        # the per-worker rate includes actor start-up, so the cluster estimate is pessimistic.
        figures["scale"] = run_scale_bench(pairs=pairs, spec=spec, engine_pairs=100 if quick else 400,
                                           stats_pairs=min(pairs, 100_000 if quick else 1_000_000), echo=echo)
