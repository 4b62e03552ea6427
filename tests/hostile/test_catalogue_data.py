"""Hostile-input catalogue, part 1: data folders, images, labels and folder outputs.

Commands: ``scenes``, ``score`` on a data folder or manifest, ``align``, ``layers`` and
``demo``. What each case checks is in ``hostile_workspace.py``.
"""

from __future__ import annotations

import io
import os
import struct
import zlib

import numpy as np
import pytest
from PIL import Image

from hostile_workspace import ENCODER, FAST, Case, run_case

SCORE = ["score", "data", "--encoder", ENCODER, *FAST]


def _png_bytes(size=(16, 16), noise=False) -> bytes:
    buf = io.BytesIO()
    pixels = np.random.default_rng(0).integers(0, 256, (size[1], size[0], 3), dtype=np.uint8) if noise else None
    (Image.fromarray(pixels) if noise else Image.new("RGB", size)).save(buf, format="PNG")
    return buf.getvalue()


def _bomb_png(side=50_000) -> bytes:
    """A 57-byte PNG whose header claims side x side pixels (PNG spec, ISO/IEC 15948: IHDR)."""
    def chunk(kind, body):
        return struct.pack(">I", len(body)) + kind + body + struct.pack(">I", zlib.crc32(kind + body))

    header = chunk(b"IHDR", struct.pack(">IIBBBBB", side, side, 8, 2, 0, 0, 0))
    return b"\x89PNG\r\n\x1a\n" + header + chunk(b"IEND", b"")


def _in_data(ws, relative, data: bytes, **kwargs):
    root = ws.data(**kwargs)
    (root / relative).write_bytes(data)
    return root


def _odd_modes(ws):
    """Every pair in another PIL mode: 16-bit grey, palette with transparency, CMYK, LA, 1-bit, float."""
    root = ws.data()
    rng = np.random.default_rng(1)
    grey = rng.integers(0, 65535, (16, 16)).astype(np.uint16)
    images = [Image.fromarray(grey), Image.new("P", (16, 16)), Image.new("CMYK", (16, 16), (0, 50, 90, 10)),
              Image.new("LA", (16, 16), (90, 30)), Image.new("1", (16, 16), 1),
              Image.fromarray(rng.normal(size=(16, 16)).astype(np.float32), mode="F")]
    images[1].info["transparency"] = 0
    for i, im in enumerate(images):
        for view in ("clean", "cluttered"):
            (root / view / f"s{i:02d}.png").unlink()
            im.save(root / view / f"s{i:02d}.tiff")
    (root / "labels.csv").unlink()
    return SCORE


def _symlink_loop(ws):
    root = ws.data()
    (root / "clean" / "s00.png").unlink()
    os.symlink("s00.png", root / "clean" / "s00.png")  # points at itself
    return SCORE


def _folder_loop(ws):
    root = ws.data(labels=None)
    os.symlink("..", root / "clean" / "up")  # a folder that contains itself
    return SCORE


def _labels(text):
    return lambda ws: (ws.data(labels=text), SCORE)[1]


_ROWS = "".join(f"s{i:02d}.png,{'ab'[i % 2]},{i}\n" for i in range(12))

LABEL_CASES = [
    Case("labels-duplicated-header", _labels("file,part,part\n" + _ROWS), 1, r"column 'part' appears more than once"),
    Case("labels-not-utf8", lambda ws: (ws.data(labels=None), ws.bytes("data/labels.csv", b"file,p\n\xff\xfe,1\n"),
                                        SCORE)[2], 1, r"labels.csv is not UTF-8"),
    Case("labels-nul-bytes", _labels("file,part\n\0\0\0,a\n"), 1, r"labels.csv"),
    Case("labels-field-over-csv-limit", _labels("file,part\n" + "s00.png," + "x" * 200_000 + "\n"), 1,
         r"cannot read .*labels.csv"),
    Case("labels-ragged-row", _labels("file,part,y\n" + _ROWS + "s00.png,a\n"), 1, r"line 14 has 2 fields"),
    Case("labels-missing-rows", _labels("file,part\ns00.png,a\n"), 1, r"has no row for 11 pairs"),
    Case("labels-duplicate-rows", _labels("file,part,y\n" + _ROWS + "s00.png,a,1\n"), 1, r"names 1 files twice"),
    Case("labels-typo-in-numbers", _labels("file,y\n" + "".join(f"s{i:02d}.png,{i}\n" for i in range(11))
                                           + "s11.png,eleven\n"), 1, r"line 13, column 'y': 'eleven' is not"),
    Case("labels-infinite-number", _labels("file,y\n" + "".join(f"s{i:02d}.png,{i}\n" for i in range(11))
                                           + "s11.png,1e400\n"), 1, r"is not a finite number"),
    Case("labels-header-only", _labels("file\n"), 1, r"has no label columns"),
    Case("labels-empty-file", _labels(""), 1, r"labels.csv is empty"),
    Case("labels-identifier-column", _labels("file,part,id\n" + "".join(f"s{i:02d}.png,{'ab'[i % 2]},id{i}\n"
                                                                      for i in range(12))), 0,
         r"^warning: .*column 'id' is not probed"),
    Case("labels-escape-codes-in-column-name", _labels("file,\x1b[2Jpart\n" + "".join(
        f"s{i:02d}.png,{'ab'[i % 2]}\n" for i in range(12))), 0, r"^probe \\x1b\[2Jpart"),
]

IMAGE_CASES = [
    Case("image-zero-bytes", lambda ws: (_in_data(ws, "clean/s03.png", b""), SCORE)[1], 1,
         r"cannot read image .*s03.png"),
    Case("image-truncated", lambda ws: (_in_data(ws, "cluttered/s04.png", _png_bytes(noise=True)[:400]), SCORE)[1], 1,
         r"cannot read image .*s04.png"),
    Case("image-not-an-image", lambda ws: (_in_data(ws, "clean/s05.png", b"<html>hello</html>" * 9), SCORE)[1], 1,
         r"cannot read image .*s05.png"),
    Case("image-decompression-bomb", lambda ws: (_in_data(ws, "clean/s06.png", _bomb_png()), SCORE)[1], 1,
         r"s06.png has more pixels than the safety limit"),
    Case("image-1x10000-strip", lambda ws: (_in_data(ws, "clean/s07.png", _png_bytes((10_000, 1))),
                                            ["score", "data", "--encoder", ENCODER, "--quiet", "--no-cache"])[1], 1,
         r"s07.png is 10000 x 1 px: .*aspect ratio"),
    Case("image-odd-modes", _odd_modes, 0, r"domain classifier"),
    Case("image-symlink-loop", _symlink_loop, 1, r"have no partner: cluttered/s00.png"),
    Case("folder-symlink-loop", _folder_loop, 0, r"domain classifier"),
    Case("image-folder-named-png", lambda ws: ((ws.data() / "clean" / "dir.png").mkdir(), SCORE)[1], 0,
         r"domain classifier"),
]

FOLDER_CASES = [
    Case("data-missing", lambda ws: SCORE, 1, r"data folder not found: data"),
    Case("data-is-a-file", lambda ws: (ws.text("data", "x"), SCORE)[1], 1, r"data is not a folder or a manifest"),
    Case("data-without-cluttered", lambda ws: ((ws / "data" / "clean").mkdir(parents=True), SCORE)[1], 1,
         r"cluttered is missing"),
    Case("data-without-images", lambda ws: ([(ws / "data" / v).mkdir(parents=True) for v in ("clean", "cluttered")],
                                            SCORE)[1], 1, r"no images in"),
    Case("data-unpaired", lambda ws: ((ws.data() / "clean" / "s00.png").unlink(), SCORE)[1], 1,
         r"1 images in data have no partner"),
    Case("data-too-few-pairs", lambda ws: (ws.data(n=4, labels=None), SCORE)[1], 1, r"4 pairs|at least 10"),
    Case("manifest-without-columns", lambda ws: (ws.text("m.csv", "a,b\nx,y\n"),
                                                 ["score", "m.csv", "--encoder", ENCODER, *FAST])[1], 1,
         r"m.csv has no 'clean' column"),
    Case("manifest-missing-files", lambda ws: (ws.text("m.csv", "clean,cluttered\n/nowhere/a.png,b.png\n"),
                                               ["score", "m.csv", "--encoder", ENCODER, *FAST])[1], 1,
         r"2 files named in m.csv do not exist"),
    Case("manifest-without-rows", lambda ws: (ws.text("m.csv", "clean,cluttered\n"),
                                              ["score", "m.csv", "--encoder", ENCODER, *FAST])[1], 1,
         r"m.csv lists no pairs"),
]


def _filled_meanwhile(ws):
    """A second run fills the output folder while this one is writing."""
    from invariance.scenes import writer

    real = writer._png_bytes

    def contested(arr):
        (ws / "out").mkdir(exist_ok=True)
        (ws / "out" / "theirs.txt").write_text("another run")
        return real(arr)

    ws.monkeypatch.setattr(writer, "_png_bytes", contested)
    return ["scenes", ws / "out", "--pairs", "2", "--size", "32", "--quiet"]


def _interrupted_scenes(ws):
    from invariance.scenes import writer

    def stop(*args, **kwargs):
        raise KeyboardInterrupt

    ws.monkeypatch.setattr(writer, "render_pair", stop)
    return ["scenes", ws / "out", "--pairs", "3", "--size", "32", "--quiet"]


SCENES = ["--pairs", "2", "--size", "32", "--quiet"]

SCENES_CASES = [
    Case("scenes-under-a-file", lambda ws: (ws.text("f", "x"), ["scenes", ws / "f" / "out", *SCENES])[1], 1,
         r"f is a file, not a folder"),
    Case("scenes-into-a-file", lambda ws: (ws.text("f", "x"), ["scenes", ws / "f", *SCENES])[1], 2,
         r"OUT_DIR.* is a file"),
    Case("scenes-into-a-full-folder", lambda ws: (ws.text("out/mine.txt", "x"), ["scenes", ws / "out", *SCENES])[1], 1,
         r"output folder .*out is not empty"),
    Case("scenes-disk-full", lambda ws: (ws.no_space(), ["scenes", ws / "out", *SCENES])[1], 1,
         r"cannot write .*out \(No space left on device\)"),
    Case("scenes-contested-by-a-second-run", _filled_meanwhile, 1, r"out was filled by something else",
         appears=("out/theirs.txt",)),
    Case("scenes-ctrl-c", _interrupted_scenes, 130, r"^interrupted; nothing was written half-way"),
    Case("scenes-unknown-factor", lambda ws: ["scenes", ws / "out", "--factors", "smoke"], 2,
         r"--factors.*unknown clutter factor 'smoke'"),
    Case("scenes-no-factor", lambda ws: ["scenes", ws / "out", "--factors", ","], 2, r"--factors.*factors is empty"),
    Case("scenes-negative-seed", lambda ws: ["scenes", ws / "out", "--seed", "-1"], 2, r"--seed"),
    Case("scenes-tiny-size", lambda ws: ["scenes", ws / "out", "--size", "8"], 2, r"--size"),
    Case("scenes-level-9", lambda ws: ["scenes", ws / "out", "--level", "9"], 2, r"--level"),
    Case("scenes-zero-pairs", lambda ws: ["scenes", ws / "out", "--pairs", "0"], 2, r"--pairs"),
    Case("scenes-escape-codes-in-name", lambda ws: ["scenes", ws / "o\x1b]0;owned\x07", *SCENES], 0,
         r"wrote 2 pairs to .*o\\x1b\]0;owned\\x07"),
]

DEMO_CASES = [
    Case("demo-under-a-file", lambda ws: (ws.text("f", "x"), ["demo", "--out", ws / "f" / "d", "--quiet"])[1], 1,
         r"cannot make the demo folder"),
    Case("demo-into-a-file", lambda ws: (ws.text("f", "x"), ["demo", "--out", ws / "f", "--quiet"])[1], 2,
         r"--out.* is a file"),
]

ALIGN = ["--quiet", "--no-cache", "--permutations", "20", "--image-size", "16", "--steps", "2"]

ALIGN_CASES = [
    Case("align-data-missing", lambda ws: ["align", ws / "data", "--encoder", ENCODER, "--out", ws / "a.pt", *ALIGN], 1,
         r"data folder not found"),
    Case("align-too-few-pairs", lambda ws: (ws.data(), ["align", ws / "data", "--encoder", ENCODER, "--out",
                                                        ws / "a.pt", *ALIGN])[1], 1, r"needs at least \d+ pairs"),
    Case("align-held-out-out-of-range", lambda ws: ["align", "d", "--encoder", ENCODER, "--out", "a.pt",
                                                    "--held-out", "0.95"], 2, r"--held-out 0.95 is not valid"),
    Case("align-out-is-a-folder", lambda ws: ((ws / "a.pt").mkdir(), ["align", ws / "d", "--encoder", ENCODER, "--out",
                                                                     ws / "a.pt", *ALIGN])[1], 2,
         r"--out.* is a directory"),
    Case("align-out-under-a-file", lambda ws: (ws.text("f", "x"), ["align", ws / "d", "--encoder", ENCODER, "--out",
                                                                   ws / "f" / "a.pt", *ALIGN])[1], 1,
         r"is not a folder"),
    Case("align-out-is-its-weights", lambda ws: (ws.bytes("w.pt", b"weights"),
                                                 ["align", ws / "d", "--encoder", "torchvision:resnet18", "--weights",
                                                  ws / "w.pt", "--out", ws / "w.pt", *ALIGN])[1], 1,
         r"is read by this run"),
    Case("align-out-disk-full", lambda ws: (ws.data(n=40), ws.no_space(),
                                            ["align", ws / "data", "--encoder", ENCODER, "--out", ws / "a.pt",
                                             *ALIGN])[2], 1, r"cannot write .*a.pt.*No space left on device"),
]

EXPLAIN = ["--encoder", ENCODER, "--quiet", "--image-size", "16"]

EXPLAIN_CASES = [
    Case("explain-pair-not-in-the-set", lambda ws: ["explain", ws.data(), "--pair", "nope.png", "--out", ws / "maps",
                                                     *EXPLAIN], 1, r"pair 'nope.png' is not in the data set .* \(12 pairs\)"),
    Case("explain-patch-larger-than-the-image", lambda ws: ["explain", ws.data(), "--pair", "s00.png", "--patch", "64",
                                                             "--out", ws / "maps", *EXPLAIN], 1,
         r"pair s00.png: the image is 16 x 16 px, smaller than the 64 px patch; pass a patch of at most 16 px"),
    Case("explain-pair-and-worst-together", lambda ws: ["explain", ws.data(), "--pair", "s00.png", "--worst", "2",
                                                         "--out", ws / "maps", *EXPLAIN], 2, r"give --pair NAME or --worst K, not both"),
    Case("explain-out-under-a-file", lambda ws: (ws.text("f", "x"), ["explain", ws.data(), "--pair", "s00.png",
                                                                     "--out", ws / "f" / "maps", *EXPLAIN])[1], 1,
         r"explain.json: .*f is not a folder; choose an output path inside a writable folder"),
]

CASES = LABEL_CASES + IMAGE_CASES + FOLDER_CASES + SCENES_CASES + DEMO_CASES + ALIGN_CASES + EXPLAIN_CASES


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_hostile_data_and_folders(case, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)  # relative paths in the cases land in the workspace
    run_case(case, tmp_path, monkeypatch)
