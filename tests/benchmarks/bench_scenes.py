"""Scene generation speed: render pairs/s and render+write pairs/s, on one core.

    python tests/benchmarks/bench_scenes.py [--pairs 400] [--size 128] [--repeats 3] [--dir DIR]

Prints the best of ``--repeats`` runs, as wall-clock and as CPU time of this process
(CPU time is the steadier figure on a shared machine). The write figure includes creating
the files, whose cost depends much on the file system: ``--dir`` picks where (default: the
system temporary folder). Not a test: nothing is asserted.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMEXPR_NUM_THREADS"):
    os.environ[_var] = "1"

import argparse  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from invariance.scenes import FACTORS, generate_scenes, pair_rng, render_pair  # noqa: E402


def _one_core() -> None:
    if hasattr(os, "sched_setaffinity"):
        os.sched_setaffinity(0, {min(os.sched_getaffinity(0))})
    try:
        import torch  # the package depends on it; keep it to one thread like numpy

        torch.set_num_threads(1)
    except ImportError:  # pragma: no cover
        pass


def _best(fn, repeats: int) -> tuple[float, float]:
    """Best (wall seconds, CPU seconds) over ``repeats`` calls."""
    walls, cpus = [], []
    for _ in range(repeats):
        w0, c0 = time.perf_counter(), time.process_time()
        fn()
        walls.append(time.perf_counter() - w0)
        cpus.append(time.process_time() - c0)
    return min(walls), min(cpus)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pairs", type=int, default=400)
    ap.add_argument("--size", type=int, default=128)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--dir", default=None, help="folder for the written sets (default: system temp)")
    args = ap.parse_args()
    _one_core()
    n, size = args.pairs, args.size

    def render(factors=FACTORS, level=None):
        def run():
            for i in range(n):
                render_pair(pair_rng(0, i), size, factors, level)

        return run

    def write():
        with tempfile.TemporaryDirectory(dir=args.dir) as tmp:
            generate_scenes(Path(tmp) / "scenes", pairs=n, size=size, seed=0)

    print(f"scene generation, {n} pairs at {size} px, one core, best of {args.repeats}")
    cases = [("render (default: level 1-3, random factors)", render())]
    cases += [(f"render, only {f} at level 3", render((f,), 3)) for f in FACTORS]
    cases += [("render, level 0 (control)", render((), 0))]
    where = args.dir or tempfile.gettempdir()
    cases += [(f"render + write PNGs and labels.csv in {where}", write)]
    for name, fn in cases:
        wall, cpu = _best(fn, args.repeats)
        print(f"  {name:48s} {n / wall:6.0f} pairs/s wall  {n / cpu:6.0f} pairs/s CPU")


if __name__ == "__main__":
    main()
