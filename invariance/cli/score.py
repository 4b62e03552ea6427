"""`invariance score`: one encoder (or your own features) on one data set."""

from __future__ import annotations

from pathlib import Path

import click

from ._print import print_summary
from ._shared import (EXIT_CODES_HELP, check_outputs, encoder_option, extraction_options, gate_options,
                      handle_errors, json_option, quiet_option, report_option, scoring_options, weights_option,
                      write_result_outputs)


@click.command(epilog=EXIT_CODES_HELP)
@click.argument("data", required=False, type=click.Path(path_type=Path))
@encoder_option
@weights_option
@click.option("--layer", "layers", multiple=True, help="Graph node to tap (repeat for several; see `invariance layers`).")
@click.option("--features", nargs=2, type=click.Path(dir_okay=False, path_type=Path), default=None,
              metavar="CLEAN.npy CLUTTERED.npy", help="Score your own features (rows paired) instead of running an encoder.")
@click.option("--labels", "labels_csv", type=click.Path(dir_okay=False, path_type=Path),
              help="With --features: labels.csv whose rows follow the feature rows.")
@json_option
@report_option
@click.option("--drift-csv", type=click.Path(dir_okay=False, path_type=Path), help="Write per-pair drift (file, drift) here.")
@scoring_options()
@gate_options
@extraction_options
@quiet_option
@handle_errors
def score(data, spec, weights, layers, features, labels_csv, json_path, report_path, drift_csv, scoring, gates,
          extraction, quiet):
    """Measure how differently an encoder sees the clean and cluttered views of the same scenes.

    DATA is a folder with clean/ and cluttered/ holding the same file names (the two views
    of one scene) and an optional labels.csv, or a manifest CSV with clean and cluttered
    path columns. Instead of DATA and --encoder, --features scores features you computed.

    Reports a domain classifier (held-out accuracy, 95% interval, proxy A-distance, p-value),
    MMD with a paired permutation test, paired drift and pair retrieval, linear CKA, and a
    linear probe per label (trained on clean, tested on cluttered). With factor_*/level
    columns in labels.csv, every metric is also broken down per factor value and level.
    Passing gates is evidence, not a safety certificate: trials on hardware follow the
    site's safety rules and the applicable standards.
    """
    from .. import pipeline
    from ..gates import evaluate_gates, raise_for_gates

    if features is None and (data is None or spec is None):
        raise click.UsageError("give DATA and --encoder SPEC, or --features CLEAN.npy CLUTTERED.npy")
    if features is not None and (data is not None or spec is not None):
        raise click.UsageError("--features replaces DATA and --encoder; give one or the other")
    check_outputs({"--json": json_path, "--report": report_path, "--drift-csv": drift_csv}, data=data, specs=[spec or ""],
                  files=[weights, labels_csv, *(features or ())])
    if features is not None:
        result = _score_feature_files(features, labels_csv, scoring)
    else:
        result = pipeline.score_dataset(data, spec, weights=weights, layers=layers, extraction=extraction,
                                        scoring=scoring, progress=not quiet)
    result["gates"] = evaluate_gates(result, gates)
    write_result_outputs(result, json_path=json_path, report_path=report_path, drift_csv=drift_csv, tsne=scoring.tsne)
    print_summary(result)
    raise_for_gates(result["gates"])


def _score_feature_files(features, labels_csv, scoring):
    from .. import pipeline
    from ..data import read_labels_in_order
    from ..scoring import load_feature_files

    clean, cluttered = load_feature_files(*features)
    tasks = factors = names = None
    if labels_csv is not None:
        names, table = read_labels_in_order(labels_csv, clean.shape[0])
        tasks, factors = table.tasks or None, table.factors or None
    source = {"spec": f"features:{features[0]}", "name": Path(features[0]).stem, "path": str(Path(features[0]).parent)}
    return pipeline.score_feature_arrays(clean, cluttered, tasks=tasks, factors=factors, names=names, scoring=scoring,
                                         source=source)
