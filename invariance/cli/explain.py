"""`invariance explain`: drift maps of chosen pairs, written as PNG figures and raw maps."""

from __future__ import annotations

from pathlib import Path

import click

from ._shared import (ENCODER_HELP, EXIT_CODES_HELP, check_outputs, check_spec, extraction_options, handle_errors,
                      quiet_option, say, terminate_as_interrupt, weights_option)


@click.command(epilog=EXIT_CODES_HELP)
@click.argument("data", type=click.Path(path_type=Path))
@click.option("--encoder", "spec", required=True, help=ENCODER_HELP, callback=check_spec)
@weights_option
@click.option("--pair", "pair_names", multiple=True, metavar="NAME",
              help="A pair to explain, by its file name under clean/ (repeat for several).")
@click.option("--worst", type=click.IntRange(1, 1000), default=None,
              help="Explain the K pairs with the highest relative drift [default: 4 when no --pair is given].")
@click.option("--out", "out_dir", required=True, type=click.Path(file_okay=False, path_type=Path),
              help="Folder for the figures (NN_name.png), the raw maps (NN_name.npy) and explain.json.")
@click.option("--method", type=click.Choice(["occlusion", "gradient"]), default="occlusion", show_default=True,
              help="occlusion: exact, restores each patch from the clean view; gradient: one backward pass, "
                   "first-order estimate.")
@click.option("--patch", type=click.IntRange(1, 4096), default=None,
              help="Occlusion patch side in image pixels (smaller: sharper map, more forward passes) "
                   "[default: the image's shorter side / 16, e.g. 8 px at 128 px: 256 patches].")
@click.option("--layer", default=None, help="Graph node to compare at (see `invariance layers`) [default: output].")
@click.option("--scene-seed", type=click.IntRange(0), default=None,
              help="For sets made by `invariance scenes --seed S`: split each map over the generator's "
                   "distractor, surface and lighting pixels (the pairs are checked to be that seed's).")
@extraction_options
@quiet_option
@handle_errors
def explain(data, spec, weights, pair_names, worst, out_dir, method, patch, layer, scene_seed, extraction, quiet):
    """Show where in the image clutter moves an encoder's features.

    For each chosen pair, a drift map: how much each region of the cluttered view moves
    the feature away from its clean twin (1 - cos). The occlusion map restores one patch of
    the clean view at a time and records the drop in drift (Zeiler & Fergus 2014); the
    gradient map multiplies the drift's gradient by the pixel change (Simonyan et al.
    2014). Writes per pair a PNG (clean, cluttered, map over the cluttered view) and the
    raw map as .npy, plus explain.json; all files land together or none do.
    """
    from ..data import discover_pairs
    from ..encoders import load_encoder
    from ..explain import explain_outputs, explain_pairs
    from ..explain.files import check_targets
    from .._io import write_outputs_together

    if pair_names and worst is not None:
        raise click.UsageError("give --pair NAME or --worst K, not both")
    if out_dir.exists() and not out_dir.is_dir():
        raise click.BadParameter(f"{out_dir} is a file; give a folder", param_hint="'--out'")
    check_outputs({"--out": out_dir / "explain.json"}, data=data, specs=[spec], files=[weights])
    pairs = discover_pairs(data, skip_unpaired=extraction.skip_unpaired)
    encoder = load_encoder(spec, weights=weights, device=extraction.device, image_size=extraction.image_size,
                           trusted_code=extraction.trusted_code)
    with terminate_as_interrupt():
        explained = explain_pairs(pairs, encoder, names=pair_names, worst=worst, method=method, patch=patch,
                                  layer=layer, scene_seed=scene_seed, batch_size=extraction.batch_size,
                                  extraction=extraction, progress=not quiet)
        files = explain_outputs(explained, pairs, out_dir, encoder={**encoder.describe(), "name": spec})
        check_targets(files)
        write_outputs_together(files)
    for entry in explained["pairs"]:
        say(_line(entry))
    say(f"wrote {len(files)} files to {out_dir}")


def _line(entry: dict) -> str:
    text = f"{entry['name']}: drift {entry['drift']:.3f} (1 - cos)"
    if entry["relative_drift"] is not None:
        text += f", relative {entry['relative_drift']:.2f}"
    if entry["shares"]:
        shown = ", ".join(f"{k} {v:.2f}" for k, v in entry["shares"].items() if v is not None)
        text += f"; share of positive map mass: {shown}"
    return text
