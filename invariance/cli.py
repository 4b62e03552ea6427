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
    """Fail before any work when an output file cannot be written (a real test write)."""
    from ._io import check_writable

    for path in paths:
        if path is not None:
            check_writable(path)


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
    _print_breakdowns(result.get("breakdowns") or {})
    for warning in result.get("warnings", []):
        click.echo(f"warning: {warning}")
    click.echo(f"note: {SAFETY_CAUTION}")


def _print_breakdowns(breakdowns):
    """One line per factor: domain accuracy and relative drift at each value (dose-response)."""
    from .results import metric_value

    for column, groups in breakdowns.items():
        cells = []
        for value, group in groups.items():
            m = group.get("metrics", {})
            acc = metric_value(m, "domain_classifier", "accuracy")
            drift = metric_value(m, "paired_drift", "relative_drift")
            acc_s = "n/a" if acc is None else f"{acc:.2f}"
            drift_s = "n/a" if drift is None else f"{drift:.2f}"
            cells.append(f"{value}: acc {acc_s}, drift {drift_s} (n={group.get('pairs')})")
        click.echo(f"by {column}: " + "; ".join(cells))


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
@click.option("--tsne", is_flag=True, help="Add a t-SNE view of the features to the report (slower).")
@_run_options
@_handle_errors
def score(data, spec, weights, layers, features, labels_csv, json_path, report_path, drift_csv, permutations, folds,
          max_domain_accuracy, max_relative_drift, max_probe_gap, tsne, seed, image_size, device, batch_size, cache_dir,
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
        result = _score_features_files(features, labels_csv, seed=seed, permutations=permutations, folds=folds,
                                       tsne=tsne)
    else:
        result = pipeline.score_dataset(
            data, spec, weights=weights, layers=layers, seed=seed, permutations=permutations, folds=folds,
            image_size=image_size, device=device, cache_dir=_cache_dir(cache_dir, no_cache), batch_size=batch_size,
            skip_unpaired=skip_unpaired, progress=not quiet, tsne=tsne,
        )
    thresholds = {"max_domain_accuracy": max_domain_accuracy, "max_relative_drift": max_relative_drift,
                  "max_probe_gap": max_probe_gap}
    result["gates"] = pipeline.evaluate_gates(result, thresholds)
    _write_outputs(result, json_path=json_path, report_path=report_path, drift_csv=drift_csv, tsne=tsne)
    _print_summary(result)
    pipeline.raise_for_gates(result["gates"])


def _score_features_files(features, labels_csv, *, seed, permutations, folds, tsne=False):
    from . import pipeline
    from .scoring import load_feature_files

    clean, cluttered = load_feature_files(*features)
    tasks = factors = names = None
    if labels_csv is not None:
        names, table = _load_features_labels(labels_csv, clean.shape[0])
        tasks, factors = table.tasks or None, table.factors or None
    return pipeline.score_feature_arrays(
        clean, cluttered, tasks=tasks, factors=factors, names=names, seed=seed, permutations=permutations, folds=folds,
        tsne=tsne, source={"spec": f"features:{features[0]}", "name": Path(features[0]).stem, "path": str(Path(features[0]).parent)},
    )


def _write_outputs(result, *, json_path=None, report_path=None, drift_csv=None, tsne=False):
    from ._io import atomic_write_json, atomic_write_text

    if json_path:
        atomic_write_json(json_path, result)
        click.echo(f"result JSON: {json_path}")
    if drift_csv:
        atomic_write_text(drift_csv, _drift_table(result.get("pairs", [])))
        click.echo(f"per-pair drift: {drift_csv}")
    if report_path:
        from .report.html import write_report

        write_report(report_path, [result], tsne=tsne)
        click.echo(f"report: {report_path}")


def _drift_table(pairs) -> str:
    """Per-pair drift as CSV text (file, relative_drift); an empty cell where not computable."""
    import csv
    import io

    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(["file", "relative_drift"])
    writer.writerows([p["name"], "" if p["drift"] is None else f"{p['drift']:.6f}"] for p in pairs)
    return out.getvalue()


@cli.command()
@click.option("--encoder", "spec", required=True, help=ENCODER_HELP)
@click.option("--weights", type=click.Path(dir_okay=False, path_type=Path), help="Local state_dict for a torchvision: spec.")
@click.option("--device", type=click.Choice(["auto", "cpu", "cuda"]), default="cpu", show_default=True)
@click.option("--image-size", type=click.IntRange(16, 2048), default=None, help="Input size the encoder will be run at.")
@_handle_errors
def layers(spec, weights, device, image_size):
    """List the graph nodes an encoder can be tapped at (for --layer).

    Block names (layer3) work as well as inner nodes; the input node taps raw pixels as a
    baseline. --train-from in `invariance align` takes a top-level block name.
    """
    from .encoders import available_layers, load_encoder

    encoder = load_encoder(spec, weights=weights, device=device, image_size=image_size)
    for node in available_layers(encoder):
        click.echo(node)


def _read_encoders_toml(path):
    """Encoders listed in a TOML file: [[encoder]] tables with spec, weights, layers, name."""
    import tomllib

    try:
        with open(path, "rb") as fh:
            data = tomllib.load(fh)
    except OSError as exc:
        raise InvarianceError(f"cannot read {path}: {exc.strerror}; check the --encoders path") from None
    except tomllib.TOMLDecodeError as exc:
        raise InvarianceError(f"{path} is not valid TOML ({exc}); fix the file") from None
    entries = data.get("encoder")
    if not isinstance(entries, list) or not entries:
        raise InvarianceError(f"{path} lists no [[encoder]] tables; add one per encoder with at least spec = \"...\"")
    out = []
    for i, entry in enumerate(entries, 1):
        if not isinstance(entry, dict) or not isinstance(entry.get("spec"), str):
            raise InvarianceError(f"{path}: encoder {i} has no spec; write spec = \"torchvision:resnet18\" (for example)")
        unknown = set(entry) - {"spec", "weights", "layers", "name", "image_size"}
        if unknown:
            raise InvarianceError(f"{path}: encoder {i} has unknown keys {sorted(unknown)}; allowed: spec, weights, layers, name, image_size")
        item = dict(entry)
        if item.get("weights"):
            item["weights"] = Path(path).parent / item["weights"]
        out.append(item)
    return out


@cli.command()
@click.argument("data", type=click.Path(path_type=Path))
@click.option("--encoder", "specs", multiple=True, help=ENCODER_HELP + " Repeat for each encoder.")
@click.option("--encoders", "encoders_toml", type=click.Path(dir_okay=False, path_type=Path),
              help="TOML file with [[encoder]] tables (spec, weights, layers, name, image_size).")
@click.option("--layer", "layers", multiple=True, help="Graph node to tap in every encoder given by --encoder.")
@click.option("--json", "json_path", type=click.Path(dir_okay=False, path_type=Path), help="Write the comparison JSON here.")
@click.option("--report", "report_path", type=click.Path(dir_okay=False, path_type=Path), help="Write the HTML report here.")
@click.option("--permutations", type=click.IntRange(1, 1_000_000), default=1000, show_default=True)
@click.option("--folds", type=click.IntRange(2, 50), default=5, show_default=True)
@click.option("--tsne", is_flag=True, help="Add a t-SNE view of the features to the report (slower).")
@_run_options
@_handle_errors
def compare(data, specs, encoders_toml, layers, json_path, report_path, permutations, folds, tsne, seed, image_size, device,
            batch_size, cache_dir, no_cache, skip_unpaired, quiet):
    """Score several encoders on the same pairs, folds and permutations, and rank them.

    Encoders that share a network reuse cached features. An encoder that fails midway is
    shown in the report with its message; the others are still scored.
    """
    from . import pipeline
    from ._io import atomic_write_json

    entries = [{"spec": s, "layers": list(layers) or None} for s in specs]
    if encoders_toml:
        entries += _read_encoders_toml(encoders_toml)
    if not entries:
        raise click.UsageError("give at least one --encoder SPEC or --encoders FILE.toml")
    _check_output_paths(json_path, report_path)
    comparison = pipeline.compare_encoders(
        data, entries, seed=seed, permutations=permutations, folds=folds, image_size=image_size, device=device,
        cache_dir=_cache_dir(cache_dir, no_cache), batch_size=batch_size, skip_unpaired=skip_unpaired,
        progress=not quiet, echo=_echo_err(quiet), tsne=tsne,
    )
    if json_path:
        atomic_write_json(json_path, comparison)
        click.echo(f"comparison JSON: {json_path}")
    if report_path:
        from .report.html import write_report

        write_report(report_path, comparison["results"], failures=comparison["failures"], warnings=comparison["warnings"],
                     tsne=tsne)
        click.echo(f"report: {report_path}")
    _print_ranking(comparison)


def _print_ranking(comparison):
    from .results import display_name, metric_value, rank_results

    results = comparison["results"]
    fmt = lambda v: "n/a" if v is None else f"{v:.3f}"
    rows = [("rank", "encoder", "domain accuracy [95% CI]", "relative drift", "CKA")]
    for rank, i in enumerate(rank_results(results), 1):
        m = results[i]["metrics"]
        acc = metric_value(m, "domain_classifier", "accuracy")
        ci = m.get("domain_classifier", {}).get("ci")
        acc_s = f"{acc:.3f} [{ci[0]:.3f}, {ci[1]:.3f}]" if acc is not None and ci else "n/a"
        rows.append((str(rank), display_name(results[i]), acc_s, fmt(metric_value(m, "paired_drift", "relative_drift")),
                     fmt(metric_value(m, "cka"))))
    widths = [max(len(r[c]) for r in rows) for c in range(len(rows[0]))]
    for row in rows:
        click.echo("  ".join(cell.ljust(w) for cell, w in zip(row, widths)).rstrip())
    for failure in comparison.get("failures", []):
        click.echo(f"failed: {failure['name']}: {failure['error']}")
    for warning in comparison.get("warnings", []):
        click.echo(f"warning: {warning}")
    click.echo(f"note: {SAFETY_CAUTION}")


@cli.command()
@click.argument("results", nargs=-1, required=True, type=click.Path(dir_okay=False, path_type=Path))
@click.option("--out", "out_path", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="The HTML file to write (self-contained, opens offline).")
@click.option("--title", default=None, help="Report title.")
@click.option("--tsne", is_flag=True, help="Show the t-SNE views stored in the results (scored with --tsne).")
@click.option("--image-root", type=click.Path(file_okay=False, path_type=Path), default=None,
              help="Folder holding clean/ and cluttered/ when the results were made on another machine.")
@_handle_errors
def report(results, out_path, title, tsne, image_root):
    """Render the HTML report from saved result or comparison JSON files (from any machine)."""
    from .report.html import write_report
    from .results import load_as_comparison

    _check_output_paths(out_path)
    comparison = load_as_comparison(results)
    write_report(out_path, comparison["results"], failures=comparison["failures"],
                 warnings=comparison["warnings"], title=title, tsne=tsne, image_root_overrides=image_root)
    click.echo(f"report: {out_path}")


@cli.command()
@click.argument("data", type=click.Path(path_type=Path))
@click.option("--encoder", "spec", required=True, help=ENCODER_HELP)
@click.option("--weights", type=click.Path(dir_okay=False, path_type=Path), help="Local state_dict for a torchvision: spec.")
@click.option("--out", "out_path", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="Checkpoint to write (load it later as checkpoint:FILE).")
@click.option("--steps", type=click.IntRange(1, 1_000_000), default=None,
              help="Training steps (the schedules follow it) [default: the library's, see align_encoder].")
@click.option("--minutes", type=click.FloatRange(0, min_open=True), default=None, help="Wall-clock limit.")
@click.option("--train-from", "train_from", default=None,
              help="First top-level block to train (earlier blocks are frozen and cached); default: the last block.")
@click.option("--held-out", "held_out", type=click.FloatRange(0.05, 0.8), default=0.3, show_default=True,
              help="Fraction of pairs never trained on; before/after are measured on them.")
@click.option("--anchor-weight", type=click.FloatRange(0), default=None, help="Weight of the clean-feature anchor loss.")
@click.option("--paired-weight", type=click.FloatRange(0), default=None, help="Weight of the paired consistency loss.")
@click.option("--mean-weight", type=click.FloatRange(0), default=None,
              help="Weight of the mean-matching loss (whitened distance between the clean and cluttered "
                   "mean features).")
@click.option("--task-weight", type=click.FloatRange(0), default=None, help="Weight of the task heads on clean labels.")
@click.option("--learning-rate", type=click.FloatRange(0, min_open=True), default=None, help="Initial learning rate.")
@click.option("--guard-margin", type=click.FloatRange(0, 1), default=None,
              help="Stop when a clean probe falls more than this relative margin below its start [default 0.05].")
@click.option("--json", "json_path", type=click.Path(dir_okay=False, path_type=Path), help="Write the result JSON here.")
@click.option("--report", "report_path", type=click.Path(dir_okay=False, path_type=Path), help="Write an HTML report here.")
@click.option("--permutations", type=click.IntRange(1, 1_000_000), default=1000, show_default=True)
@_run_options
@_handle_errors
def align(data, spec, weights, out_path, steps, minutes, train_from, held_out, anchor_weight, paired_weight,
          mean_weight, task_weight, learning_rate, guard_margin, json_path, report_path, permutations, seed,
          image_size, device, batch_size, cache_dir, no_cache, skip_unpaired, quiet):
    """Briefly retrain the encoder's last block(s) so clutter no longer separates its features.

    Gradient-reversal adversarial training (Ganin & Lempitsky 2015) against a small domain
    discriminator, with an anchor that keeps clean features close to the original encoder's,
    a task head on clean labels, and paired and mean-matching terms that pull cluttered
    features onto the clean ones. A held-out share of the pairs is never trained on;
    before/after are measured there. Ctrl-C keeps the best checkpoint so far.
    """
    from . import pipeline

    from .align import AlignmentInterrupted

    _check_output_paths(out_path, json_path, report_path)
    try:
        result = pipeline.align_dataset(
            data, spec, weights=weights, out=out_path, steps=steps, minutes=minutes, train_from=train_from,
            held_out_fraction=held_out, anchor_weight=anchor_weight, paired_weight=paired_weight,
            mean_weight=mean_weight,
            task_weight=task_weight, learning_rate=learning_rate, guard_margin=guard_margin, seed=seed,
            image_size=image_size, device=device, batch_size=batch_size, skip_unpaired=skip_unpaired,
            permutations=permutations, progress=not quiet,
        )
    except AlignmentInterrupted as exc:
        click.echo(f"{exc} (load it as checkpoint:{exc.checkpoint})", err=True)
        sys.exit(130)
    _write_outputs(result, json_path=json_path, report_path=report_path)
    _print_alignment(result)


def _print_alignment(result):
    from .results import metric_value

    al = result["alignment"]
    click.echo(f"aligned checkpoint: {al['checkpoint']} (load it as checkpoint:{al['checkpoint']})")
    click.echo(f"stopped: {al.get('stopped_because', 'step limit')}; kept the state of step {al.get('best_step', '?')} "
               f"(step 0 = the original encoder); measured on {al['held_out_pairs']} held-out pairs")
    rows = [("domain accuracy", "domain_classifier", "accuracy"), ("relative drift", "paired_drift", "relative_drift"),
            ("CKA", "cka", None)]
    for label, group, key in rows:
        before, after = metric_value(al["before"], group, key), metric_value(al["after"], group, key)
        fmt = lambda v: "n/a" if v is None else f"{v:.3f}"
        click.echo(f"  {label:<16} before {fmt(before)}  after {fmt(after)}")
    for name, probe in al["after"].get("probe", {}).items():
        b = al["before"].get("probe", {}).get(name, {})
        if "clean" in probe and "clean" in b:
            click.echo(f"  probe {name:<10} clean {b['clean']:.3f} -> {probe['clean']:.3f}   "
                       f"cluttered {b['cluttered']:.3f} -> {probe['cluttered']:.3f}")
    click.echo(f"note: {SAFETY_CAUTION}")


@cli.command()
@click.option("--out", "out_dir", type=click.Path(file_okay=False, path_type=Path), default=Path("reports/demo"),
              show_default=True, help="Folder for the report and JSON files.")
@click.option("--quiet", is_flag=True, help="No progress on stderr.")
@_handle_errors
def demo(out_dir, quiet):
    """The whole job on the bundled sample scenes: score, align, compare, report."""
    from .demo import run_demo

    summary = run_demo(out_dir, progress=not quiet, echo=_echo_err(quiet))
    for line in summary:
        click.echo(line)


@cli.command()
@click.option("--pairs", type=click.IntRange(1), default=None, help="Estimate the run time for this many pairs.")
@click.option("--encoder", "spec", default="torchvision:resnet18", show_default=True, help=ENCODER_HELP)
@click.option("--json", "json_path", type=click.Path(dir_okay=False, path_type=Path), help="Write the figures as JSON.")
@click.option("--quick", is_flag=True, help="Smaller workloads (a rough figure in well under a minute).")
@_handle_errors
def bench(pairs, spec, json_path, quick):
    """Measure what a run costs on this machine: extraction, cache, statistics, alignment, scenes."""
    from ._io import atomic_write_json
    from .bench import run_bench

    _check_output_paths(json_path)
    figures = run_bench(spec=spec, pairs=pairs, quick=quick, echo=lambda m: click.echo(m))
    if json_path:
        atomic_write_json(json_path, figures)
        click.echo(f"figures JSON: {json_path}")


def main(argv=None):
    """Console-script entry point."""
    return cli.main(args=argv, prog_name="invariance")


if __name__ == "__main__":  # pragma: no cover
    main()
