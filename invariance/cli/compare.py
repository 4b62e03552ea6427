"""`invariance compare`: several encoders on the same pairs, folds and permutations."""

from __future__ import annotations

from pathlib import Path

import click

from ._print import print_ranking
from ._shared import (ENCODER_HELP, EXIT_CODES_HELP, check_outputs, extraction_options, handle_errors,
                      quiet_option, report_option, say, scoring_options)


@click.command(epilog=EXIT_CODES_HELP)
@click.argument("data", type=click.Path(path_type=Path))
@click.option("--encoder", "specs", multiple=True, help=ENCODER_HELP + " Repeat for each encoder.")
@click.option("--encoders", "encoders_toml", type=click.Path(dir_okay=False, path_type=Path),
              help="TOML file with [[encoder]] tables (spec, weights, layers, name, image_size).")
@click.option("--layer", "layers", multiple=True, help="Graph node to tap in every encoder given by --encoder.")
@click.option("--json", "json_path", type=click.Path(dir_okay=False, path_type=Path), help="Write the comparison JSON here.")
@report_option
@scoring_options()
@extraction_options
@quiet_option
@handle_errors
def compare(data, specs, encoders_toml, layers, json_path, report_path, scoring, extraction, quiet):
    """Score several encoders on the same pairs, folds and permutations, and rank them.

    Encoders that share a network reuse cached features. An encoder that fails midway is
    shown in the report with its message; the others are still scored.
    """
    from .. import pipeline
    from .._io import atomic_write_json
    from ..encoder_list import read_encoder_list
    from ..options import EncoderEntry

    entries = [EncoderEntry(s, layers=tuple(layers) or None) for s in specs]
    if encoders_toml:
        entries += read_encoder_list(encoders_toml)
    if not entries:
        raise click.UsageError("give at least one --encoder SPEC or --encoders FILE.toml")
    check_outputs({"--json": json_path, "--report": report_path}, data=data, specs=[e.spec for e in entries],
                  files=[encoders_toml, *(e.weights for e in entries)])
    comparison = pipeline.compare_encoders(data, entries, extraction=extraction, scoring=scoring, progress=not quiet)
    if json_path:
        atomic_write_json(json_path, comparison)
        say(f"comparison JSON: {json_path}")
    if report_path:
        from ..report import write_report

        write_report(report_path, comparison["results"], failures=comparison["failures"],
                     warnings=comparison["warnings"], tsne=scoring.tsne)
        say(f"report: {report_path}")
    print_ranking(comparison)
