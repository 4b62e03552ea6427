"""The hostile-input catalogue's machinery: a workspace of small files, one command run, checks.

Every case of the catalogue (``test_catalogue_*.py`` in this folder) is a :class:`Case`:
a builder that plants files in a fresh folder and returns the command's arguments, the exit
code the command must end with, and a pattern for the first line of its message. One run
checks, for every case:

- the exit code (0 success, 1 clear error, 2 usage error, 3 gate, 130 interrupted);
- no traceback: "Traceback" is not in the output and the run raised nothing but SystemExit;
- no advice to load a file unsafely (``weights_only=False``, ``allow_pickle=True``);
- the first ``error:`` / ``Error:`` / ``interrupted`` line on stderr matches (for a
  success, the pattern must match some line of the output instead);
- nothing half-written or overwritten: after a failure every file is as it was and no new
  file exists; after any run no temporary ``.tmp`` file or ``.partial`` folder is left.

Images are 16 px and the encoder is the untrained workbench CNN run at 16 px, so the whole
catalogue runs in seconds.
"""

from __future__ import annotations

import errno
import re
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
from click.testing import CliRunner
from PIL import Image

from invariance.cli import cli

# The catalogue builds result files with the report tests' builders (tests/report_fixtures.py).
_TESTS = str(Path(__file__).resolve().parents[1])
if _TESTS not in sys.path:
    sys.path.append(_TESTS)

ENCODER = "python:invariance.zoo:workbench_cnn"  # untrained: no shipped weights needed
FAST = ["--quiet", "--no-cache", "--permutations", "20", "--image-size", "16"]
PAIRS = 12  # the fewest a whole score accepts is max(2 x folds, 10)
TWO_CLASSES = object()  # data(): write a labels.csv with a two-class "part" column


@dataclass(frozen=True)
class Case:
    """One hostile input: ``build(ws)`` plants it and returns the command's arguments."""

    id: str
    build: Callable[["Workspace"], list]
    code: int
    first: str | None = None
    appears: tuple = ()  # files another process makes meanwhile (relative to the workspace)
    after: Callable[["Workspace"], None] | None = None  # further checks on what the run left


class Workspace:
    """A folder of small planted files, and the test's monkeypatch for injected failures."""

    def __init__(self, root: Path, monkeypatch):
        self.root = root
        self.monkeypatch = monkeypatch
        self.marker = root / "payload_ran"  # written only if planted code runs

    def __truediv__(self, name) -> Path:
        return self.root / name

    def text(self, name: str, text: str) -> Path:
        path = self.root / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text, encoding="utf-8")
        return path

    def bytes(self, name: str, data: bytes) -> Path:
        path = self.root / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(data)
        return path

    def data(self, name: str = "data", n: int = PAIRS, labels=TWO_CLASSES, size: int = 16) -> Path:
        """A data folder of ``n`` random pairs; ``labels`` is the labels.csv text (``None``: no file)."""
        root = self.root / name
        rng = np.random.default_rng(0)
        for view in ("clean", "cluttered"):
            (root / view).mkdir(parents=True, exist_ok=True)
            for i in range(n):
                pixels = rng.integers(0, 256, (size, size, 3), dtype=np.uint8)
                Image.fromarray(pixels).save(root / view / f"s{i:02d}.png")
        if labels is TWO_CLASSES:
            labels = "file,part\n" + "".join(f"s{i:02d}.png,{'ab'[i % 2]}\n" for i in range(n))
        if labels is not None:
            (root / "labels.csv").write_text(labels, encoding="utf-8")
        return root

    def features(self, n: int = 30, d: int = 6, seed: int = 0) -> tuple[Path, Path]:
        rng = np.random.default_rng(seed)
        scene = rng.normal(size=(n, d))
        a, b = self.root / "clean.npy", self.root / "cluttered.npy"
        np.save(a, scene + 0.3 * rng.normal(size=(n, d)))
        np.save(b, scene + 0.3 * rng.normal(size=(n, d)))
        return a, b

    def payload_module(self, name: str = "payload.py") -> Path:
        """A Python file that writes the marker when imported: planted code."""
        return self.text(name, f"open({str(self.marker)!r}, 'w').write('ran')\ndef build():\n    pass\n")

    def no_space(self, only: Callable[[str], bool] = lambda name: True) -> None:
        """Every write through ``invariance._io`` (to files ``only`` accepts) fails as on a full disk."""
        from invariance import _io

        real = _io._write_fully

        def full(fh, data, **kwargs):
            if only(str(getattr(fh, "name", ""))):
                raise OSError(errno.ENOSPC, "No space left on device")
            return real(fh, data, **kwargs)

        self.monkeypatch.setattr(_io, "_write_fully", full)

    def snapshot(self) -> dict:
        """Every file under the root (bytecode caches aside) with its bytes."""
        return {p: p.read_bytes() for p in self.root.rglob("*")
                if p.is_file() and not p.is_symlink() and "__pycache__" not in p.parts}


def message_line(res) -> str:
    """The first line of the command's message on stderr ("" when there is none)."""
    for line in res.stderr.splitlines():
        if line.startswith(("error: ", "Error: ", "interrupted")):
            return line
    return ""


def run_case(case: Case, root: Path, monkeypatch) -> None:
    """Build, run and check one case (see the module docstring for what is checked)."""
    ws = Workspace(root, monkeypatch)
    args = [str(a) for a in case.build(ws)]
    before = ws.snapshot()
    res = CliRunner().invoke(cli, args)
    assert res.exit_code == case.code, (args, res.output)
    assert "Traceback" not in res.output, res.output
    # torch's own advice on a refused file is to load it unsafely; it must never be passed on
    assert "weights_only=False" not in res.output and "allow_pickle=True" not in res.output, res.output
    assert res.exception is None or isinstance(res.exception, SystemExit), repr(res.exception)
    if case.code != 0:
        line = message_line(res)
        assert case.first is None or re.search(case.first, line), (line, res.output)
        after = {p: data for p, data in ws.snapshot().items() if p.relative_to(root).as_posix() not in case.appears}
        assert set(after) == set(before), f"files appeared or vanished: {set(after) ^ set(before)}"
        assert all(after[p] == data for p, data in before.items()), "a file was overwritten"
    elif case.first is not None:
        assert re.search(case.first, res.output, re.MULTILINE), res.output
    if case.after is not None:
        case.after(ws)
    leftovers = [p for p in root.rglob(".*") if p.name.endswith((".tmp", ".partial", ".check"))]
    assert not leftovers, leftovers
    assert not ws.marker.exists(), "planted code ran"
