"""Files and names that try to act on the machine, the terminal or other tools.

Each case runs a real command and checks the exit code, the first line of the message and
that nothing was overwritten or left behind.
"""

from __future__ import annotations

import errno
import json
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


# --------------------------------------------------------------------------- beyond the catalogue
# The table-driven catalogue of hostile inputs (exit code, first message line, nothing
# half-written, no traceback, planted code never run) is in tests/hostile/. Payloads planted
# in the hub cache and in a checkpoint's source are also checked at the library level in
# tests/test_encoders.py (test_planted_hub_file_is_refused_by_its_hash_before_it_is_read,
# test_checkpoint_naming_planted_code_never_runs_it).

ENCODER = "python:invariance.zoo:workbench_cnn"


def _pairs(root, n=12, size=16):
    from PIL import Image

    rng = np.random.default_rng(0)
    for view in ("clean", "cluttered"):
        (root / view).mkdir(parents=True, exist_ok=True)
        for i in range(n):
            Image.fromarray(rng.integers(0, 256, (size, size, 3), dtype=np.uint8)).save(root / view / f"s{i:02d}.png")
    return root


_PEAK_SCRIPT = """
import sys
import numpy as np
from PIL import Image
from invariance.data import PairSet
from invariance.encoders import extract_features, load_encoder
from invariance.errors import InvarianceError
from invariance.options import ExtractionOptions

strip, square = sys.argv[1], sys.argv[2]
Image.fromarray(np.zeros((1, 100_000, 3), np.uint8)).save(strip)  # 1 x 100000 px, a few hundred bytes
Image.fromarray(np.zeros((32, 32, 3), np.uint8)).save(square)
encoder = load_encoder("torchvision:resnet18", device="cpu")  # default preprocessing: 256 then 224 px
pairs = PairSet.from_paths([strip, square], [strip, square])
def peak_kib():
    # VmHWM belongs to this process's own address space; ru_maxrss would carry over the
    # high-water mark of the forking parent (the test runner) across exec on Linux.
    with open("/proc/self/status") as status:
        return next(int(line.split()[1]) for line in status if line.startswith("VmHWM:"))
before = peak_kib()
try:
    extract_features(pairs, encoder, options=ExtractionOptions(cache_dir=None), progress=False, num_workers=0)
    print("accepted")
except InvarianceError as exc:
    print("refused:", exc)
after = peak_kib()
print(f"peak_kib {before} {after}")
"""


@pytest.mark.skipif(not os.path.exists("/proc/self/status"), reason="peak memory is read from Linux's /proc")
def test_a_1x100000_png_is_refused_within_a_memory_bound(tmp_path):
    # The resize scales the short side: 1 px -> 256 px would make the long side 25.6 M px
    # (20 GB). The work per image is bounded (preprocess.MAX_RESIZED_PIXELS) and checked
    # before resizing. Memory is measured in a fresh process from /proc/self/status (VmHWM,
    # KiB): a memory bound, not a timing.
    import subprocess
    import sys

    out = subprocess.run([sys.executable, "-c", _PEAK_SCRIPT, str(tmp_path / "strip.png"), str(tmp_path / "sq.png")],
                         capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    assert "refused:" in out.stdout and "strip.png is 100000 x 1 px" in out.stdout and "aspect ratio" in out.stdout
    before, after = (int(v) for v in out.stdout.split("peak_kib ")[1].split())
    assert after < 2**20  # the whole process, imports included, stayed under 1 GiB
    assert after - before < 64 * 2**10  # and refusing the strip cost under 64 MiB


def test_every_way_a_preprocessing_size_enters_is_capped(tmp_path):
    from invariance.encoders import Preprocess, load_encoder
    from invariance.errors import InvarianceError

    with pytest.raises(InvarianceError, match="from 1 to 2048"):
        Preprocess(resize=100_000, crop=224)
    with pytest.raises(InvarianceError, match="python:x:y: preprocess crop must be .* from 1 to 2048"):
        Preprocess.from_dict({"crop": 4096, "resize": 64}, source="python:x:y")
    with pytest.raises(InvarianceError, match="from 1 to 2048"):
        load_encoder(ENCODER, device="cpu", image_size=100_000)  # the Python API, no options object
    (tmp_path / "enc.toml").write_text(f'[[encoder]]\nspec = "{ENCODER}"\nimage_size = 100000\n')
    from invariance.encoder_list import read_encoder_list

    with pytest.raises(InvarianceError, match="image_size=100000 is not valid"):
        read_encoder_list(tmp_path / "enc.toml")


def test_folders_made_by_scenes_get_the_usual_permissions(tmp_path):
    # mkdtemp makes owner-only (0700) folders; a data set is shared like any folder (umask).
    mask = os.umask(0o022)
    try:
        res = _run(["scenes", str(tmp_path / "set"), "--pairs", "2", "--size", "32", "--quiet"])
    finally:
        os.umask(mask)
    assert res.exit_code == 0, res.output
    for folder in (tmp_path / "set", tmp_path / "set" / "clean"):
        assert folder.stat().st_mode & 0o777 == 0o755
    assert (tmp_path / "set" / "labels.csv").stat().st_mode & 0o777 == 0o644


def test_sigterm_during_scenes_leaves_no_hidden_partial_folder(tmp_path):
    # SIGTERM ends Python without unwinding; during `scenes` it is turned into Ctrl-C, so the
    # temporary sibling folder is removed (POSIX signal semantics; exit 130 as for Ctrl-C).
    import signal
    import subprocess
    import sys
    import time

    code = "from invariance.cli import main; main()"
    proc = subprocess.Popen([sys.executable, "-c", code, "scenes", str(tmp_path / "big"), "--pairs", "100000",
                             "--size", "32", "--quiet"], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.monotonic() + 120  # waiting for the run to start writing, not timing it
        while not any(p.name.endswith(".partial") and any(p.rglob("*.png")) for p in tmp_path.iterdir()):
            assert proc.poll() is None and time.monotonic() < deadline, proc.stderr.read() if proc.poll() else ""
            time.sleep(0.05)
        proc.send_signal(signal.SIGTERM)
        _, err = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 130, err
    assert "interrupted; nothing was written half-way" in err and "Traceback" not in err
    assert list(tmp_path.iterdir()) == []


def test_report_from_another_folder_still_finds_the_images(tmp_path, monkeypatch):
    # dataset.path is stored absolute: a relative path typed in one folder is wrong in another.
    work, elsewhere = tmp_path / "work", tmp_path / "elsewhere"
    _pairs(work / "data")
    elsewhere.mkdir()
    monkeypatch.chdir(work)
    res = _run(["score", "data", "--encoder", ENCODER, "--quiet", "--no-cache", "--permutations", "20",
                "--image-size", "16", "--json", "r.json", "--report", "here.html"])
    assert res.exit_code == 0, res.output
    stored = json.loads((work / "r.json").read_text())["dataset"]["path"]
    assert os.path.isabs(stored) and os.path.samefile(stored, work / "data")
    monkeypatch.chdir(elsewhere)
    res = _run(["report", str(work / "r.json"), "--out", "there.html"])
    assert res.exit_code == 0, res.output
    here, there = (work / "here.html").read_text(), (elsewhere / "there.html").read_text()
    assert there.count("data:image/png") == here.count("data:image/png")
    assert 'class="pair-missing"' not in there and "not found" not in there.split('id="data"')[0]


def test_outputs_of_one_command_are_written_all_or_none(tmp_path, monkeypatch):
    from invariance import _io
    from invariance.errors import InvarianceError

    old = tmp_path / "old.json"
    old.write_text("previous run")
    real = _io._write_fully

    def fail_on_second(fh, data, **kwargs):
        if "second" in fh.name:
            raise OSError(errno.ENOSPC, "No space left on device")
        return real(fh, data, **kwargs)

    monkeypatch.setattr(_io, "_write_fully", fail_on_second)
    with pytest.raises(InvarianceError, match=r"cannot write .*second.html \(No space left on device\); nothing"):
        _io.write_outputs_together([(old, "new"), (tmp_path / "sub" / "second.html", "<p>")])
    assert old.read_text() == "previous run"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["old.json"]  # no temporary file, no new folder
    monkeypatch.setattr(_io, "_write_fully", real)
    written = _io.write_outputs_together([(old, "new"), (tmp_path / "sub" / "second.html", "<p>"),
                                          (os.devnull, b"x")])
    assert old.read_text() == "new" and (tmp_path / "sub" / "second.html").read_text() == "<p>"
    assert written[2] == type(old)(os.devnull) and not os.path.isfile(os.devnull)


def test_a_folder_at_a_later_output_path_stops_before_any_output_lands(tmp_path):
    from invariance import _io
    from invariance.errors import InvarianceError

    first = tmp_path / "result.json"
    first.write_text("previous run")
    (tmp_path / "maps.png").mkdir()
    with pytest.raises(InvarianceError, match=r"cannot write .*maps.png: it is a folder"):
        _io.write_outputs_together([(first, "new"), (tmp_path / "maps.png", b"png")])
    assert first.read_text() == "previous run"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["maps.png", "result.json"]


def test_a_full_cache_volume_is_warned_about_once_and_the_run_goes_on(tmp_path, monkeypatch):
    from invariance import _io
    from invariance.encoders import cache

    def full(fh, data, **kwargs):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(_io, "_write_fully", full)
    monkeypatch.setattr(cache, "_UNWRITABLE", set())
    clean = np.zeros((3, 2), np.float32)
    with pytest.warns(RuntimeWarning, match=r"cannot be written \(No space left on device\); the run goes on"):
        assert cache.store(tmp_path, "k1", clean, clean, {}) is None
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a second failure in the same folder stays silent
        assert cache.store(tmp_path, "k2", clean, clean, {}) is None
    assert list(tmp_path.iterdir()) == []
