"""Null calibration of `invariance score` end to end through the HDF5, zarr and video readers.

Issue 12: with no shift and strongly correlated frames within an episode, the grouped
tests must reject at alpha = 0.05 at a rate inside the binomial 99% band around 5%, and
the same tests with frame-level (ungrouped) splits on the same files must reject far
more often. Each repetition writes real files with h5py, zarr or PyAV (tests/nulls.py:
20 episodes x 30 frames of 32 px per domain; every recording has its own exposure,
colour cast and camera pose, and every frame its own jitter and noise), reads them with
the project's readers, pairs them and extracts features with the compact workbench CNN
exactly as `invariance score DATA_A DATA_B --stride 5` does
(invariance.pipeline.score_sources), and records the p-values `score` reports (grouped by
episode). The frame-level p-values come from the same features, which the pipeline
handed to invariance.scoring, tested with every frame as its own unit.

Repetitions here (CI budget: about 90 s for the module on 2 cores; measured 35 s on a
quiet 2-core machine and 79 s beside other jobs): HDF5 20 (paired and unpaired), zarr 20
and video 12 (paired only). With both forms a video repetition took 2.6x an HDF5 one
(every frame is JPEG-encoded and decoded) and a zarr one 1.8x (zarr's per-read
overhead); the unpaired form adds a second extraction and scoring. The issue's >= 100
repetitions run in tests/benchmarks/bench_source_nulls.py: 120 of every kind and form
(5 December 2026) gave grouped rejection rates at alpha = 0.05 of 0.017 to 0.092, all
inside the band [0.008, 0.108], and frame-level rates of 1.00 (domain classifier) and
0.70 to 0.83 (MMD). At the counts here the band's lower end is 0, so a test that never
rejected would pass it: the known-shift test shows that the grouped MMD test keeps its
power on the same kind of recordings.
"""

from __future__ import annotations

import numpy as np
import pytest

from nulls import FILE_KINDS, rejection_band, source_null_repetition, source_null_study

SMALL_ENCODER = "python:invariance.zoo:clean_only_encoder"
ALPHA = 0.05
EPISODES, FRAMES, STRIDE = 20, 30, 5
# Enough for alpha = 0.05: the smallest p-value is 1 / 200 (Phipson & Smyth 2010).
PERMUTATIONS = 199
REPS = {"hdf5": 20, "zarr": 20, "video": 12}
UNPAIRED = {"hdf5": True, "zarr": False, "video": False}


@pytest.fixture(scope="module")
def encoder(one_torch_thread):
    from invariance.encoders import load_encoder

    return load_encoder(SMALL_ENCODER, image_size=32, device="cpu")


@pytest.fixture(scope="module")
def studies(encoder, tmp_path_factory):
    """The null study of each kind, run once for the tests that read it."""
    done = {}

    def study(kind):
        if kind not in done:
            # seeds of their own per kind: lossless HDF5 and zarr would otherwise score the same recordings
            seed = 100 + 1000 * FILE_KINDS.index(kind)
            done[kind] = source_null_study(kind, REPS[kind], encoder, tmp_path_factory.mktemp(kind), seed=seed,
                                           alpha=ALPHA, episodes=EPISODES, frames=FRAMES, stride=STRIDE,
                                           permutations=PERMUTATIONS, unpaired=UNPAIRED[kind])
        return done[kind]

    return study


@pytest.mark.slow
@pytest.mark.parametrize("kind", FILE_KINDS)
def test_grouped_tests_stay_calibrated_and_frame_level_tests_do_not(kind, studies):
    # Acceptance of issue 12. Permutation p-values are exact under exchangeability of the
    # units permuted (Ojala & Garriga, JMLR 11, 2010; Phipson & Smyth, Stat. Appl. Genet.
    # Mol. Biol. 9, 2010), so P(p <= 0.05) <= 0.05 for the grouped tests; the band is the
    # exact binomial 99% interval around 5% (scipy.stats.binom.interval). Recordings are
    # exchangeable as wholes, not frame by frame, so the frame-level tests must reject
    # above the band (measured over 120 repetitions: domain classifier 1.00, MMD 0.70 to
    # 0.83 of repetitions, against at most 0.108 for a calibrated test).
    study = studies(kind)
    low, high = rejection_band(study["reps"], ALPHA)
    forms = ("paired", "unpaired") if UNPAIRED[kind] else ("paired",)
    for form in forms:
        for test in ("domain", "mmd"):
            grouped, frame = study["rates"][(form, "grouped", test)], study["rates"][(form, "frame", test)]
            assert low <= grouped <= high, (kind, form, test, grouped, (low, high))
            assert frame > high, (kind, form, test, frame, high)


@pytest.mark.slow
@pytest.mark.parametrize("kind", FILE_KINDS)
def test_the_pipeline_groups_by_episode_and_the_frame_level_arm_differs_only_there(kind, studies):
    # What the reader and the pairing handed to the statistics in the first repetition:
    # 20 episodes of 30 / 5 = 6 kept frames, each row's group its own episode; rerunning
    # that call gives the p-values `score` reported, so the frame-level arm (the same call
    # without groups) changes the unit and nothing else.
    from invariance import scoring

    first = studies(kind)["first"]
    for form in first:
        name, args, kwargs = first[form]["scored"]
        result = first[form]["result"]
        assert result["dataset"]["pairing"] == form and result["grouping"]["unit"] == "group"
        assert first[form]["frame_result"]["grouping"]["unit"] != "group"
        again = getattr(scoring, name)(*args, **kwargs)["metrics"]
        p_values = {"domain": again["domain_classifier"]["p_value"], "mmd": again["mmd"]["p_value"]}
        assert p_values == first[form]["grouped"]
        if form == "paired":
            groups, names = np.asarray(kwargs["groups"]), kwargs["names"]
            assert [n.split("#")[0] for n in names] == groups.tolist()
            sides = [groups]
            assert sorted({int(n.split("#")[1]) for n in names}) == list(range(0, FRAMES, STRIDE))
        else:
            sides = [np.asarray(kwargs["groups_a"]), np.asarray(kwargs["groups_b"])]
        for groups in sides:
            episodes, counts = np.unique(groups, return_counts=True)
            assert episodes.size == EPISODES and set(counts) == {FRAMES // STRIDE}


@pytest.mark.slow
@pytest.mark.parametrize("kind", FILE_KINDS)
def test_a_known_clutter_shift_is_found_through_each_reader(kind, encoder, tmp_path):
    # Domain B films the cluttered view (level 3) of the same scenes, with the same
    # recording-to-recording variation as the null: the grouped MMD test, which the null
    # study shows to be calibrated, must still find the clutter (issue 12: p < 0.01).
    # Measured over 20 repetitions a kind (bench_source_nulls.py): MMD p < 0.01 in 0.95
    # of them; the grouped domain classifier has less power at 20 episodes with this much
    # variation between recordings, p < 0.01 in 0.75 to 0.80 and p <= 0.05 in 0.95 to 1.00,
    # so one repetition here asserts the MMD test only.
    run = source_null_repetition(kind, tmp_path, 7, encoder, episodes=EPISODES, frames=FRAMES, stride=STRIDE,
                                 permutations=PERMUTATIONS, unpaired=False, clutter=True)
    grouped = run["paired"]["grouped"]
    assert grouped["mmd"] < 0.01, grouped
    assert run["paired"]["result"]["grouping"]["groups"] == EPISODES
