"""Extraction from an episode file against the bare forward pass on the same frames.

    python tests/benchmarks/bench_sources.py [--episodes 8] [--frames 32] [--size 64] [--image-size 224] [--repeat 2]

Writes an HDF5 file of workbench episodes (invariance.sources.synthetic) into a temporary
folder and times ``extract_frame_features(iter_frames(...))`` (lazy block reads,
preprocessing on a read-ahead thread, forward pass) with torchvision:resnet18, bracketed
by the bare forward pass over the same frames preprocessed beforehand (target: within
1.15x; invariance.sources.timing). Also prints reading alone and the peak resident memory.
"""

from __future__ import annotations

import argparse
import resource
import sys
from pathlib import Path

import torch

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from invariance.encoders import load_encoder  # noqa: E402
from invariance.sources.timing import BATCH, time_episode_extraction  # noqa: E402

SPEC = "torchvision:resnet18"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--episodes", type=int, default=8)
    parser.add_argument("--frames", type=int, default=32)
    parser.add_argument("--size", type=int, default=64, help="frame side in the file (px)")
    parser.add_argument("--image-size", type=int, default=224, help="encoder input side (px)")
    parser.add_argument("--repeat", type=int, default=2, help="runs (the machine's load moves the figures)")
    args = parser.parse_args()
    enc = load_encoder(SPEC, device="cpu", image_size=args.image_size)
    print(f"torch {torch.__version__}, {torch.get_num_threads()} threads, batch {BATCH}, {SPEC} at "
          f"{args.image_size} px, {args.episodes} episodes x {args.frames} frames of {args.size} px")
    for run in range(args.repeat):
        t = time_episode_extraction(enc, episodes=args.episodes, frames=args.frames, size=args.size)
        n = t["frames"]
        print(f"run {run + 1}: read {t['read_s']:.2f} s | bare forward {t['bare_s']:.2f} s ({n / t['bare_s']:.1f} "
              f"frames/s) | extract from HDF5 {t['extract_s']:.2f} s ({n / t['extract_s']:.1f} frames/s) | "
              f"{t['ratio']:.2f}x the bare pass (target <= 1.15x)")
    print(f"peak resident memory {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MiB")


if __name__ == "__main__":
    main()
