"""`invariance score`: one encoder (or your own features) on one data set."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import click

from ._print import print_summary
from ._sources import (check_domains, compared_domains, domain_arguments, domain_flags_given, frame_flags_given,
                       source_inputs, source_options)
from ._shared import (EXIT_CODES_HELP, check_outputs, say, encoder_option, extraction_options, gate_options,
                      handle_errors, json_option, quiet_option, report_option, scoring_options, weights_option,
                      write_result_outputs)


@click.command(epilog=EXIT_CODES_HELP)
@click.argument("data", nargs=-1, type=click.Path(path_type=Path))
@encoder_option
@weights_option
@click.option("--layer", "layers", multiple=True, help="Graph node to tap (repeat for several; see `invariance layers`).")
@click.option("--features", nargs=2, type=click.Path(dir_okay=False, path_type=Path), default=None,
              metavar="CLEAN.npy CLUTTERED.npy", help="Score your own features (rows paired) instead of running an encoder.")
@click.option("--features-dir", type=click.Path(file_okay=False, path_type=Path), default=None, metavar="DIR",
              help="Score a features directory written by `invariance extract` (on this or another machine); "
                   "with --encoder, refuse one from another encoder; --layer picks its layer.")
@click.option("--labels", "labels_csv", type=click.Path(dir_okay=False, path_type=Path),
              help="With --features: labels.csv whose rows follow the feature rows; with --features-dir: "
                   "labels.csv whose first column names the pairs.")
@json_option
@report_option
@click.option("--drift-csv", type=click.Path(dir_okay=False, path_type=Path), help="Write per-pair drift (file, drift) here.")
@click.option("--name", default=None, help="Display name in tables and the report [default: the spec].")
@click.option("--explain-worst", type=click.IntRange(0, 50), default=0, show_default=True, metavar="K",
              help="Also compute occlusion drift maps of the K pairs that drift most; the report overlays "
                   "them on the thumbnails (see `invariance explain` for more options).")
@click.option("--output-tolerance", default=None, metavar="T1,T2,...",
              help="The encoder is a whole policy (one output vector per image): also report how far its output "
                   "moves per dimension, in the output's units, and the share of pairs moving more than these "
                   "tolerances (one per output dimension).")
@scoring_options()
@gate_options
@extraction_options
@source_options
@quiet_option
@handle_errors
def score(data, spec, weights, layers, features, features_dir, labels_csv, json_path, report_path, drift_csv, name,
          explain_worst, output_tolerance,
          scoring, gates, extraction, sources, quiet):
    """Measure how differently an encoder sees the clean and cluttered views of the same scenes.

    DATA is a folder with clean/ and cluttered/ holding the same file names (the two views
    of one scene) and an optional labels.csv, or a manifest CSV with clean and cluttered
    path columns. Instead of DATA and --encoder, --features scores features you computed.

    Reports a domain classifier (held-out accuracy, 95% interval, proxy A-distance, p-value),
    MMD with a paired permutation test, paired drift and pair retrieval, debiased CKA, and a
    linear probe per label (trained on clean, tested on cluttered). With factor_*/level
    columns in labels.csv, every metric is also broken down per factor value and level.
    Two DATA arguments are two domains (DATA_A the reference): source specs such as
    hdf5:demos.h5#frames=data/*/obs/front_image, zarr:replay.zarr#frames=data/img, a
    folder of videos (one per episode) or of images. Domains with the same episodes are
    paired by (episode, frame index); otherwise, or with --unpaired, they are scored as
    unpaired domains; --stride, --max-frames-per-episode and --label apply to them only. A
    folder whose clean/ and cluttered/ share no file name is two unpaired domains; its
    labels.csv at the root names each image clean/NAME or cluttered/NAME. Every split keeps
    an episode whole (docs/sources.md).

    Passing gates is evidence, not a safety certificate: trials on hardware follow the
    site's safety rules and the applicable standards.
    """
    from .. import pipeline

    if features_dir is not None:
        if data or features is not None:
            raise click.UsageError("--features-dir replaces DATA and --features; give one of them")
        if len(layers) > 1:
            raise click.UsageError("--features-dir scores one layer at a time; give at most one --layer")
        if domain_flags_given(sources):
            raise click.UsageError("--unpaired, --stride, --max-frames-per-episode and --label apply to DATA, not to "
                                   "--features-dir")
        if explain_worst or output_tolerance is not None:
            raise click.UsageError("--explain-worst and --output-tolerance need images and an encoder (DATA and "
                                   "--encoder), not --features-dir")
        check_outputs({"--json": json_path, "--report": report_path, "--drift-csv": drift_csv},
                      files=[labels_csv, features_dir / "manifest.json"])
        result = _score_features_dir(features_dir, spec, layers[0] if layers else None, labels_csv, scoring)
        if name:
            result["encoder"]["name"] = name
        _finish(result, gates, json_path, report_path, drift_csv, scoring)
        return
    data_a, data_b, domains, sources = _inputs(data, spec, features, sources, extraction)
    tolerance = None
    if output_tolerance is not None:
        from ..metrics.output_drift import parse_tolerance

        if features is not None or domains is not None:
            raise click.UsageError("--output-tolerance needs paired images and a policy (DATA and --encoder)")
        tolerance = parse_tolerance(output_tolerance)
    if explain_worst and (features is not None or domains is not None):
        raise click.UsageError("--explain-worst needs paired images and an encoder (DATA and --encoder)")
    check_outputs({"--json": json_path, "--report": report_path, "--drift-csv": drift_csv},
                  data=data_a if data_b is None else None, specs=[spec or ""],
                  files=[weights, labels_csv, *(features or ()), *source_inputs(domains or ())])
    if features is not None:
        result = _score_feature_files(features, labels_csv, scoring, unpaired=sources.unpaired)
        if name:
            result["encoder"]["name"] = name
    elif domains is not None:
        _announce_domains(data_a, data_b, domains, sources, scoring, quiet)
        result = pipeline.score_sources(str(domains[0]), str(domains[1]), spec, weights=weights, layers=layers,
                                        name=name, extraction=extraction, scoring=scoring, sources=sources,
                                        progress=not quiet)
    else:
        result = pipeline.score_dataset(data_a, spec, weights=weights, layers=layers, name=name,
                                        extraction=extraction, scoring=scoring, progress=not quiet,
                                        output_tolerance=tolerance, explain_worst=explain_worst)
    _finish(result, gates, json_path, report_path, drift_csv, scoring)


def _finish(result, gates, json_path, report_path, drift_csv, scoring):
    """Gates, outputs, the terminal summary; exit 3 when a gate failed."""
    from ..gates import evaluate_gates, raise_for_gates

    result["gates"] = evaluate_gates(result, gates)
    write_result_outputs(result, json_path=json_path, report_path=report_path, drift_csv=drift_csv, tsne=scoring.tsne)
    print_summary(result)
    if "output_drift" in result:
        from ..metrics.output_drift import describe_output_drift

        for line in describe_output_drift(result["output_drift"]):
            say(line)
    raise_for_gates(result["gates"])


def _score_features_dir(folder, spec, layer, labels_csv, scoring):
    from .. import pipeline
    from ..data import read_labels
    from ..features_dir import FeaturesDirectory

    features = FeaturesDirectory(folder, spec=spec, layer=layer)
    clean, cluttered = features.arrays(layer)
    tasks = factors = groups = None
    if labels_csv is not None:
        table = read_labels(labels_csv, features.names)
        tasks, factors, groups = table.tasks or None, table.factors or None, table.groups
    source = {"spec": f"features:{folder}", "name": Path(folder).name, "path": str(folder)}
    return pipeline.score_feature_arrays(clean, cluttered, tasks=tasks, factors=factors, names=features.names,
                                         scoring=scoring, source=source, groups=groups)


def _inputs(data, spec, features, sources, extraction):
    """``(DATA_A, DATA_B, domains, sources)`` after the usage checks of DATA and --features.

    ``domains`` is the two source specs to score (:func:`compared_domains`), ``None`` for
    one paired data folder or feature files; DATA arguments are checked as `compare`
    checks them (:func:`domain_arguments`).
    """
    if features is None and (not data or spec is None):
        raise click.UsageError("give DATA and --encoder SPEC, or --features CLEAN.npy CLUTTERED.npy")
    if features is None:
        data_a, data_b = domain_arguments(data, sources)
        sources = replace(sources, skip_unpaired=sources.skip_unpaired or extraction.skip_unpaired)
        return data_a, data_b, compared_domains(data_a, data_b, sources), sources
    if data or spec is not None:
        raise click.UsageError("--features replaces DATA and --encoder; give one or the other")
    if frame_flags_given(sources):
        raise click.UsageError("--stride, --max-frames-per-episode and --label read frames of two domains; "
                               "they do not apply to --features (give --unpaired alone for unpaired rows)")
    return None, None, None, sources



def _announce_domains(data_a, data_b, domains, sources, scoring, quiet) -> None:
    """Refuse what would fail after extraction (see check_domains) before the encoder loads,
    and say on stderr when one data folder is scored as two unpaired domains."""
    mode = check_domains(*domains, sources, scoring.folds)
    if mode == "unpaired" and data_b is None and not quiet:
        say(f"{data_a}: " + ("scoring clean/ and cluttered/ as unpaired domains (--unpaired)" if sources.unpaired
                             else "clean/ and cluttered/ share no file name; scoring them as unpaired domains"),
            err=True)


def _score_feature_files(features, labels_csv, scoring, unpaired=False):
    from .. import pipeline
    from ..data import read_labels_in_order
    from ..scoring import _load_npy, load_feature_files

    source = {"spec": f"features:{features[0]}", "name": Path(features[0]).stem, "path": str(Path(features[0]).parent)}
    if unpaired:
        if labels_csv is not None:
            raise click.UsageError("--labels follows paired feature rows; it cannot be used with --unpaired")
        return pipeline.score_unpaired_feature_arrays(_load_npy(features[0]), _load_npy(features[1]),
                                                      scoring=scoring, source=source)
    clean, cluttered = load_feature_files(*features)
    tasks = factors = names = groups = None
    if labels_csv is not None:
        names, table = read_labels_in_order(labels_csv, clean.shape[0])
        tasks, factors, groups = table.tasks or None, table.factors or None, table.groups
    return pipeline.score_feature_arrays(clean, cluttered, tasks=tasks, factors=factors, names=names, scoring=scoring,
                                         source=source, groups=groups)
