"""Command line: a thin shell over the library.

Each command parses its options into the objects of :mod:`invariance.options`, calls the
library, prints and writes files. Exit codes: 0 success; 1 a clear error (bad input,
nothing written half-way); 2 usage error; 3 a user-set gate (``--max-...``) was not met.
"""

from __future__ import annotations

import click

from .. import __version__
from .align import align
from .compare import compare
from .explain import explain
from .extract import extract
from .other import bench, demo, layers, report, scenes
from .score import score


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
      invariance explain demo_set --encoder SPEC --worst 4 --out maps   # where clutter bites
      invariance extract big_set --encoder SPEC --out feats --engine ray  # features on a cluster

    A data set folder holds clean/ and cluttered/ with matching file names and an optional
    labels.csv (first column the file name; text columns are classes, numeric columns are
    regression targets; factor_* and level columns describe the clutter).
    """


for _command in (scenes, score, layers, extract, compare, report, align, explain, demo, bench):
    cli.add_command(_command)


def main(argv=None):
    """Console-script entry point."""
    return cli.main(args=argv, prog_name="invariance")


__all__ = ["cli", "main"]
