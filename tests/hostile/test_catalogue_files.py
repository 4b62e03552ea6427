"""Hostile-input catalogue, part 2: files read as data, and outputs that cannot be written.

Feature matrices, result JSON, encoder lists, checkpoints, weight files and encoder code,
through ``score``, ``report``, ``compare`` and ``layers``; full disks and failing renders
on every output. What each case checks is in ``hostile_workspace.py``.
"""

from __future__ import annotations

import hashlib
import json
import os

import numpy as np
import pytest
import torch

from hostile_workspace import ENCODER, FAST, Case, run_case
from invariance.errors import InvarianceError

# --------------------------------------------------------------------------- feature files


def _feat(ws, clean=None, cluttered=None):
    a, b = ws.features()
    if clean is not None:
        np.save(a, clean) if isinstance(clean, np.ndarray) else a.write_bytes(clean)
    if cluttered is not None:
        np.save(b, cluttered)
    return ["score", "--features", a, b, "--permutations", "20", "--quiet"]


def _feat_with_labels(ws, text):
    args = _feat(ws)
    ws.text("labels.csv", text)
    return [*args, "--labels", ws / "labels.csv"]


def _npy_claiming(shape) -> bytes:
    """A .npy header promising ``shape`` float64 values, followed by none (NumPy format spec)."""
    header = f"{{'descr': '<f8', 'fortran_order': False, 'shape': {shape}, }}".ljust(117) + "\n"
    return b"\x93NUMPY\x01\x00" + len(header).to_bytes(2, "little") + header.encode()


FEATURE_CASES = [
    Case("features-missing", lambda ws: ["score", "--features", "no.npy", "no.npy"], 1, r"no.npy: no such file"),
    Case("features-text-file", lambda ws: _feat(ws, clean=b"1,2,3\n4,5,6\n"), 1, r"not a readable numeric .npy"),
    Case("features-pickled-objects", lambda ws: _feat(ws, clean=np.array([{"a": 1}] * 30, dtype=object)), 1,
         r"holds Python objects, which are never loaded"),
    Case("features-header-claims-terabytes", lambda ws: _feat(ws, clean=_npy_claiming((10**7, 10**5))), 1,
         r"clean.npy"),
    Case("features-zero-columns", lambda ws: _feat(ws, clean=np.zeros((30, 0)), cluttered=np.zeros((30, 0))), 1,
         r"clean.npy|0 columns|dimension"),
    Case("features-shapes-differ", lambda ws: _feat(ws, cluttered=np.zeros((29, 6))), 1, r"has shape .* but"),
    Case("features-one-dimensional", lambda ws: _feat(ws, clean=np.zeros(30)), 1, r"expected a 2-D array"),
    Case("features-nan-rows", lambda ws: _feat(ws, clean=np.full((30, 6), np.nan)), 1, r"rows contain NaN or inf"),
    Case("features-near-1e200", lambda ws: _feat(ws, clean=np.full((30, 6), 1e200)), 1, r"clean.npy|1e\+?200|large"),
    Case("features-strings", lambda ws: _feat(ws, clean=np.array([["a"] * 6] * 30)), 1, r"expected numbers"),
    Case("features-labels-row-count", lambda ws: _feat_with_labels(ws, "file,y\na,1\n"), 1,
         r"labels.csv has 1 rows but the feature files have 30"),
    Case("features-labels-near-1e300", lambda ws: _feat_with_labels(ws, "file,y\n" + "".join(
        f"s{i},{1e300 * (i + 1)}\n" for i in range(30))), 0, r"^probe y"),
    Case("features-and-data-together", lambda ws: ["score", "data", "--features", "a.npy", "b.npy"], 2,
         r"--features replaces DATA"),
    Case("gate-threshold-nan", lambda ws: [*_feat(ws), "--max-domain-accuracy", "nan"], 2, r"--max-domain-accuracy"),
    Case("permutations-zero", lambda ws: [*_feat(ws), "--permutations", "0"], 2, r"--permutations 0 is not valid"),
]

# --------------------------------------------------------------------------- outputs


def _render_fails(ws):
    import invariance.report

    def broken(*args, **kwargs):
        raise InvarianceError("the report could not be drawn (injected)")

    ws.monkeypatch.setattr(invariance.report, "render_report", broken)
    return [*_feat(ws), "--json", ws / "r.json", "--report", ws / "r.html"]


def _interrupted_score(ws):
    from invariance import pipeline

    def stop(*args, **kwargs):
        raise KeyboardInterrupt

    ws.monkeypatch.setattr(pipeline, "score_feature_arrays", stop)
    return [*_feat(ws), "--json", ws / "r.json"]


def _full_cache(ws):
    ws.data()
    ws.no_space(only=lambda name: "cache" in name)
    return ["score", "data", "--encoder", ENCODER, "--quiet", "--permutations", "20", "--image-size", "16",
            "--cache-dir", ws / "cache", "--json", ws / "r.json"]


def _json_written(ws):
    assert json.loads((ws / "r.json").read_text())["schema"] == "invariance.result/1"


def _no_space_on(suffix):
    return lambda ws: (ws.no_space(only=lambda name: suffix in name),
                       [*_feat(ws), "--json", ws / "r.json", "--report", ws / "r.html", "--drift-csv", ws / "d.csv"])[1]


OUTPUT_CASES = [
    Case("json-disk-full", lambda ws: (ws.no_space(), [*_feat(ws), "--json", ws / "r.json"])[1], 1,
         r"cannot write .*r.json \(No space left on device\)"),
    Case("report-disk-full-json-not-kept", _no_space_on(".r.html."), 1, r"cannot write .*r.html"),
    Case("drift-csv-disk-full-nothing-kept", _no_space_on(".d.csv."), 1, r"cannot write .*d.csv"),
    Case("report-fails-after-rendering-json", _render_fails, 1, r"could not be drawn"),
    Case("json-is-a-folder", lambda ws: ((ws / "r.json").mkdir(), [*_feat(ws), "--json", ws / "r.json"])[1], 2,
         r"--json.* is a directory"),
    Case("json-under-a-file", lambda ws: (ws.text("f", "x"), [*_feat(ws), "--json", ws / "f" / "r.json"])[1], 1,
         r"is not a folder"),
    Case("json-is-the-report", lambda ws: [*_feat(ws), "--json", ws / "r.x", "--report", ws / "r.x"], 1,
         r"would write this file"),
    Case("json-is-the-labels", lambda ws: [*_feat_with_labels(ws, "file,y\n" + "".join(f"s{i},{i}\n"
                                                                                      for i in range(30))),
                                           "--json", ws / "labels.csv"], 1, r"is read by this run"),
    Case("report-is-a-feature-file", lambda ws: [*_feat(ws), "--report", ws / "clean.npy"], 1, r"is read by this run"),
    Case("json-to-dev-null", lambda ws: [*_feat(ws), "--json", os.devnull], 0, r"result JSON: /dev/null"),
    Case("score-ctrl-c", _interrupted_score, 130, r"^interrupted"),
    Case("feature-cache-volume-full", _full_cache, 0, r"^warning: feature cache .*cache cannot be written "
                                                      r"\(No space left on device\)", after=_json_written),
    Case("data-score-json-disk-full", lambda ws: (ws.data(), ws.no_space(),
                                                  ["score", "data", "--encoder", ENCODER, *FAST, "--json",
                                                   ws / "r.json"])[2], 1, r"cannot write .*r.json"),
]

# --------------------------------------------------------------------------- result files and report


def _result(**changes):
    from report_fixtures import make_result

    result = make_result(seed=0, name="Bench net", spec="python:bench:net", with_layers=False,
                         with_breakdowns=False)
    for path, value in changes.items():
        *keys, last = path.split(".")
        target = result
        for key in keys:
            target = target[int(key)] if isinstance(target, list) else target[key]
        target[last] = value
    return result


def _report_of(text: str | bytes):
    def build(ws):
        (ws.bytes if isinstance(text, bytes) else ws.text)("in.json", text)
        return ["report", ws / "in.json", "--out", ws / "r.html"]
    return build


def _report_of_result(**changes):
    return lambda ws: _report_of(json.dumps(_result(**changes)))(ws)


def _escaped_names(ws):
    return _report_of(json.dumps(_result(**{"encoder.name": "<script>alert(1)</script>\x1b]0;x\x07",
                                            "dataset.path": "../../../etc",
                                            "pairs.0.name": "../../../../etc/passwd"})))(ws)


def _page_is_inert(ws):
    page = (ws / "r.html").read_text()
    assert "<script>alert" not in page and "&lt;script&gt;alert" in page


def _too_big(ws):
    from invariance import results

    ws.monkeypatch.setattr(results, "MAX_RESULT_BYTES", 100)
    return _report_of_result()(ws)


REPORT_CASES = [
    Case("report-top-level-list", _report_of("[]"), 1, r"in.json: not an invariance result"),
    Case("report-top-level-string", _report_of('"invariance.result/1"'), 1, r"in.json: not an invariance result"),
    Case("report-top-level-null", _report_of("null"), 1, r"in.json: not an invariance result"),
    Case("report-5000-digit-integer", _report_of("9" * 5000), 1, r"in.json: not valid JSON \(a number has thousands"),
    Case("report-100000-nested-arrays", _report_of("[" * 100_000 + "]" * 100_000), 1,
         r"in.json: not valid JSON \(nested too deeply\)"),
    Case("report-nan-literal", _report_of(json.dumps(_result()).replace("0.0", "NaN", 1)), 1,
         r"NaN is not a JSON number"),
    Case("report-infinity-literal", _report_of('{"schema": Infinity}'), 1, r"Infinity is not a JSON number"),
    Case("report-1e400", _report_of(json.dumps(_result()).replace('"folds": 5', '"folds": 1e400')), 1,
         r"is inf, not finite"),
    Case("report-empty-file", _report_of(""), 1, r"in.json: not valid JSON"),
    Case("report-binary-file", _report_of(bytes(range(256)) * 4), 1, r"in.json: not valid JSON"),
    Case("report-latin1-file", _report_of('{"schema": "caf\xe9"}'.encode("latin-1")), 1, r"not valid JSON"),
    Case("report-missing-file", lambda ws: ["report", ws / "none.json", "--out", ws / "r.html"], 1,
         r"none.json: file not found"),
    Case("report-other-schema", _report_of('{"schema": "someone.else/2"}'), 1, r"schema 'someone.else/2'"),
    Case("report-warnings-a-string", _report_of_result(warnings="abc"), 1, r'"warnings" must be a list of sentences'),
    Case("report-warnings-numbers", _report_of_result(warnings=[1, 2]), 1, r'"warnings" must be a list'),
    Case("report-accuracy-1e300", _report_of_result(**{"metrics.domain_classifier.accuracy": 1e300}), 1,
         r"domain_classifier.accuracy is 1e\+300, outside \[0, 1\]"),
    Case("report-accuracy-negative", _report_of_result(**{"metrics.domain_classifier.accuracy": -0.5}), 1,
         r"accuracy is -0.5, outside"),
    Case("report-p-value-2", _report_of_result(**{"metrics.mmd.p_value": 2.0}), 1, r"mmd.p_value is 2"),
    Case("report-drift-negative", _report_of_result(**{"metrics.paired_drift.relative_drift": -1.0}), 1,
         r"relative_drift is -1"),
    Case("report-pair-drift-negative", _report_of_result(**{"pairs.0.drift": -3.0}), 1, r"pairs\[0\].drift is -3"),
    Case("report-probe-accuracy-5", _report_of_result(**{"metrics.probe.part.clean": 5.0}), 1,
         r"probe.part.clean is 5"),
    Case("report-comparison-results-not-a-list", _report_of('{"schema": "invariance.comparison/1", "results": 3}'), 1,
         r'"results" must be a list'),
    Case("report-comparison-warnings-a-string", lambda ws: _report_of(json.dumps(
        {"schema": "invariance.comparison/1", "results": [_result()], "warnings": "abc"}))(ws), 1,
         r'"warnings" must be a list'),
    Case("report-comparison-result-out-of-range", lambda ws: _report_of(json.dumps(
        {"schema": "invariance.comparison/1", "results": [_result(**{"metrics.domain_classifier.accuracy": 2})]}))(ws),
         1, r"\(result 1\): metrics.domain_classifier.accuracy is 2"),
    Case("report-file-too-big", _too_big, 1, r"bytes is more than a result file holds"),
    Case("report-out-is-its-input", lambda ws: (_report_of_result()(ws),
                                                ["report", ws / "in.json", "--out", ws / "in.json"])[1], 1,
         r"is read by this run"),
    Case("report-out-disk-full", lambda ws: (ws.no_space(), _report_of_result()(ws))[1], 1,
         r"cannot write .*r.html \(No space left"),
    Case("report-hostile-names", _escaped_names, 0, r"^report: ", after=_page_is_inert),
]

# --------------------------------------------------------------------------- encoder lists


def _compare_with(text: str | bytes):
    def build(ws):
        ws.data()
        (ws.bytes if isinstance(text, bytes) else ws.text)("enc.toml", text)
        return ["compare", "data", "--encoders", ws / "enc.toml", *FAST]
    return build


_ONE = f'[[encoder]]\nspec = "{ENCODER}"\n'

TOML_CASES = [
    Case("toml-binary", _compare_with(bytes(range(256))), 1, r"enc.toml is not valid TOML"),
    Case("toml-latin1", _compare_with(_ONE.replace("python", "pyth\xf6n").encode("latin-1")), 1, r"not valid TOML"),
    Case("toml-layers-a-number", _compare_with(_ONE + "layers = 5\n"), 1, r"layers = 5 is not a list of node names"),
    Case("toml-image-size-100000", _compare_with(_ONE + "image_size = 100000\n"), 1,
         r"image_size=100000 is not valid"),
    Case("toml-image-size-true", _compare_with(_ONE + "image_size = true\n"), 1, r"image_size = True is not"),
    Case("toml-weights-a-number", _compare_with(_ONE + "weights = 5\n"), 1, r"weights = 5 is not a path"),
    Case("toml-name-a-list", _compare_with(_ONE + "name = []\n"), 1, r"name = \[\] is not a string"),
    Case("toml-no-tables", _compare_with("title = 'x'\n"), 1, r"lists no \[\[encoder\]\] tables"),
    Case("toml-encoder-a-string", _compare_with("encoder = 'x'\n"), 1, r"lists no \[\[encoder\]\] tables"),
    Case("toml-unknown-key", _compare_with(_ONE + "colour = 'red'\n"), 1, r"unknown keys \['colour'\]"),
    Case("toml-deeply-nested", _compare_with("x = " + "[" * 50_000 + "]" * 50_000 + "\n"), 1, r"not valid TOML"),
    Case("toml-over-a-mebibyte", _compare_with(_ONE + "# " + "x" * 2**20 + "\n"), 1, r"larger than 1,048,576 bytes"),
    Case("toml-missing", lambda ws: (ws.data(), ["compare", "data", "--encoders", ws / "none.toml"])[1], 1,
         r"cannot read .*none.toml"),
    Case("compare-without-encoders", lambda ws: (ws.data(), ["compare", "data"])[1], 2, r"give at least one"),
    Case("compare-every-encoder-fails", lambda ws: (ws.data(), ["compare", "data", "--encoder", "torchvision:nope_net",
                                                                *FAST])[1], 1, r"every encoder failed"),
    Case("compare-json-disk-full", lambda ws: (ws.no_space(), _compare_with(_ONE)(ws) + ["--json", ws / "c.json"])[1],
         1, r"cannot write .*c.json"),
]

# --------------------------------------------------------------------------- checkpoints, weights, code


def _checkpoint(ws, **changes):
    """A real checkpoint of the workbench CNN with ``changes`` made to its stored dict."""
    from invariance.encoders import load_encoder, save_checkpoint

    enc = load_encoder(ENCODER, device="cpu")
    path = save_checkpoint(ws / "c.pt", encoder=enc, module=enc.module, metadata={})
    stored = torch.load(path, weights_only=True)
    for key, value in changes.items():
        if value is _DROP:
            del stored[key]
        else:
            stored[key] = value(stored) if callable(value) else value
    torch.save(stored, path)
    return ["layers", "--encoder", f"checkpoint:{path}"]


_DROP = object()


class _WritesMarker:
    """Unpickling it writes a file: it stands for a pickle that runs arbitrary code."""

    def __init__(self, path):
        self.path = str(path)

    def __reduce__(self):
        return (os.mkdir, (self.path,))


def _weights(ws, payload):
    torch.save(payload, ws / "w.pt")
    return ["layers", "--encoder", "torchvision:resnet18", "--weights", ws / "w.pt"]


def _planted_hub_file(ws, *, honest_name):
    """A pickle planted in the torch hub cache under the published file name (torch.hub.HASH_REGEX)."""
    from invariance.encoders import loaders

    folder = ws / "torch" / "hub" / "checkpoints"
    folder.mkdir(parents=True)
    torch.save({"conv1.weight": torch.zeros(1), "x": _WritesMarker(ws.marker)}, folder / "staged")
    prefix = hashlib.sha256((folder / "staged").read_bytes()).hexdigest()[:8] if honest_name else "f37072fd"
    path = folder / f"resnet18-{prefix}.pth"
    (folder / "staged").rename(path)
    ws.monkeypatch.setattr(loaders, "_hub_file", lambda enum: path)
    return ["layers", "--encoder", "torchvision:resnet18@IMAGENET1K_V1"]


def _user_code(ws, body):
    ws.text("user_net.py", "import sys\nimport torch\n\n" + body)
    return ["layers", "--encoder", f"python:{ws / 'user_net.py'}:build"]


def _with_preprocess(value):
    return (f"def build():\n    model = torch.nn.Conv2d(3, 4, 3)\n    model.invariance_preprocess = {value!r}\n"
            "    return model\n")


CHECKPOINT_CASES = [
    Case("checkpoint-pickled-code", lambda ws: _checkpoint(ws, extra=_WritesMarker(ws.marker)), 1,
         r"holds a pickled (posix|nt)\.mkdir.*never unpickles"),
    Case("checkpoint-naming-planted-code", lambda ws: _checkpoint(
        ws, source_spec=f"python:{ws.payload_module()}:build"), 1, r"would import and run .*payload.py"),
    Case("checkpoint-no-preprocess", lambda ws: _checkpoint(ws, preprocess=_DROP), 1,
         r"preprocess settings must have exactly the keys"),
    Case("checkpoint-unknown-preprocess-key", lambda ws: _checkpoint(
        ws, preprocess=lambda s: {**s["preprocess"], "gamma": 2.2}), 1, r"got \['crop', 'gamma'"),
    Case("checkpoint-preprocess-100000-px", lambda ws: _checkpoint(
        ws, preprocess=lambda s: {**s["preprocess"], "resize": 100_000, "crop": 100_000}), 1,
         r"resize must be a whole number of pixels from 1 to 2048"),
    Case("checkpoint-state-dict-a-list", lambda ws: _checkpoint(ws, state_dict=[torch.zeros(1)]), 1,
         r"no state_dict of named tensors \(found list\)"),
    Case("checkpoint-no-state-dict", lambda ws: _checkpoint(ws, state_dict=_DROP), 1,
         r"no state_dict of named tensors \(found none\)"),
    Case("checkpoint-wrong-shapes", lambda ws: _checkpoint(
        ws, state_dict=lambda s: {k: torch.zeros(2) for k in s["state_dict"]}), 1, r"shape mismatch"),
    Case("checkpoint-other-format", lambda ws: _checkpoint(ws, format="someone.else/1"), 1,
         r"is not an invariance checkpoint"),
    Case("checkpoint-random-bytes", lambda ws: (ws.bytes("c.pt", os.urandom(4096)),
                                                ["layers", "--encoder", f"checkpoint:{ws / 'c.pt'}"])[1], 1,
         r"cannot read checkpoint"),
    Case("checkpoint-zero-bytes", lambda ws: (ws.bytes("c.pt", b""), ["layers", "--encoder",
                                                                       f"checkpoint:{ws / 'c.pt'}"])[1], 1,
         r"cannot read checkpoint"),
    Case("checkpoint-missing", lambda ws: ["layers", "--encoder", "checkpoint:none.pt"], 1, r"file not found"),
    Case("weights-pickled-code", lambda ws: _weights(ws, {"conv1.weight": _WritesMarker(ws.marker)}), 1,
         r"never unpickles"),
    Case("weights-garbage", lambda ws: (ws.bytes("w.pt", b"PK\x03\x04garbage"), ["layers", "--encoder",
                                        "torchvision:resnet18", "--weights", ws / "w.pt"])[1], 1,
         r"cannot read weights file"),
    Case("weights-a-list", lambda ws: _weights(ws, [torch.zeros(1)]), 1, r"holds no state_dict of tensors"),
    Case("weights-number-keys", lambda ws: _weights(ws, {1: torch.zeros(1)}), 1, r"holds no state_dict of tensors"),
    Case("weights-for-python-code", lambda ws: (ws.bytes("w.pt", b"x"), ["layers", "--encoder", ENCODER,
                                                                          "--weights", ws / "w.pt"])[1], 2,
         r"only applies to torchvision"),
    Case("hub-file-planted-under-a-false-name", lambda ws: _planted_hub_file(ws, honest_name=False), 1,
         r"SHA-256 starts .* not f37072fd.*planted"),
    Case("hub-file-with-pickled-code", lambda ws: _planted_hub_file(ws, honest_name=True), 1, r"never unpickles"),
    Case("code-that-exits", lambda ws: _user_code(ws, "def build():\n    sys.exit(0)\n"), 1, r"raised SystemExit"),
    Case("code-preprocess-100000-px", lambda ws: _user_code(ws, _with_preprocess({"image_size": 100_000})), 1,
         r"user_net.py:build: preprocess resize must be a whole number of pixels from 1 to 2048"),
    Case("code-preprocess-a-string", lambda ws: _user_code(ws, _with_preprocess("big")), 1,
         r"invariance_preprocess must be a dict"),
    Case("code-preprocess-mean-a-number", lambda ws: _user_code(ws, _with_preprocess({"mean": 5})), 1,
         r"mean must be 3 numbers"),
    Case("code-file-missing", lambda ws: ["layers", "--encoder", "python:none.py:build"], 1, r"file not found"),
    Case("torchscript-garbage", lambda ws: (ws.bytes("t.pt", os.urandom(512)),
                                            ["layers", "--encoder", f"torchscript:{ws / 't.pt'}"])[1], 1,
         r"cannot load TorchScript file"),
    Case("spec-of-unknown-form", lambda ws: ["layers", "--encoder", "pickle:evil.pkl"], 2, r"unknown form 'pickle'"),
    Case("spec-unknown-architecture", lambda ws: ["layers", "--encoder", "torchvision:resnet1800"], 1,
         r"unknown torchvision architecture 'resnet1800'; did you mean"),
    Case("image-size-zero", lambda ws: ["layers", "--encoder", ENCODER, "--image-size", "0"], 2, r"--image-size 0"),
    Case("image-size-100000", lambda ws: ["layers", "--encoder", ENCODER, "--image-size", "100000"], 2,
         r"--image-size 100000"),
    Case("score-spec-of-unknown-form", lambda ws: ["score", "data", "--encoder", "nope"], 2, r"--encoder"),
]

CASES = FEATURE_CASES + OUTPUT_CASES + REPORT_CASES + TOML_CASES + CHECKPOINT_CASES


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_hostile_files_and_outputs(case, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)  # relative paths in the cases land in the workspace
    monkeypatch.setenv("TORCH_HOME", str(tmp_path / "torch"))
    run_case(case, tmp_path, monkeypatch)
