"""Cold score vs warm re-score of the sample set, as a user runs them (whole processes).

    python tests/benchmarks/bench_rescore.py [--data sample_images] [--repeats 2]

The command is the one a user repeats while reading results::

    invariance score sample_images --encoder torchvision:resnet18 --layer layer3 --layer layer4

The cold run starts from an empty feature cache; the warm runs find every layer in it and,
through the request index (``invariance.feature_index``), never import torch or build the
model. Target (issue "statistics calibrated at the sizes users have"): warm >= 10x faster.
Timings are wall-clock seconds of whole processes, so start-up and imports count; run it on
an otherwise idle machine and compare the ratio, not the seconds.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]


def _run(data: Path, cache: Path, out: Path) -> float:
    env = {**os.environ, "INVARIANCE_CACHE": str(cache)}
    command = [str(Path(sys.executable).with_name("invariance")), "score", str(data), "--encoder", "torchvision:resnet18",
               "--layer", "layer3", "--layer", "layer4", "--json", str(out), "--quiet"]
    start = time.perf_counter()
    done = subprocess.run(command, env=env, capture_output=True, text=True)
    seconds = time.perf_counter() - start
    if done.returncode not in (0, 3):
        raise SystemExit(f"score failed ({done.returncode}):\n{done.stderr}")
    return seconds


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--data", type=Path, default=REPO / "sample_images")
    parser.add_argument("--repeats", type=int, default=2, help="warm runs (the median is reported)")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as scratch:
        scratch = Path(scratch)
        cold = _run(args.data, scratch / "cache", scratch / "cold.json")
        warm = sorted(_run(args.data, scratch / "cache", scratch / f"warm{i}.json") for i in range(args.repeats))
        median = warm[len(warm) // 2]
        same = (scratch / "cold.json").read_text().count('"mmd2"') == (scratch / "warm0.json").read_text().count('"mmd2"')
    print(f"cold score            {cold:7.1f} s")
    print(f"warm re-score         {median:7.1f} s (median of {len(warm)})")
    print(f"speed-up              {cold / median:7.1f}x   (target >= 10x)")
    print(f"same result layout    {same}")


if __name__ == "__main__":
    main()
