"""Command line: a thin shell over the library (see DESIGN.md for the contract).

Exit codes: 0 success; 1 a clear error (bad input, nothing written half-way); 2 usage
error; 3 a user-set gate (``--max-...``) was not met.
"""

from __future__ import annotations

import functools
import sys
from pathlib import Path

import click

from . import SAFETY_CAUTION, __version__
from .errors import InvarianceError

ENCODER_HELP = (
    "Encoder spec: torchvision:NAME (random init), torchvision:NAME@WEIGHTS (torchvision weights "
    "from the local hub cache), torchscript:FILE, python:MODULE:CALLABLE, checkpoint:FILE (from "
    "`invariance align`)."
)


def _handle_errors(func):
    """Turn library errors into one line on stderr and the documented exit code."""

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        try:
            return func(*args, **kwargs)
        except InvarianceError as exc:
            click.echo(f"error: {exc}", err=True)
            sys.exit(exc.exit_code)
        except KeyboardInterrupt:
            click.echo("interrupted; nothing was written half-way", err=True)
            sys.exit(130)

    return wrapper


def _echo_err(quiet):
    return (lambda msg: None) if quiet else (lambda msg: click.echo(msg, err=True))


def _run_options(func):
    """Options shared by the commands that run encoders."""
    options = [
        click.option("--seed", type=int, default=0, show_default=True, help="Seed for every split and permutation."),
        click.option("--image-size", type=click.IntRange(16, 2048), default=None,
                     help="Resize images to PX x PX (overrides the encoder's own preprocessing)."),
        click.option("--device", type=click.Choice(["auto", "cpu", "cuda"]), default="auto", show_default=True,
                     help="Where the encoder runs; auto uses a GPU when present."),
        click.option("--batch-size", type=click.IntRange(1, 4096), default=32, show_default=True,
                     help="Images per forward pass."),
        click.option("--cache-dir", type=click.Path(file_okay=False, path_type=Path), default=None,
                     help="Feature cache folder [default: $INVARIANCE_CACHE or ~/.cache/invariance/features]."),
        click.option("--no-cache", is_flag=True, help="Neither read nor write the feature cache."),
        click.option("--skip-unpaired", is_flag=True, help="Go on without images that have no partner."),
        click.option("--quiet", is_flag=True, help="No progress on stderr."),
    ]
    for option in reversed(options):
        func = option(func)
    return func


def _cache_dir(cache_dir, no_cache):
    from .pipeline import default_cache_dir

    if no_cache:
        return None
    return cache_dir or default_cache_dir()


def _check_output_paths(*paths):
    """Fail before any work when an output file cannot be written."""
    for path in paths:
        if path is None:
            continue
        parent = Path(path).resolve().parent
        probe = parent
        while not probe.exists():
            probe = probe.parent
        import os

        if not os.access(probe, os.W_OK):
            raise InvarianceError(f"cannot write {path}: {probe} is not writable; choose another output path")
        if Path(path).is_dir():
            raise InvarianceError(f"{path} is a folder; give a file name for the output")


@click.group(context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100})
@click.version_option(__version__, prog_name="invariance")
def cli():
    """Does your visual encoder see a cluttered scene the way it sees the clean one?

    \b
    Typical session:
      invariance scenes demo_set --pairs 200          # paired clean/cluttered scenes
      invariance score demo_set --encoder torchvision:resnet18 --json r18.json
      invariance align demo_set --encoder SPEC --out aligned.pt
      invariance compare demo_set --encoder A --encoder checkpoint:aligned.pt --report cmp.html

    A data set folder holds clean/ and cluttered/ with matching file names and an optional
    labels.csv (first column the file name; text columns are classes, numeric columns are
    regression targets; factor_* and level columns describe the clutter).
    """


@cli.command()
@click.argument("out_dir", type=click.Path(file_okay=False, path_type=Path))
@click.option("--pairs", type=click.IntRange(1, 1_000_000), default=200, show_default=True, help="Number of scenes.")
@click.option("--size", type=click.IntRange(32, 1024), default=128, show_default=True, help="Image side in pixels.")
@click.option("--seed", type=int, default=0, show_default=True, help="Same seed, byte-identical files.")
@click.option("--factors", default="surface,distractors,lighting", show_default=True,
              help="Comma-separated clutter factors that may be active: surface, distractors, lighting.")
@click.option("--level", type=click.IntRange(0, 3), default=None,
              help="Fix the severity of active factors (0 = no clutter); default: random 1-3 per scene.")
@click.option("--quiet", is_flag=True, help="No progress on stderr.")
@_handle_errors
def scenes(out_dir, pairs, size, seed, factors, level, quiet):
    """Generate paired clean/cluttered scenes of a parts-sorting workbench.

    Each scene has one target part (kind, position, angle in labels.csv), pixel-identical
    in both views; the cluttered view adds a textured surface, distractor parts and tools,
    and a lighting change, each with a severity 0-3. For a factor sweep, run once per
    factor and level, e.g. --factors lighting --level 2.
    """
    from .scenes import generate_scenes

    factor_tuple = tuple(f.strip() for f in factors.split(",") if f.strip())
    with click.progressbar(length=pairs, label="scenes", file=sys.stderr) if not quiet else _null_bar() as bar:
        out = generate_scenes(out_dir, pairs=pairs, size=size, seed=seed, factors=factor_tuple, level=level,
                              progress=lambda n=1: bar.update(1))
    click.echo(f"wrote {pairs} pairs to {out} (clean/, cluttered/, labels.csv)")


class _null_bar:
    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False

    def update(self, n):
        pass


def _print_summary(result, quiet=False):
    from .scoring import describe_metrics

    rows = describe_metrics(result["metrics"])
    enc = result.get("encoder", {})
    click.echo(f"{enc.get('name') or enc.get('spec')}  layer={enc.get('layer')}  pairs={result['dataset']['pairs']}")
    widths = [max(len(str(r[i])) for r in rows + [("metric", "value", "95% interval", "")]) for i in range(3)]
    header = ("metric", "value", "95% interval", "reading")
    for row in [header, *rows]:
        click.echo("  ".join(str(c).ljust(w) for c, w in zip(row[:3], widths)) + "  " + str(row[3]))
    for warning in result.get("warnings", []):
        click.echo(f"warning: {warning}")
    click.echo(f"note: {SAFETY_CAUTION}")


def _load_features_labels(labels_path, n_rows):
    """Labels for --features: a CSV whose rows follow the feature rows (first column a name)."""
    from .data import read_labels_in_order

    return read_labels_in_order(labels_path, n_rows)


@cli.command()
@click.argument("data", required=False, type=click.Path(path_type=Path))
@click.option("--encoder", "spec", help=ENCODER_HELP)
@click.option("--weights", type=click.Path(dir_okay=False, path_type=Path), help="Local state_dict for a torchvision: spec.")
@click.option("--layer", "layers", multiple=True, help="Graph node to tap (repeat for several; see `invariance layers`).")
@click.option("--features", nargs=2, type=click.Path(dir_okay=False, path_type=Path), default=None,
              metavar="CLEAN.npy CLUTTERED.npy", help="Score your own features (rows paired) instead of running an encoder.")
@click.option("--labels", "labels_csv", type=click.Path(dir_okay=False, path_type=Path),
              help="With --features: labels.csv whose rows follow the feature rows.")
@click.option("--json", "json_path", type=click.Path(dir_okay=False, path_type=Path), help="Write the result JSON here.")
@click.option("--report", "report_path", type=click.Path(dir_okay=False, path_type=Path), help="Write an HTML report here.")
@click.option("--drift-csv", type=click.Path(dir_okay=False, path_type=Path), help="Write per-pair drift (file, drift) here.")
@click.option("--permutations", type=click.IntRange(1, 1_000_000), default=1000, show_default=True,
              help="Paired permutations for the MMD test.")
@click.option("--folds", type=click.IntRange(2, 50), default=5, show_default=True, help="Grouped folds for the domain classifier.")
@click.option("--max-domain-accuracy", type=click.FloatRange(0, 1), help="Gate: exit 3 if held-out domain accuracy is above this.")
@click.option("--max-relative-drift", type=click.FloatRange(0), help="Gate: exit 3 if relative drift is above this.")
@click.option("--max-probe-gap", type=float, help="Gate: exit 3 if any probe's clean-minus-cluttered gap is above this.")
@_run_options
@_handle_errors
def score(data, spec, weights, layers, features, labels_csv, json_path, report_path, drift_csv, permutations, folds,
          max_domain_accuracy, max_relative_drift, max_probe_gap, seed, image_size, device, batch_size, cache_dir,
          no_cache, skip_unpaired, quiet):
    """Measure how differently an encoder sees the clean and cluttered views of the same scenes.

    Reports a domain classifier (held-out accuracy, 95% interval, proxy A-distance, p-value),
    MMD with a paired permutation test, paired drift and pair retrieval, linear CKA, and a
    linear probe per label (trained on clean, tested on cluttered). With factor_*/level
    columns in labels.csv, every metric is also broken down per factor value and level.
    """
    from . import pipeline
    from ._io import atomic_write_json

    if features is None and (data is None or spec is None):
        raise click.UsageError("give DATA and --encoder SPEC, or --features CLEAN.npy CLUTTERED.npy")
    if features is not None and (data is not None or spec is not None):
        raise click.UsageError("--features replaces DATA and --encoder; give one or the other")
    _check_output_paths(json_path, report_path, drift_csv)
    if features is not None:
        result = _score_features_files(features, labels_csv, seed=seed, permutations=permutations, folds=folds)
    else:
        result = pipeline.score_dataset(
            data, spec, weights=weights, layers=layers, seed=seed, permutations=permutations, folds=folds,
            image_size=image_size, device=device, cache_dir=_cache_dir(cache_dir, no_cache), batch_size=batch_size,
            skip_unpaired=skip_unpaired, progress=not quiet,
        )
    thresholds = {"max_domain_accuracy": max_domain_accuracy, "max_relative_drift": max_relative_drift,
                  "max_probe_gap": max_probe_gap}
    result["gates"] = pipeline.evaluate_gates(result, thresholds)
    _write_outputs(result, json_path=json_path, report_path=report_path, drift_csv=drift_csv)
    _print_summary(result)
    pipeline.raise_for_gates(result["gates"])


def _score_features_files(features, labels_csv, *, seed, permutations, folds):
    from . import pipeline
    from .scoring import load_feature_files

    clean, cluttered = load_feature_files(*features)
    tasks = factors = names = None
    if labels_csv is not None:
        names, table = _load_features_labels(labels_csv, clean.shape[0])
        tasks, factors = table.tasks or None, table.factors or None
    return pipeline.score_feature_arrays(
        clean, cluttered, tasks=tasks, factors=factors, names=names, seed=seed, permutations=permutations, folds=folds,
        source={"spec": f"features:{features[0]}", "name": Path(features[0]).stem, "path": str(Path(features[0]).parent)},
    )


def _write_outputs(result, *, json_path=None, report_path=None, drift_csv=None):
    from ._io import atomic_write_json, atomic_write_text

    if json_path:
        atomic_write_json(json_path, result)
        click.echo(f"result JSON: {json_path}")
    if drift_csv:
        lines = ["file,relative_drift"] + [f"{_csv_cell(p['name'])},{p['drift']:.6f}" for p in result.get("pairs", [])]
        atomic_write_text(drift_csv, "\n".join(lines) + "\n")
        click.echo(f"per-pair drift: {drift_csv}")
    if report_path:
        from .report.html import write_report

        write_report(report_path, [result])
        click.echo(f"report: {report_path}")


def _csv_cell(text):
    text = str(text)
    return '"' + text.replace('"', '""') + '"' if any(c in text for c in ',"\n') else text


@cli.command()
@click.option("--encoder", "spec", required=True, help=ENCODER_HELP)
@click.option("--weights", type=click.Path(dir_okay=False, path_type=Path), help="Local state_dict for a torchvision: spec.")
@click.option("--device", type=click.Choice(["auto", "cpu", "cuda"]), default="cpu", show_default=True)
@_handle_errors
def layers(spec, weights, device):
    """List the graph nodes an encoder can be tapped at (for --layer and --train-from)."""
    from .encoders import available_layers, load_encoder

    encoder = load_encoder(spec, weights=weights, device=device)
    for node in available_layers(encoder):
        click.echo(node)


def main(argv=None):
    """Console-script entry point."""
    return cli.main(args=argv, prog_name="invariance")


if __name__ == "__main__":  # pragma: no cover
    main()
