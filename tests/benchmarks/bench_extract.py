"""Feature extraction: end-to-end cost over the bare forward pass, cache speed-up, peak memory.

    python tests/benchmarks/bench_extract.py [--pairs 200] [--workers 0 1 2] [--memory-pairs 5000]

Prints, from one run on this machine:
1. end-to-end ``extract_features`` of the sample pairs with torchvision:resnet18 at 224 px,
   for 0, 1 and 2 image-decoding worker processes, against the bare forward pass of the same
   network on the same number of preloaded tensors (target: within 1.15x);
2. a second run served by a warm feature cache (target: at least 20x faster);
3. the peak resident memory added by extracting 5,000 pairs of 512-d features through a fake
   fast module (measured in a fresh child process, so the figure is this job's alone).
"""

from __future__ import annotations

import argparse
import resource
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

import numpy as np
import torch
from PIL import Image

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from invariance import encoders  # noqa: E402
from invariance.data import PairSet, discover_pairs, load_rgb  # noqa: E402

SPEC = "torchvision:resnet18"
BATCH = 32


def _sample_pairs(n: int, scratch: Path) -> tuple[PairSet, str]:
    sample = ROOT / "sample_images"
    if (sample / "clean").is_dir() and (sample / "cluttered").is_dir():
        pairs = discover_pairs(sample)
        return pairs.subset(range(min(n, len(pairs)))), f"{sample} ({min(n, len(pairs))} pairs)"
    rng = np.random.default_rng(0)
    paths = {}
    for view in ("clean", "cluttered"):
        (scratch / view).mkdir(parents=True, exist_ok=True)
        paths[view] = []
        for i in range(n):
            path = scratch / view / f"{i:04d}.png"
            Image.fromarray(rng.integers(0, 256, (128, 128, 3), dtype=np.uint8)).save(path)
            paths[view].append(path)
    return PairSet.from_paths(paths["clean"], paths["cluttered"]), f"{n} random-noise 128 px PNG pairs"


def _bare_forward(pairs: PairSet, enc) -> float:
    tensors = torch.stack([enc.preprocess(load_rgb(p)) for path in zip(pairs.clean, pairs.cluttered) for p in path])
    with torch.inference_mode():
        enc.module(tensors[:2])  # warm-up, as the extraction's first batch is not timed apart
        start = time.perf_counter()
        for i in range(0, len(tensors), BATCH):
            enc.module(tensors[i : i + BATCH])
        return time.perf_counter() - start


def _timed(fn) -> float:
    start = time.perf_counter()
    fn()
    return time.perf_counter() - start


def _speed(pairs: PairSet, scratch: Path, workers_to_try) -> None:
    enc = encoders.load_encoder(SPEC, device="cpu")
    images = 2 * len(pairs)
    # The machine is shared: time the bare pass before and after and compare with their mean.
    bare_before = _bare_forward(pairs, enc)
    took = {}
    for workers in workers_to_try:
        took[workers] = _timed(
            lambda: encoders.extract_features(pairs, enc, batch_size=BATCH, progress=False, num_workers=workers)
        )
    bare_after = _bare_forward(pairs, enc)
    bare = (bare_before + bare_after) / 2
    decode = _timed(lambda: [enc.preprocess(load_rgb(p)) for path in zip(pairs.clean, pairs.cluttered) for p in path])
    print(f"decode + preprocess  {decode:7.2f} s  ({100 * decode / bare:4.1f}% of the bare forward pass)")
    print(f"bare forward pass    {bare:7.2f} s  ({images / bare:6.1f} img/s, {images} preloaded tensors; "
          f"{bare_before:.2f} s before, {bare_after:.2f} s after)")
    for workers, seconds in took.items():
        print(f"extract, {workers} workers   {seconds:7.2f} s  ({images / seconds:6.1f} img/s)  "
              f"ratio {seconds / bare:5.2f}x  (target <= 1.15x)")
    cache = scratch / "cache"
    cold = _timed(lambda: encoders.extract_features(pairs, enc, batch_size=BATCH, cache_dir=cache, progress=False))
    warm = _timed(lambda: encoders.extract_features(pairs, enc, batch_size=BATCH, cache_dir=cache, progress=False))
    print(f"cache cold           {cold:7.2f} s   (num_workers=None: {encoders.DEFAULT_NUM_WORKERS} when over one batch)")
    print(f"cache warm           {warm:7.2f} s   speed-up {cold / warm:6.1f}x  (target >= 20x)")


FAKE_MODULE = """
    from torch import nn

    def fast():
        # 512-d features at almost no compute: the figure is the pipeline's own memory.
        model = nn.Sequential(nn.AdaptiveAvgPool2d(2), nn.Flatten(), nn.Linear(12, 512))
        model.invariance_preprocess = {"image_size": 32}
        return model
"""


def _memory_child(n: int, scratch: Path) -> None:
    scratch.mkdir(parents=True, exist_ok=True)
    (scratch / "fake.py").write_text(textwrap.dedent(FAKE_MODULE))
    enc = encoders.load_encoder(f"python:{scratch / 'fake.py'}:fast", device="cpu")
    base, _ = _sample_pairs(20, scratch / "img")
    idx = [i % len(base) for i in range(n)]
    pairs = PairSet.from_paths([base.clean[i] for i in idx], [base.cluttered[i] for i in idx], [f"{i}.png" for i in range(n)])
    before = _rss_kib("VmRSS")
    _reset_peak()
    start = time.perf_counter()
    clean, cluttered = encoders.extract_features(pairs, enc, batch_size=64, progress=False)["output"]
    took = time.perf_counter() - start
    peak = _rss_kib("VmHWM")
    print(f"memory: {n} pairs of {clean.shape[1]}-d features in {took:.1f} s; result arrays "
          f"{(clean.nbytes + cluttered.nbytes) / 2**20:.1f} MiB; peak RSS {(peak - before) / 1024:.1f} MiB "
          f"above the {before / 1024:.0f} MiB before extraction")


def _rss_kib(field: str) -> int:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith(field + ":"):
            return int(line.split()[1])
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss


def _reset_peak() -> None:
    # Writing 5 to clear_refs resets the VmHWM peak (Linux >= 4.0, proc(5)).
    try:
        Path("/proc/self/clear_refs").write_text("5")
    except OSError:
        print("note: cannot reset the peak RSS here; the figure includes start-up", file=sys.stderr)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--pairs", type=int, default=200)
    parser.add_argument("--memory-pairs", type=int, default=5000)
    parser.add_argument("--workers", type=int, nargs="+", default=[0, 1, 2], help="worker counts to time")
    parser.add_argument("--memory-child", type=Path, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.memory_child:
        _memory_child(args.memory_pairs, args.memory_child)
        return
    print(f"torch {torch.__version__}, {torch.get_num_threads()} intra-op threads, batch {BATCH}")
    with tempfile.TemporaryDirectory() as tmp:
        scratch = Path(tmp)
        pairs, what = _sample_pairs(args.pairs, scratch / "pairs")
        print(f"data: {what}; encoder {SPEC} at 224 px")
        _speed(pairs, scratch, args.workers)
        subprocess.run(
            [sys.executable, __file__, "--memory-child", str(scratch / "mem"), "--memory-pairs", str(args.memory_pairs)],
            check=True,
        )


if __name__ == "__main__":
    main()
