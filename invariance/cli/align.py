"""`invariance align`: briefly retrain an encoder's last block(s) against clutter."""

from __future__ import annotations

import sys
from dataclasses import replace
from pathlib import Path

import click

from ._print import print_alignment
from ._shared import (EXIT_CODES_HELP, alignment_options, check_outputs, encoder_option, extraction_options,
                      handle_errors, json_option, quiet_option, report_option, say, scoring_options, weights_option,
                      write_result_outputs)

# Exit status when --require-improvement is given and the alignment did not improve the
# encoder: the code of a failed gate (docs/design.md).
EXIT_NOT_IMPROVED = 3


@click.command(epilog=EXIT_CODES_HELP)
@click.argument("data", type=click.Path(path_type=Path))
@encoder_option
@weights_option
@click.option("--out", "out_path", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="Checkpoint to write when the alignment improves the encoder (load it as checkpoint:FILE).")
@alignment_options
@click.option("--require-improvement", is_flag=True,
              help="Exit 3 when the aligned state does not beat the original on the held-out pairs.")
@json_option
@report_option
@scoring_options(folds=False, tsne=False)
@extraction_options
@quiet_option
@handle_errors
def align(data, spec, weights, out_path, alignment, require_improvement, json_path, report_path, scoring,
          extraction, quiet):
    """Briefly retrain the encoder's last block(s) so clutter no longer separates its features.

    Gradient-reversal adversarial training (Ganin & Lempitsky 2015) against a small domain
    discriminator, with an anchor that keeps clean features close to the original encoder's,
    task heads on the labelled tasks the encoder carries, and paired and mean-matching terms
    that pull cluttered features onto the clean ones. A held-out share of the pairs is never
    trained on; before/after are measured there, and the checkpoint is written only when the
    aligned state beats the original there. Ctrl-C keeps the best checkpoint so far.
    """
    from .. import pipeline
    from ..align import AlignmentInterrupted
    from ..align.outcome import settle

    if spec is None:
        raise click.UsageError("give --encoder SPEC")
    check_outputs({"--out": out_path, "--json": json_path, "--report": report_path}, data=data, specs=[spec],
                  files=[weights])
    # --batch-size is both the training batch (pairs per step) and the forward-pass batch, as before
    alignment = replace(alignment, batch_size=extraction.batch_size)
    try:
        result = pipeline.align_dataset(data, spec, out=out_path, weights=weights, alignment=alignment,
                                        scoring=scoring, extraction=extraction, progress=not quiet)
    except AlignmentInterrupted as exc:
        say(f"{exc} (load it as checkpoint:{exc.checkpoint})", err=True)
        sys.exit(130)
    result = settle(result)
    write_result_outputs(result, json_path=json_path, report_path=report_path)
    _print_outcome(result)
    if require_improvement and not result["alignment"]["improved"]:
        sys.exit(EXIT_NOT_IMPROVED)


def _print_outcome(result) -> None:
    al = result["alignment"]
    if al.get("cut_short"):
        say(f"cut short: {al['stopped_because']}; rerun without --minutes (or with more) for the full "
            f"{al['settings']['steps']} steps")
    if al["improved"]:
        print_alignment(result)
        say(f"improved: {al['outcome']}")
        return
    say(f"not improved: {al['outcome']}")
    say("the original encoder is kept: it is not presented as aligned")
    _print_before_after(al)


def _print_before_after(al) -> None:
    from .. import SAFETY_CAUTION
    from ..results import metric_value

    for label, group, key in (("domain accuracy", "domain_classifier", "accuracy"),
                              ("relative drift", "paired_drift", "relative_drift")):
        before, after = metric_value(al["before"], group, key), metric_value(al["after"], group, key)
        shown = [("n/a" if v is None else f"{v:.3f}") for v in (before, after)]
        say(f"  {label:<16} original {shown[0]}  tried {shown[1]}")
    say(f"note: {SAFETY_CAUTION}")
