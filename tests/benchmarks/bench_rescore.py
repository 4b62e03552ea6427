"""Cold score vs warm re-score of the sample set, as a user runs them (whole processes).

    python tests/benchmarks/bench_rescore.py [--data sample_images] [--repeats 2]

The command is the one a user repeats while reading results::

    invariance score sample_images --encoder torchvision:resnet18 --layer layer3 --layer layer4

The cold run starts from an empty feature cache; the warm runs find every layer in it and,
through the request index (``invariance.feature_index``), never import torch or build the
model, and the statistics of the same options are read back from the score cache
(``invariance.score_cache``). Target (issue "statistics calibrated at the sizes users
have"): warm >= 10x faster. A re-score with other scoring options (here
``--permutations 999``) reuses the features and recomputes the statistics.
Timings are wall-clock seconds of whole processes, so start-up and imports count; run it on
an otherwise idle machine and compare the ratio, not the seconds.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]


def _run(data: Path, cache: Path, out: Path, *extra: str) -> float:
    env = {**os.environ, "INVARIANCE_CACHE": str(cache)}
    command = [str(Path(sys.executable).with_name("invariance")), "score", str(data), "--encoder", "torchvision:resnet18",
               "--layer", "layer3", "--layer", "layer4", "--json", str(out), "--quiet", *extra]
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
        first, again = (json.loads((scratch / name).read_text()) for name in ("cold.json", "warm0.json"))
        same = first["metrics"] == again["metrics"] and first.get("layers") == again.get("layers")
        restat = _run(args.data, scratch / "cache", scratch / "restat.json", "--permutations", "999")
    print(f"cold score            {cold:7.1f} s")
    print(f"warm re-score         {median:7.1f} s (median of {len(warm)})")
    print(f"speed-up              {cold / median:7.1f}x   (target >= 10x)")
    print(f"identical metrics     {same}")
    print(f"re-score, other options {restat:5.1f} s   ({cold / restat:.1f}x: features from the cache, statistics computed)")


if __name__ == "__main__":
    main()
