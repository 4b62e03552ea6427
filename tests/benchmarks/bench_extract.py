"""Feature extraction in detail: how many image-decoding workers pay off on this machine.

    python tests/benchmarks/bench_extract.py [--pairs 200] [--workers 0 1 2]

Times end-to-end ``extract_features`` of the sample pairs with torchvision:resnet18 at
224 px for each worker count, bracketed by the bare forward pass on the same preloaded
tensors (target: within 1.15x), and the share of decoding + preprocessing (the most a
worker can hide). This is the measurement behind
``invariance.encoders.DEFAULT_NUM_WORKERS``; the cache speed-up and memory figures come
from ``invariance bench``.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import torch

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from invariance import encoders  # noqa: E402
from invariance.bench import bare_forward_seconds  # noqa: E402
from invariance.data import discover_pairs, load_rgb  # noqa: E402
from invariance.options import ExtractionOptions  # noqa: E402

SPEC = "torchvision:resnet18"
BATCH = 32


def _timed(fn) -> float:
    start = time.perf_counter()
    fn()
    return time.perf_counter() - start


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--pairs", type=int, default=200)
    parser.add_argument("--workers", type=int, nargs="+", default=[0, 1, 2], help="worker counts to time")
    args = parser.parse_args()
    pairs = discover_pairs(ROOT / "sample_images")
    pairs = pairs.subset(range(min(args.pairs, len(pairs))))
    enc = encoders.load_encoder(SPEC, device="cpu")
    print(f"torch {torch.__version__}, {torch.get_num_threads()} intra-op threads, batch {BATCH}, {len(pairs)} pairs")
    decode = _timed(lambda: [enc.preprocess(load_rgb(p)) for pair in zip(pairs.clean, pairs.cluttered) for p in pair])
    tensors = torch.stack([enc.preprocess(load_rgb(p)) for pair in zip(pairs.clean, pairs.cluttered) for p in pair])
    # The machine is shared: time the bare pass before and after and compare with their mean.
    bare_before = bare_forward_seconds(tensors, enc, BATCH)
    took = {w: _timed(lambda: encoders.extract_features(pairs, enc, progress=False, num_workers=w, options=ExtractionOptions(batch_size=BATCH)))
            for w in args.workers}
    bare = (bare_before + bare_forward_seconds(tensors, enc, BATCH)) / 2
    images = len(tensors)
    print(f"decode + preprocess  {decode:7.2f} s  ({100 * decode / bare:4.1f}% of the bare forward pass)")
    print(f"bare forward pass    {bare:7.2f} s  ({images / bare:6.1f} img/s)")
    for workers, seconds in took.items():
        print(f"extract, {workers} workers   {seconds:7.2f} s  ({images / seconds:6.1f} img/s)  "
              f"ratio {seconds / bare:5.2f}x  (target <= 1.15x)")


if __name__ == "__main__":
    main()
