"""Alignment with the default settings on encoders it was never tuned on (a reduced panel).

The full panel (five encoders x four objectives x three split seeds) is a benchmark:
``tests/benchmarks/bench_align_panel.py``. Here, within the suite's time: the plain
``nn.Sequential`` CNN (no normalisation, integer-named children) and the small ViT (class
token: trained whole from its patch projection) on generated workbench scenes, and the
Sequential CNN on blended digits, each trained on clean images only, once per session.

Targets (issue "Alignment that works on encoders it was never tuned on"): on held-out
pairs the alignment never saw, the cluttered-probe gap of the tasks the encoder carries
closes by at least 50% on average (digits: 60%, ahead of the 52.9% that DANN closes on
MNIST -> MNIST-M, Ganin et al., JMLR 17 (2016), Table 2), every carried clean probe stays
within 5% of its start, and the relative drift falls by at least 30%. A run that does not
improve the encoder fails these tests.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch

import alignment_panel as panel_module
from invariance.align import align_encoder
from invariance.options import AlignmentOptions, ScoringOptions

torch.set_num_threads(min(2, torch.get_num_threads()))  # a shared 2-core machine

pytestmark = pytest.mark.slow
REDUCED = ("sequential", "vit", "digits")
# Held-out sets large enough that one probe error moves a score by under 2 points: 30% of
# 600 scenes is 180 pairs, of which the probe scores 54; of 797 digits (all that did not
# train the encoder), 240 and 72.
SCENE_PAIRS, DIGIT_PAIRS = 600, 797


@pytest.fixture(scope="session")
def panel(tmp_path_factory):
    """The reduced panel, trained once per test session on clean images only."""
    root = tmp_path_factory.mktemp("align_panel")
    return panel_module.build_panel(root, names=REDUCED, scene_count=SCENE_PAIRS, digit_count=DIGIT_PAIRS)


@pytest.fixture(scope="session")
def runs(panel, tmp_path_factory):
    """The default alignment of every reduced-panel encoder (split seed 0)."""
    folder = tmp_path_factory.mktemp("align_panel_runs")
    out = {}
    for name, (encoder, pairs) in panel.items():
        lines = []
        result = align_encoder(pairs, encoder, out=folder / f"{name}.pt", options=AlignmentOptions(),
                               scoring=ScoringOptions(permutations=100), progress=lines.append)
        out[name] = {"result": result, "lines": lines, "summary": panel_module.summary(result)}
    return out


# Targets not met yet (issue 11 stays open); strict, so a run that meets them fails here
# until the mark is removed. Measured 2026-12-05 with the defaults (combined; the whole
# network, within the compute budget), 800 steps, split seed 0, 600 scene pairs and 797
# digit pairs. The Sequential CNN's part target is above what supervised training on
# these pairs reaches (18-31% of the gap, docs/alignment.md).
_NOT_YET = {
    "sequential": "not improved (the original is kept): the held-out clean part probe fell 0.778 -> 0.611",
    "vit": "17% of the held-out part gap closed (cluttered 0.278 -> 0.333), drift fell 24%",
    "digits": "2% of the digit gap closed (target 60%; teacher: 55%), drift fell 37%",
}


@pytest.mark.parametrize("name", [pytest.param(n, marks=pytest.mark.xfail(strict=True, reason=_NOT_YET[n]))
                                  if n in _NOT_YET else n for n in REDUCED])
def test_panel_encoder_improves_on_held_out_pairs(runs, name):
    run = runs[name]
    result, figures = run["result"], run["summary"]
    print(f"\n{name}: {figures}")
    assert result["improved"], result["outcome"]
    assert figures["tasks"], "the encoder carries no task: the panel encoder was not trained"
    target = 0.6 if name == "digits" else 0.5
    assert figures["gap_closed"] >= target, figures["per_task"]
    assert figures["worst_clean_change"] >= -0.05
    assert figures["drift_fall"] >= 0.30


@pytest.mark.parametrize("name", REDUCED)
def test_no_loss_term_grows_by_orders_of_magnitude_early(runs, name):
    # Scale-free terms (docs/alignment.md): no logged term may grow 100-fold over its first
    # logged value in the first 100 steps (the runs: task 2.8 -> 794.7 in 20 steps).
    # Every term is in units where 1 is its natural size (anchor: one clean spread; paired:
    # a relative drift of 1, clutter moving a feature as far as a change of scene; mean: its
    # start), so the start is floored at 1: the anchor starts at exactly 0.
    curves = runs[name]["result"]["curves"]
    early = [i for i, step in enumerate(curves["step"]) if step <= 100]
    for term in ("anchor", "task", "paired", "mean"):
        values = np.array([curves[f"loss_{term}"][i] for i in early])
        assert values.max() <= 100 * max(values[0], 1.0), (term, values)


@pytest.fixture(scope="session")
def teacher_digits(panel, tmp_path_factory):
    """The ``teacher`` objective on blended digits, from the default stage (the whole network; split seed 0)."""
    encoder, pairs = panel["digits"]
    lines = []
    result = align_encoder(pairs, encoder, out=tmp_path_factory.mktemp("teacher") / "digits.pt",
                           options=AlignmentOptions(objective="teacher"),
                           scoring=ScoringOptions(permutations=100), progress=lines.append)
    return {"result": result, "lines": lines, "summary": panel_module.summary(result)}


def test_teacher_objective_closes_much_of_the_digit_gap(teacher_digits):
    # Measured 2026-12-05, split seed 0: 0.236 -> 0.625 on 72 scored held-out digits, 55% of
    # the gap (combined, the default: 2%); seeds 1 and 2 closed 29% and 29%
    # (docs/alignment.md). The bound leaves room for a few probe errors either way.
    result, figures = teacher_digits["result"], teacher_digits["summary"]
    print(f"\nteacher digits: {figures}")
    assert result["improved"], result["outcome"]
    assert result["train_from"] == "0"  # the whole network fits the compute budget
    assert figures["gap_closed"] >= 0.40, figures["per_task"]
    assert figures["worst_clean_change"] >= -0.05
    assert figures["drift_fall"] >= 0.30
    curves = result["curves"]
    for term in ("anchor", "task", "paired"):  # scale-free: nothing grows 100-fold early
        values = [v for step, v in zip(curves["step"], curves[f"loss_{term}"]) if step <= 100]
        assert max(values) <= 100 * max(values[0], 1.0), (term, values)


@pytest.mark.xfail(strict=True, reason="teacher, split seed 0: 55% of the digit gap closed, short of 60%")
def test_teacher_objective_reaches_the_digit_target(teacher_digits):
    assert teacher_digits["summary"]["gap_closed"] >= 0.60


@pytest.mark.parametrize("name", REDUCED)
def test_the_trained_part_is_announced_before_training(runs, name):
    lines = runs[name]["lines"]
    first_step = next(i for i, line in enumerate(lines) if line.startswith("align step "))
    announced = [line for line in lines[:first_step] if line.startswith("align: training from ")]
    assert announced and repr(runs[name]["result"]["train_from"]) in announced[0]
    assert any("should take about" in line for line in lines)
