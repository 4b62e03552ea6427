"""The whole job on the bundled sample scenes, as a newcomer's first run.

Scores three encoders that behave like the ones a perception team has (a compact CNN
trained on clean workbench scenes only, the same network trained with clutter as
augmentation, and an untrained ResNet-18 as a floor), aligns the clean-only encoder on
the bundled sample scenes, then compares all four on a second, freshly generated set of
scenes that the alignment never saw, and writes the report.
"""

from __future__ import annotations

import time
from pathlib import Path

from . import SAFETY_CAUTION
from ._io import atomic_write_json, dumps_json, write_outputs_together
from .errors import InvarianceError
from .options import AlignmentOptions, EncoderEntry, ExtractionOptions, ScoringOptions
from .align.outcome import settle
from .progress import as_reporter

SAMPLE_COMMAND = "invariance scenes sample_images --pairs 200 --size 128 --seed 7"
SAMPLE_SEED, SAMPLE_PAIRS, SAMPLE_SIZE = 7, 200, 128
# The evaluation scenes use another seed than the sample set, so no evaluation scene is
# one the alignment trained on.
EVAL_SEED, EVAL_PAIRS = 2027, 300

DEMO_ENCODERS = (
    EncoderEntry("python:invariance.zoo:clean_only_encoder", name="workbench CNN, clean-only training"),
    EncoderEntry("python:invariance.zoo:clutter_augmented_encoder", name="workbench CNN, clutter-augmented"),
    # ResNet-18 at random init is a reference, not a floor: features with no training at all
    # can look invariant and still carry no task. 128 px keeps it near 180 img/s on 2 cores
    # (measured with `invariance bench`).
    EncoderEntry("torchvision:resnet18", name="ResNet-18, random weights (reference)", image_size=128),
)
# The demo's alignment runs by steps, never by minutes, so its figures do not depend on the
# machine's load (400 steps: about 20 s of training on an idle 2-core machine).
ALIGN_STEPS = 400


def sample_images_dir() -> Path | None:
    """The committed sample set next to the package (a source checkout), if present."""
    candidate = Path(__file__).resolve().parent.parent / "sample_images"
    return candidate if (candidate / "clean").is_dir() else None


def run_demo(out_dir="demo_report", *, progress=True, cache_dir=None, scoring: ScoringOptions | None = None,
             alignment: AlignmentOptions | None = None, eval_pairs: int = EVAL_PAIRS) -> list[str]:
    """Run the demo and return the five-line summary.

    Parameters
    ----------
    out_dir : path
        Folder for ``report.html``, ``comparison.json``, ``alignment.json``, the aligned
        checkpoint and the evaluation scenes. Existing demo outputs there are replaced.
        The shipped example in ``reports/demo/`` is regenerated only when named here.
    progress : bool, callable or Reporter
        Stage lines and progress bars (see :mod:`invariance.progress`).
    cache_dir : path, optional
        Feature cache for the comparison.
    scoring, alignment : options, optional
        Default ``ScoringOptions()`` and ``AlignmentOptions(steps=400)`` (no minutes limit:
        the demo's figures must not depend on the machine's load).
    eval_pairs : int
        Evaluation scenes generated with a seed the alignment never saw.
    """
    from . import pipeline
    from .scenes import generate_scenes

    scoring = scoring or ScoringOptions()
    alignment = alignment or AlignmentOptions(steps=ALIGN_STEPS)
    reporter = as_reporter(progress)
    echo = reporter.note
    out_dir = Path(out_dir)
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InvarianceError(f"cannot make the demo folder {out_dir} ({exc.strerror or exc}); "
                              "choose another out_dir (--out)") from None
    started = time.perf_counter()
    sample = _sample_set(out_dir, echo)

    echo(f"[1/3] aligning the clean-only encoder on {sample} ({alignment.steps} steps)")
    checkpoint = out_dir / "aligned_clean_only.pt"
    checkpoint.unlink(missing_ok=True)  # a previous run's checkpoint must not stand in for this one's
    aligned = settle(pipeline.align_dataset(sample, DEMO_ENCODERS[0].spec, out=checkpoint, alignment=alignment,
                                            scoring=scoring, progress=reporter))
    atomic_write_json(out_dir / "alignment.json", aligned)
    improved = aligned["alignment"]["improved"]
    if aligned["alignment"]["cut_short"]:
        echo(f"  alignment cut short: {aligned['alignment']['stopped_because']}")
    if not improved:
        echo(f"  alignment did not improve the encoder ({aligned['alignment']['outcome']}); "
             "the comparison leaves the aligned copy out")

    eval_dir = out_dir / "eval_scenes"
    if not (eval_dir / "labels.csv").is_file():
        echo(f"[2/3] generating {eval_pairs} evaluation scenes the alignment never saw (seed {EVAL_SEED})")
        _replace_dir(eval_dir)
        generate_scenes(eval_dir, pairs=eval_pairs, size=SAMPLE_SIZE, seed=EVAL_SEED)

    entries = list(DEMO_ENCODERS)
    if improved:
        entries.append(EncoderEntry(f"checkpoint:{checkpoint}", name="workbench CNN, clean-only, aligned"))
    echo(f"[3/3] comparing {len(entries)} encoders on the evaluation scenes")
    comparison = pipeline.compare_encoders(eval_dir, entries, extraction=ExtractionOptions(cache_dir=cache_dir),
                                           scoring=scoring, progress=reporter)
    if improved:
        comparison["results"][-1]["alignment"] = aligned["alignment"]
    from .report import render_report

    page = render_report(comparison["results"], failures=comparison["failures"], warnings=comparison["warnings"],
                         title="invariance demo: parts-sorting workbench")
    # The comparison and its report reach the folder together, or neither does.
    report = write_outputs_together([(out_dir / "comparison.json", dumps_json(comparison) + "\n"),
                                     (out_dir / "report.html", page)])[1]
    return _summary(comparison, report, time.perf_counter() - started)


def _sample_set(out_dir: Path, echo) -> Path:
    sample = sample_images_dir()
    if sample is not None:
        return sample
    from .scenes import generate_scenes

    sample = out_dir / "sample_images"
    if not (sample / "labels.csv").is_file():
        echo(f"sample_images/ not found next to the package; generating it ({SAMPLE_COMMAND})")
        _replace_dir(sample)
        generate_scenes(sample, pairs=SAMPLE_PAIRS, size=SAMPLE_SIZE, seed=SAMPLE_SEED)
    return sample


def _replace_dir(path: Path) -> None:
    import shutil

    if path.exists():
        if not path.is_dir():
            raise InvarianceError(f"{path} exists and is not a folder; remove it or choose another out_dir (--out)")
        try:
            shutil.rmtree(path)
        except OSError as exc:
            raise InvarianceError(f"cannot replace {path} ({exc.strerror or exc}); remove it or choose another "
                                  "out_dir (--out)") from None


def _summary(comparison: dict, report: Path, seconds: float) -> list[str]:
    from . import verdict
    from .results import display_name

    results = comparison["results"]
    ranked = verdict.rank(results)
    lines = [f"report: {report} ({seconds:.0f} s)"]
    lines.append("ranking by task information on cluttered views: "
                 + "; ".join(f"{ranked.shown_rank(i)} {display_name(results[i])}" for i in ranked.order))
    lines.append("verdict: " + verdict.plain(verdict.verdict(results, ranked)))
    lines.append("ranks shared (=) where the 95% intervals overlap; domain accuracy, drift and CKA are the evidence")
    lines.append(f"caution: {SAFETY_CAUTION}")
    return lines
