"""`invariance align`: briefly retrain an encoder's last block(s) against clutter."""

from __future__ import annotations

import sys
from dataclasses import replace
from pathlib import Path

import click

from ._print import print_alignment
from ._shared import (EXIT_CODES_HELP, alignment_options, check_outputs, encoder_option, extraction_options,
                      handle_errors, json_option, quiet_option, report_option, scoring_options, weights_option,
                      say, write_result_outputs)


@click.command(epilog=EXIT_CODES_HELP)
@click.argument("data", type=click.Path(path_type=Path))
@encoder_option
@weights_option
@click.option("--out", "out_path", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="Checkpoint to write (load it later as checkpoint:FILE).")
@alignment_options
@json_option
@report_option
@scoring_options(folds=False, tsne=False)
@extraction_options
@quiet_option
@handle_errors
def align(data, spec, weights, out_path, alignment, json_path, report_path, scoring, extraction, quiet):
    """Briefly retrain the encoder's last block(s) so clutter no longer separates its features.

    Gradient-reversal adversarial training (Ganin & Lempitsky 2015) against a small domain
    discriminator, with an anchor that keeps clean features close to the original encoder's,
    a task head on clean labels, and paired and mean-matching terms that pull cluttered
    features onto the clean ones. A held-out share of the pairs is never trained on;
    before/after are measured there. Ctrl-C keeps the best checkpoint so far.
    """
    from .. import pipeline
    from ..align import AlignmentInterrupted

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
    write_result_outputs(result, json_path=json_path, report_path=report_path)
    print_alignment(result)
