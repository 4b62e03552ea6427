"""`invariance compare`: several encoders on the same pairs, folds and permutations."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import click

from ._print import print_ranking
from ._shared import (ENCODER_HELP, EXIT_CODES_HELP, check_outputs, check_spec, extraction_options, handle_errors,
                      quiet_option, report_option, say, scoring_options, write_comparison_outputs)
from ._sources import (check_domains, compared_domains, domain_arguments, domain_flags_given, source_inputs,
                       source_options)


def _paired(values, specs, flag: str) -> list:
    """``values`` given once per --encoder, in order (or not at all); anything else is a usage error."""
    if not values:
        return [None] * len(specs)
    if len(values) != len(specs):
        raise click.UsageError(f"{flag} is given {len(values)} time(s) for {len(specs)} --encoder: give it once per "
                               f"--encoder, in the same order (use --encoders FILE.toml to mix encoders with and "
                               f"without it)")
    return list(values)


@click.command(epilog=EXIT_CODES_HELP)
@click.argument("data", nargs=-1, type=click.Path(path_type=Path), metavar="[DATA | DATA_A DATA_B]")
@click.option("--encoder", "specs", multiple=True, callback=check_spec,
              help=ENCODER_HELP + " Repeat for each encoder.")
@click.option("--weights", "weights", multiple=True, type=click.Path(dir_okay=False, path_type=Path),
              help="Local state_dict for the --encoder in the same position (repeat once per --encoder).")
@click.option("--name", "names", multiple=True,
              help="Display name for the --encoder in the same position (repeat once per --encoder).")
@click.option("--encoders", "encoders_toml", type=click.Path(dir_okay=False, path_type=Path),
              help="TOML file with [[encoder]] tables (spec, weights, layers, name, image_size).")
@click.option("--layer", "layers", multiple=True, help="Graph node to tap in every encoder given by --encoder.")
@click.option("--features-dir", "feature_dirs", multiple=True, type=click.Path(file_okay=False, path_type=Path),
              metavar="DIR", help="Instead of DATA and encoders: features directories written by `invariance "
                                  "extract` (repeat; one per encoder), scored with the same folds and permutations.")
@click.option("--labels", "labels_csv", type=click.Path(dir_okay=False, path_type=Path),
              help="With --features-dir: labels.csv whose first column names the pairs.")
@click.option("--json", "json_path", type=click.Path(dir_okay=False, path_type=Path), help="Write the comparison JSON here.")
@report_option
@scoring_options()
@extraction_options
@source_options
@quiet_option
@handle_errors
def compare(data, specs, weights, names, encoders_toml, layers, feature_dirs, labels_csv, json_path, report_path,
            scoring, extraction, sources, quiet):
    """Score several encoders on the same data, folds and permutations, and rank them.

    DATA is a folder with clean/ and cluttered/ holding the same file names (the two views
    of one scene) and an optional labels.csv, or a manifest CSV. Two DATA arguments are two
    domains, DATA_A the reference (the lab bench, the simulator) and DATA_B the one to
    check (the site): source specs such as hdf5:demos.h5#frames=data/*/obs/front_image,
    zarr:replay.zarr#frames=data/img, a folder of videos (one per episode) or of images.
    Domains with the same episodes are paired by (episode, frame index); otherwise, or with
    --unpaired, they are compared as unpaired domains: a domain classifier, MMD and probes
    trained on A and tested on B, per factor value when both domains carry factor_*/level
    labels; drift, pair retrieval and CKA need pairs and are left out. A folder whose
    clean/ and cluttered/ share no file name is two unpaired domains; its labels.csv at the
    root names each image clean/NAME or cluttered/NAME (docs/sources.md).

    Encoders are ranked by the task information their features keep on cluttered views
    (probes trained on clean, or on domain A), with invariance measures as evidence; ranks
    whose 95% intervals overlap are shown as ties. Without task labels the ranking falls
    back to domain accuracy, which cannot tell a blind encoder from a robust one. An
    encoder that fails midway is shown in the report with its message; the others are
    still scored.

    \b
    Examples:
      invariance compare bench_runs --encoder torchvision:resnet18 --encoder checkpoint:aligned.pt
      invariance compare images:sim_renders/ images:bench_photos/ --unpaired \\
          --encoder torchvision:resnet18 --encoder python:my_pkg.nets:build --report cmp.html
      invariance compare hdf5:bench.h5#frames=data/*/obs/img hdf5:site.h5#frames=data/*/obs/img \\
          --encoders encoders.toml --stride 5 --label ee_pos=data/*/obs/ee_pos --json cmp.json
    """
    from .. import pipeline
    from ..encoder_list import read_encoder_list
    from ..options import EncoderEntry

    if feature_dirs:
        if data or specs or encoders_toml:
            raise click.UsageError("--features-dir replaces DATA and --encoder/--encoders; give one or the other")
        if domain_flags_given(sources):
            raise click.UsageError("--unpaired, --stride, --max-frames-per-episode and --label apply to DATA, not to "
                                   "--features-dir")
        comparison = _compare_feature_dirs(feature_dirs, _paired(names, feature_dirs, "--name"), layers, labels_csv,
                                           scoring, json_path, report_path)
        write_comparison_outputs(comparison, json_path=json_path, report_path=report_path, tsne=scoring.tsne)
        print_ranking(comparison)
        return
    if not data:
        raise click.UsageError("give DATA (or two domains DATA_A DATA_B) and encoders, or --features-dir DIR (repeat)")
    data_a, data_b = domain_arguments(data, sources)
    weights, names = _paired(weights, specs, "--weights"), _paired(names, specs, "--name")
    entries = [EncoderEntry(s, weights=w, layers=tuple(layers) or None, name=n)
               for s, w, n in zip(specs, weights, names)]
    if encoders_toml:
        entries += read_encoder_list(encoders_toml)
    if not entries:
        raise click.UsageError("give at least one --encoder SPEC or --encoders FILE.toml")
    sources = replace(sources, skip_unpaired=sources.skip_unpaired or extraction.skip_unpaired)
    domains = compared_domains(data_a, data_b, sources)
    check_outputs({"--json": json_path, "--report": report_path}, data=data_a if data_b is None else None,
                  specs=[e.spec for e in entries],
                  files=[encoders_toml, *(e.weights for e in entries), *source_inputs(domains or ())])
    if domains is not None and check_domains(*domains, sources, scoring.folds) == "unpaired" and data_b is None \
            and not quiet:
        say(f"{data_a}: " + ("comparing clean/ and cluttered/ as unpaired domains (--unpaired)" if sources.unpaired
                             else "clean/ and cluttered/ share no file name; comparing them as unpaired domains"),
            err=True)
    comparison = pipeline.compare_encoders(data_a, entries, data_b=data_b, sources=sources, extraction=extraction,
                                           scoring=scoring, progress=not quiet)
    write_comparison_outputs(comparison, json_path=json_path, report_path=report_path, tsne=scoring.tsne)
    print_ranking(comparison)


def _compare_feature_dirs(folders, names, layers, labels_csv, scoring, json_path, report_path) -> dict:
    """A comparison of features directories, each scored like `score --features-dir`."""
    from ..results import add_caution, make_comparison
    from .score import _score_features_dir

    if len(layers) > 1:
        raise click.UsageError("--features-dir scores one layer at a time; give at most one --layer")
    check_outputs({"--json": json_path, "--report": report_path},
                  files=[labels_csv, *(Path(f) / "manifest.json" for f in folders)])
    results = []
    for folder, name in zip(folders, names):
        result = _score_features_dir(folder, None, layers[0] if layers else None, labels_csv, scoring)
        if name:
            result["encoder"]["name"] = name
        results.append(result)
    return add_caution(make_comparison(results))
