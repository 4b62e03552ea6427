"""Files and names that try to act on the machine, the terminal or other tools.

Each case runs a real command and checks the exit code, the first line of the message and
that nothing was overwritten or left behind.
"""

from __future__ import annotations

import os

import numpy as np
import pytest
from click.testing import CliRunner

from invariance.cli import cli


def _features(folder, n=40, d=8, seed=0):
    rng = np.random.default_rng(seed)
    scene = rng.normal(size=(n, d))
    a, b = folder / "clean.npy", folder / "cluttered.npy"
    np.save(a, (scene + 0.3 * rng.normal(size=(n, d))).astype(np.float32))
    np.save(b, (scene + 0.3 * rng.normal(size=(n, d))).astype(np.float32))
    return a, b


def _run(args):
    return CliRunner().invoke(cli, args)


def test_json_to_a_device_node_writes_in_place_and_keeps_the_node(tmp_path):
    # Renaming a temporary file over /dev/null would replace the system's device node with
    # a regular file (as root); special files are written in place.
    a, b = _features(tmp_path)
    res = _run(["score", "--features", str(a), str(b), "--permutations", "20", "--json", os.devnull])
    assert res.exit_code == 0, res.output
    assert os.path.exists(os.devnull) and not os.path.isfile(os.devnull)


def test_json_through_a_symlink_keeps_the_link(tmp_path):
    a, b = _features(tmp_path)
    target, link = tmp_path / "real.json", tmp_path / "link.json"
    target.write_text("{}")
    link.symlink_to(target)
    res = _run(["score", "--features", str(a), str(b), "--permutations", "20", "--json", str(link)])
    assert res.exit_code == 0, res.output
    assert link.is_symlink() and '"schema"' in target.read_text()


@pytest.mark.parametrize("case", ["json_is_report", "json_is_labels", "report_is_features"])
def test_outputs_never_overwrite_each_other_or_inputs(tmp_path, case):
    a, b = _features(tmp_path)
    labels = tmp_path / "labels.csv"
    labels.write_text("file,y\n" + "".join(f"s{i},{i}\n" for i in range(40)))
    before = {p: p.read_bytes() for p in (a, b, labels)}
    out = {"json_is_report": ["--json", str(tmp_path / "r.x"), "--report", str(tmp_path / "r.x")],
           "json_is_labels": ["--json", str(labels)],
           "report_is_features": ["--report", str(a)]}[case]
    res = _run(["score", "--features", str(a), str(b), "--labels", str(labels), "--permutations", "20", *out])
    assert res.exit_code == 1
    assert res.output.startswith("error: ") and ("would write this file" in res.output
                                                 or "is read by this run" in res.output)
    assert all(p.read_bytes() == data for p, data in before.items())
    assert not (tmp_path / "r.x").exists()


def test_align_out_equal_to_its_weights_is_refused(tmp_path):
    weights = tmp_path / "w.pt"
    weights.write_bytes(b"not really weights")
    res = _run(["align", str(tmp_path), "--encoder", "torchvision:resnet18", "--weights", str(weights),
                "--out", str(weights)])
    assert res.exit_code == 1 and "is read by this run" in res.output
    assert weights.read_bytes() == b"not really weights"


def test_terminal_escapes_in_messages_are_shown_not_sent(tmp_path):
    # ESC ] 0 ; title BEL sets a terminal's title (ECMA-48 / xterm control sequences)
    name = tmp_path / "evil\x1b]0;owned\x07.npy"
    res = _run(["score", "--features", str(name), str(name)])
    assert res.exit_code == 1
    assert "\x1b" not in res.output and "\x07" not in res.output and "\\x1b" in res.output


def test_drift_csv_cells_cannot_start_a_formula(tmp_path):
    a, b = _features(tmp_path, n=30)
    labels = tmp_path / "labels.csv"
    labels.write_text("file,y\n" + "".join(f"=cmd{i}(),{i}\n" for i in range(30)))
    out = tmp_path / "drift.csv"
    res = _run(["score", "--features", str(a), str(b), "--labels", str(labels), "--permutations", "20",
                "--drift-csv", str(out)])
    assert res.exit_code == 0, res.output
    cells = [line.split(",")[0] for line in out.read_text().splitlines()[1:]]
    assert cells and all(c.startswith("'=") for c in cells)
