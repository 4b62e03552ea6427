"""Cost of a drift map for one 128 px pair, in units of one bare forward pass.

    python tests/benchmarks/bench_explain.py [--spec SPEC] [--repeats 20] [--threads 1]

The pair is a generated workbench scene with surface and lighting clutter at level 3, so that every
patch of the 16 px grid differs between the views (the first such pair) and none is skipped: the occlusion map
runs 64 restored images plus the two views. Printed beside the bare forward pass of one
preprocessed image (batch of 1, no decoding or preprocessing: the cheapest unit), and of
one image with its preprocessing. Target (issue 13): the batched occlusion map costs at
most 64 forward passes. Fastest of ``--repeats`` interleaved rounds; compare figures from
one run only (the machine is shared).
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import torch
from PIL import Image

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from invariance.encoders import load_encoder  # noqa: E402
from invariance.explain import gradient_map, occlusion_map  # noqa: E402
from invariance.explain.occlusion import _grid  # noqa: E402
from invariance.scenes import pair_rng, render_pair  # noqa: E402

PATCH = 16
SIZE = 128


def _best_seconds(fns: dict, rounds: int) -> dict:
    """Fastest run of each function over ``rounds`` interleaved rounds, after a warm-up.

    Interleaving exposes every figure to the same spells of load from other work, and on a
    shared machine the minimum is the figure least disturbed by it (the advice of Python's
    ``timeit`` documentation)."""
    best = {}
    for name, fn in fns.items():
        fn()  # warm-up: first-call allocations and lazy imports are not the steady cost
        best[name] = float("inf")
    for _ in range(rounds):
        for name, fn in fns.items():
            start = time.perf_counter()
            fn()
            best[name] = min(best[name], time.perf_counter() - start)
    return best


def _fully_changed_pair():
    """The first level-3 pair (seed 0) in which every patch of the grid differs between the views."""
    for index in range(100):
        clean, cluttered, _ = render_pair(pair_rng(0, index), SIZE, level=3, factors=("surface", "lighting"))
        if all((clean[b] != cluttered[b]).any() for b in _grid(SIZE, SIZE, PATCH)):
            return clean, cluttered
    raise SystemExit("no fully changed pair among the first 100; change the seed")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--spec", default="python:invariance.zoo:clean_only_encoder")
    parser.add_argument("--repeats", type=int, default=20, help="interleaved timing rounds")
    parser.add_argument("--batch-size", type=int, default=16, help="images per forward pass of the occlusion map")
    parser.add_argument("--threads", type=int, default=1,
                        help="torch intra-op threads (1: steadier on a shared machine)")
    args = parser.parse_args()
    torch.set_num_threads(args.threads)

    encoder = load_encoder(args.spec, device="cpu")
    clean, cluttered = _fully_changed_pair()
    x = encoder.preprocess(Image.fromarray(cluttered))[None]

    def bare():
        with torch.inference_mode():
            encoder(x)

    def with_preprocess():
        with torch.inference_mode():
            encoder(encoder.preprocess(Image.fromarray(cluttered))[None])

    result = occlusion_map(encoder, clean, cluttered, patch=PATCH, batch_size=args.batch_size)
    batch = x.expand(result["forward_images"], -1, -1, -1).contiguous()

    def batched():  # the same images in the same batch sizes as the map, forward passes only
        with torch.inference_mode():
            for start in range(0, len(batch), args.batch_size):
                encoder(batch[start : start + args.batch_size])

    best = _best_seconds({
        "unit": bare,
        "unit_pre": with_preprocess,
        "occlusion": lambda: occlusion_map(encoder, clean, cluttered, patch=PATCH, batch_size=args.batch_size),
        "floor": batched,
        "gradient": lambda: gradient_map(encoder, clean, cluttered),
    }, args.repeats)
    unit, unit_pre, occ, floor, grad = (best[k] for k in ("unit", "unit_pre", "occlusion", "floor", "gradient"))
    print(f"encoder {args.spec}, {SIZE} px pair, {PATCH} px grid ({(SIZE // PATCH) ** 2} patches), "
          f"torch threads {torch.get_num_threads()}, batch {args.batch_size}")
    print(f"bare forward pass, 1 image:              {unit * 1e3:8.2f} ms  = 1 unit")
    print(f"forward pass with preprocessing, 1 image: {unit_pre * 1e3:8.2f} ms  = {unit_pre / unit:5.2f} units")
    print(f"occlusion map ({result['forward_images']} images):          {occ * 1e3:8.2f} ms  = "
          f"{occ / unit:5.1f} units (target <= 64); {occ / unit_pre:5.1f} preprocessed-forward units")
    print(f"  of which bare forward passes of {batch.shape[0]} images in batches of {args.batch_size}: "
          f"{floor * 1e3:8.2f} ms  = "
          f"{floor / unit:5.1f} units (the floor batching leaves)")
    print(f"gradient x input map:                    {grad * 1e3:8.2f} ms  = {grad / unit:5.1f} units")


if __name__ == "__main__":
    main()
