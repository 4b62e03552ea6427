"""`invariance extract`: features of every pair into a features directory (local or on Ray)."""

from __future__ import annotations

from pathlib import Path

import click

from ._shared import (EXIT_CODES_HELP, encoder_option, handle_errors, quiet_option, say, terminate_as_interrupt,
                      trust_code_option, weights_option)


@click.command(epilog=EXIT_CODES_HELP)
@click.argument("data", type=click.Path(exists=True, path_type=Path))
@encoder_option
@weights_option
@click.option("--out", "out", required=True, type=click.Path(file_okay=False, path_type=Path),
              help="Features directory to write (an unfinished one of the same encoder is resumed).")
@click.option("--engine", type=click.Choice(["local", "ray"]), default="local", show_default=True,
              help="local: this process; ray: Ray Data actors on a Ray cluster (pip install 'invariance[ray]').")
@click.option("--address", default=None, help="Ray cluster address HOST:PORT or ray://HOST:PORT [default: a local Ray].")
@click.option("--workers", type=click.IntRange(1), default=None,
              help="Ray actors [default: one per GPU, else one per two CPUs].")
@click.option("--layer", "layers", multiple=True, help="Graph node to tap (repeat for several; see `invariance layers`).")
@click.option("--shard-size", type=click.IntRange(1), default=4096, show_default=True, help="Pairs per shard file.")
@click.option("--batch-size", type=int, default=32, show_default=True, help="Images per forward pass (2-4096).")
@click.option("--image-size", type=int, default=None, help="Resize images to PX x PX (16-2048).")
@click.option("--device", type=click.Choice(["auto", "cpu", "cuda"]), default="auto", show_default=True,
              help="Where the encoder runs (with --engine ray: cuda gives each actor a GPU).")
@click.option("--retries", type=click.IntRange(0, 100), default=1, show_default=True,
              help="With --engine ray: resume the missing shards this many times after a failed actor.")
@trust_code_option
@quiet_option
@handle_errors
def extract(data, spec, weights, out, engine, address, workers, layers, shard_size, batch_size, image_size, device,
            retries, trusted_code, quiet):
    """Extract features of every pair of DATA into a features directory.

    The directory holds .npy shards and a manifest with the encoder's identity, the layers,
    the pair names and a SHA-256 per shard; `score --features-dir DIR` reads it on any machine.
    A rerun into the same --out extracts only the shards that are missing.
    """
    from ..extract import extract_to_directory

    if spec is None:
        raise click.UsageError("give --encoder SPEC")
    if address is not None and engine != "ray":
        raise click.UsageError("--address needs --engine ray")
    with terminate_as_interrupt():
        summary = extract_to_directory(data, spec, out, engine=engine, address=address, layers=list(layers) or None,
                                       weights=weights, batch_size=batch_size, shard_size=shard_size, device=device,
                                       image_size=image_size, workers=workers, retries=retries,
                                       trusted_code=trusted_code, progress=not quiet)
    say(f"features of {summary['pairs']} pairs in {summary['out']}: {summary['shards_written']} shard(s) written, "
        f"{summary['shards_kept']} kept, {summary['seconds']:.1f} s ({summary['engine']} engine)")
