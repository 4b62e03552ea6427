"""The smaller commands: scenes, layers, report, demo, bench."""

from __future__ import annotations

from pathlib import Path

import click

from ..errors import InvarianceError
from ._shared import (ENCODER_HELP, check_outputs, check_spec, handle_errors, printable, quiet_option, say,
                      terminate_as_interrupt, trust_code_option, weights_option)


@click.command()
@click.argument("out_dir", type=click.Path(file_okay=False, path_type=Path))
@click.option("--pairs", type=click.IntRange(1, 1_000_000), default=200, show_default=True, help="Number of scenes.")
@click.option("--size", type=click.IntRange(32, 1024), default=128, show_default=True, help="Image side in pixels.")
@click.option("--seed", type=click.IntRange(0), default=0, show_default=True, help="Same seed, byte-identical files.")
@click.option("--factors", default="surface,distractors,lighting", show_default=True,
              help="Comma-separated clutter factors that may be active: surface, distractors, lighting.")
@click.option("--level", type=click.IntRange(0, 3), default=None,
              help="Fix the severity of active factors (0 = no clutter); default: random 1-3 per scene.")
@quiet_option
@handle_errors
def scenes(out_dir, pairs, size, seed, factors, level, quiet):
    """Generate paired clean/cluttered scenes of a parts-sorting workbench.

    Each scene has one target part (kind, position, angle in labels.csv), pixel-identical
    in both views; the cluttered view adds a textured surface, distractor parts and tools,
    and a lighting change, each with a severity 0-3. For a factor sweep, run once per
    factor and level, e.g. --factors lighting --level 2.
    """
    from ..progress import as_reporter
    from ..scenes import generate_scenes
    from ..scenes.params import _check_params

    factor_tuple = tuple(f.strip() for f in factors.split(",") if f.strip())
    try:  # --size and --level are checked by click; what is left to refuse is --factors
        _check_params(size, factor_tuple, level)
    except InvarianceError as exc:
        raise click.BadParameter(printable(exc), param_hint="'--factors'") from None
    with terminate_as_interrupt(), as_reporter(not quiet).bar(pairs, "scenes") as bar:
        out = generate_scenes(out_dir, pairs=pairs, size=size, seed=seed, factors=factor_tuple, level=level,
                              progress=lambda n=1: bar.update(1))
    say(f"wrote {pairs} pairs to {out} (clean/, cluttered/, labels.csv)")


@click.command()
@click.option("--encoder", "spec", required=True, help=ENCODER_HELP, callback=check_spec)
@weights_option
@click.option("--device", type=click.Choice(["auto", "cpu", "cuda"]), default="cpu", show_default=True,
              help="Where the encoder is built.")
@click.option("--image-size", type=int, default=None, help="Input size the encoder will be run at (16-2048).")
@trust_code_option
@handle_errors
def layers(spec, weights, device, image_size, trusted_code):
    """List the graph nodes an encoder can be tapped at (for --layer).

    Block names (layer3) work as well as inner nodes; the input node taps raw pixels as a
    baseline. --train-from in `invariance align` takes a top-level block name.
    """
    from ..encoders import available_layers, load_encoder
    from ..options import ExtractionOptions

    options = ExtractionOptions(image_size=image_size, device=device, trusted_code=trusted_code)  # validates
    encoder = load_encoder(spec, weights=weights, device=options.device, image_size=options.image_size,
                           trusted_code=options.trusted_code)
    for node in available_layers(encoder):
        say(node)


@click.command()
@click.argument("results", nargs=-1, required=True, type=click.Path(dir_okay=False, path_type=Path))
@click.option("--out", "out_path", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="The HTML file to write (self-contained, opens offline).")
@click.option("--title", default=None, help="Report title [default: from the encoders and data set].")
@click.option("--tsne", is_flag=True, help="Show the t-SNE views stored in the results (scored with --tsne).")
@click.option("--image-root", type=click.Path(file_okay=False, path_type=Path), default=None,
              help="Folder holding clean/ and cluttered/ when the results were made on another machine.")
@handle_errors
def report(results, out_path, title, tsne, image_root):
    """Render the HTML report from saved result or comparison JSON files (from any machine)."""
    from ..report import write_report
    from ..results import load_as_comparison

    check_outputs({"--out": out_path}, files=results)
    comparison = load_as_comparison(results)
    write_report(out_path, comparison["results"], failures=comparison["failures"],
                 warnings=comparison["warnings"], title=title, tsne=tsne, image_root_overrides=image_root)
    say(f"report: {out_path}")


@click.command()
@click.option("--out", "out_dir", type=click.Path(file_okay=False, path_type=Path), default=Path("demo_report"),
              show_default=True, help="Folder for the report and JSON files.")
@quiet_option
@handle_errors
def demo(out_dir, quiet):
    """The whole job on the bundled sample scenes: score, align, compare, report."""
    from ..demo import run_demo

    with terminate_as_interrupt():
        lines = run_demo(out_dir, progress=not quiet)
    for line in lines:
        say(line)


@click.command()
@click.option("--pairs", type=click.IntRange(1), default=None,
              help="Estimate the run time for this many pairs [default: the measured workload only].")
@click.option("--encoder", "spec", default="torchvision:resnet18", show_default=True, help=ENCODER_HELP)
@click.option("--json", "json_path", type=click.Path(dir_okay=False, path_type=Path), help="Write the figures as JSON.")
@click.option("--quick", is_flag=True, help="Smaller workloads (a rough figure in well under a minute).")
@handle_errors
def bench(pairs, spec, json_path, quick):
    """Measure what a run costs on this machine: extraction, cache, statistics, alignment, scenes."""
    from .._io import atomic_write_json
    from ..bench import run_bench

    check_outputs({"--json": json_path})
    figures = run_bench(spec=spec, pairs=pairs, quick=quick, echo=lambda m: say(m))
    if json_path:
        atomic_write_json(json_path, figures)
        say(f"figures JSON: {json_path}")
