"""A million pairs: Ray vs local extraction, statistics from a features directory, the estimate.

    python tests/benchmarks/bench_scale.py [--engine-pairs 2000] [--stats-pairs 1000000]
        [--spec python:invariance.zoo:workbench_cnn] [--workers 2] [--gpu-spec torchvision:resnet18]

Prints, beside the targets of issue 16:
- extraction of ``--engine-pairs`` generated workbench pairs with the local engine and with
  Ray Data on ``--workers`` CPU actors (target: Ray at most 1.3x the local time on 2 cores);
- the statistics of ``--stats-pairs`` x 512-d float16 synthetic pairs read from a features
  directory, in a fresh process (targets: under 8 GiB peak and under 10 minutes on 2 cores);
- the estimate for 1,000,000 pairs on one machine and on N Ray workers;
- on a machine with CUDA: ResNet-18 at 224 px through Ray actors on the GPU vs the bare
  batched forward pass on preloaded tensors (target: at least 80%); otherwise "not run".
No figure is asserted: the machines are shared; read the ratios of one run.
Set INVARIANCE_BENCH_DIR to put the ~2 GB of synthetic shards on a roomy disk.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from invariance import scale_bench  # noqa: E402


def _gpu_ratio(spec: str, pairs: int) -> None:
    import torch

    if not torch.cuda.is_available():
        print("GPU: not run (no CUDA device here)")
        return
    from invariance.bench import bare_forward_seconds
    from invariance.data import discover_pairs, load_rgb
    from invariance.encoders import load_encoder
    from invariance.extract import extract_to_directory
    from invariance.scenes import generate_scenes

    with tempfile.TemporaryDirectory() as tmp:
        data = discover_pairs(generate_scenes(Path(tmp) / "s", pairs=pairs, size=224, seed=0))
        encoder = load_encoder(spec, device="cuda", image_size=224)
        images = torch.stack([encoder.preprocess(load_rgb(p)) for pair in zip(data.clean, data.cluttered)
                              for p in pair]).to("cuda")
        bare = bare_forward_seconds(images, encoder, 256)
        torch.cuda.synchronize()
        run = extract_to_directory(data, spec, Path(tmp) / "f", engine="ray", device="cuda", workers=1,
                                   image_size=224, batch_size=256, progress=False)
    ratio = bare / run["seconds"]
    print(f"GPU: bare forward {2 * pairs / bare:.0f} img/s, Ray extraction {2 * pairs / run['seconds']:.0f} img/s, "
          f"{ratio:.2f} of bare (target >= {scale_bench.TARGETS['gpu_over_bare']})")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--engine-pairs", type=int, default=2000)
    parser.add_argument("--stats-pairs", type=int, default=1_000_000)
    parser.add_argument("--spec", default="python:invariance.zoo:workbench_cnn")
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--gpu-spec", default="torchvision:resnet18")
    parser.add_argument("--gpu-pairs", type=int, default=2000)
    args = parser.parse_args()
    start = time.perf_counter()
    scale_bench.run_scale_bench(pairs=1_000_000, spec=args.spec, engine_pairs=args.engine_pairs,
                                stats_pairs=args.stats_pairs, workers=args.workers)
    _gpu_ratio(args.gpu_spec, args.gpu_pairs)
    print(f"benchmark wall time {time.perf_counter() - start:.0f} s")


if __name__ == "__main__":
    main()
