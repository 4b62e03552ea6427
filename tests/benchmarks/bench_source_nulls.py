"""Null calibration of `invariance score` through the HDF5, zarr and video readers (prints tables).

    python tests/benchmarks/bench_source_nulls.py          # 120 repetitions a kind (about 12 min on 2 cores)
    python tests/benchmarks/bench_source_nulls.py --kinds hdf5 --reps 200 --power-reps 0

The full-count companion of tests/test_source_nulls.py (issue 12). Each repetition writes
two domains of 20 episodes x 30 frames of 32 px as real files (h5py, zarr, PyAV) with no
shift and strongly correlated frames within an episode (tests/nulls.py: every recording
has its own exposure, colour cast and camera pose), scores them as
`invariance score A B --stride 5 --permutations 199` does (invariance.pipeline.score_sources,
the compact workbench CNN at 32 px), and tests the same features again with every frame
as its own unit. Paired: A and B film the same scenes; unpaired: A against a third
domain C of other scenes (zarr through --unpaired, as it names episodes by position).

Printed per kind, form and test: the share of repetitions with p <= 0.05 grouped by
episode (as `score` reports) and frame by frame, against the exact binomial 99% band
around 5% (scipy.stats.binom.interval). Power: the share of repetitions in which a known
clutter shift (domain B films the cluttered view, level 3) is found at p < 0.01 and
p <= 0.05. Seconds per repetition vary with machine load.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

from nulls import FILE_KINDS, rejection_band, source_null_repetition, source_null_study  # noqa: E402

SMALL_ENCODER = "python:invariance.zoo:clean_only_encoder"
ALPHA = 0.05
# The setting of tests/test_source_nulls.py, so the figures back its reduced counts.
SETTING = {"episodes": 20, "frames": 30, "stride": 5, "permutations": 199}


def _null_table(kind, study, seconds):
    low, high = rejection_band(study["reps"], ALPHA)
    rows = []
    for (form, unit, test), rate in sorted(study["rates"].items()):
        if unit != "grouped":
            continue
        frame = study["rates"][(form, "frame", test)]
        verdict = "inside" if low <= rate <= high else "OUTSIDE"
        rows.append(f"{kind:<6} {form:<9} {test:<7} {rate:>8.3f} {verdict:<8} {frame:>11.3f} "
                    f"{'above' if frame > high else 'NOT above':<10} [{low:.3f}, {high:.3f}]")
    rows.append(f"{kind:<6} {study['reps']} repetitions, {seconds / study['reps']:.2f} s each")
    return rows


def _power(kind, reps, encoder, folder, seed):
    found = {"domain": [0, 0], "mmd": [0, 0]}
    for rep in range(reps):
        run = source_null_repetition(kind, Path(folder) / f"shift_{rep}", seed + rep, encoder, unpaired=False,
                                     clutter=True, **SETTING)
        for test, p in run["paired"]["grouped"].items():
            found[test][0] += p < 0.01
            found[test][1] += p <= 0.05
    return {test: (a / reps, b / reps) for test, (a, b) in found.items()}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--kinds", default=",".join(FILE_KINDS), help="comma-separated: hdf5,zarr,video")
    parser.add_argument("--reps", type=int, default=120, help="null repetitions per kind")
    parser.add_argument("--power-reps", type=int, default=20, help="known-shift repetitions per kind (0: none)")
    parser.add_argument("--paired-only", action="store_true", help="leave out the unpaired form")
    parser.add_argument("--seed", type=int, default=1000)
    args = parser.parse_args()
    kinds = [k.strip() for k in args.kinds.split(",") if k.strip()]
    if not kinds or set(kinds) - set(FILE_KINDS) or args.reps < 1 or args.power_reps < 0:
        parser.error(f"--kinds takes {','.join(FILE_KINDS)}; --reps >= 1 and --power-reps >= 0")

    import torch

    from invariance.encoders import load_encoder

    torch.set_num_threads(1)  # the machine is shared; one thread is the tests' setting too
    encoder = load_encoder(SMALL_ENCODER, image_size=32, device="cpu")
    print(f"{SMALL_ENCODER} at 32 px, torch {torch.__version__}, 1 thread; {SETTING}; alpha {ALPHA}")
    print(f"{'kind':<6} {'form':<9} {'test':<7} {'grouped':>8} {'band':<8} {'frame-level':>11} {'vs band':<10} "
          f"99% band")
    with tempfile.TemporaryDirectory() as tmp:
        for kind in kinds:
            start = time.perf_counter()
            # seeds of their own per kind: lossless HDF5 and zarr would otherwise score the same recordings
            seed = args.seed + 100_000 * FILE_KINDS.index(kind)
            study = source_null_study(kind, args.reps, encoder, Path(tmp) / kind, seed=seed, alpha=ALPHA,
                                      unpaired=not args.paired_only, **SETTING)
            for row in _null_table(kind, study, time.perf_counter() - start):
                print(row, flush=True)
        if args.power_reps:
            print(f"known clutter shift, paired, {args.power_reps} repetitions: share found at p < 0.01 / p <= 0.05")
            for kind in kinds:
                seed = args.seed + 100_000 * FILE_KINDS.index(kind) + 50_000
                found = _power(kind, args.power_reps, encoder, Path(tmp) / f"{kind}_power", seed)
                print(f"{kind:<6} " + "  ".join(f"{test} {a:.2f} / {b:.2f}" for test, (a, b) in found.items()),
                      flush=True)


if __name__ == "__main__":
    main()
