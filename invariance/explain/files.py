"""What ``invariance explain`` writes: per pair a PNG figure and the raw map, plus a summary JSON."""

from __future__ import annotations

import io
import re
from pathlib import Path

import numpy as np

from ..data import load_rgb
from ..errors import InvarianceError
from .overlay import figure_png

SCHEMA = "invariance.explain/1"
SUMMARY_FILE = "explain.json"
_UNSAFE = re.compile(r"[^A-Za-z0-9._-]+")


def _stem(rank: int, name: str) -> str:
    """``01_scene_00012``: the rank keeps files in order and distinct; the name stays readable."""
    base = _UNSAFE.sub("_", Path(name).with_suffix("").as_posix().replace("/", "__")).strip("._") or "pair"
    return f"{rank:02d}_{base[:80]}"


def _npy_bytes(arr: np.ndarray) -> bytes:
    buf = io.BytesIO()
    np.save(buf, np.asarray(arr, dtype=np.float32), allow_pickle=False)
    return buf.getvalue()


def _title(entry: dict) -> str:
    parts = [entry["name"], f"drift 1 - cos = {entry['drift']:.3f}"]
    if entry["relative_drift"] is not None:
        parts.append(f"relative drift {entry['relative_drift']:.2f}")
    if entry["shares"]:
        parts.append("positive mass on " + ", ".join(
            f"{k} {v:.0%}" for k, v in entry["shares"].items() if v is not None and k != "target"))
    return "; ".join(parts)


def _summary_entry(entry: dict, stem: str) -> dict:
    positive = float(np.maximum(entry["map"], 0.0).sum())
    return {
        "name": entry["name"],
        "relative_drift": entry["relative_drift"],
        "cosine_drift": entry["drift"],
        "map_sum": float(entry["map"].sum()),
        "positive_mass": positive,
        "forward_images": entry["forward_images"],
        "patch": entry.get("patch"),
        "shares": entry["shares"],
        "figure": f"{stem}.png",
        "map": f"{stem}.npy",
    }


def _mean_shares(entries) -> dict | None:
    """Per mask, the mean share over the pairs where that factor is on (``None`` without masks)."""
    shares = [e["shares"] for e in entries if e["shares"]]
    if not shares:
        return None
    out = {}
    for name in shares[0]:
        values = [s[name] for s in shares if s[name] is not None]
        out[name] = {"mean": float(np.mean(values)) if values else None, "pairs": len(values)}
    return out


def explain_outputs(explained: dict, pairs, out_dir, *, encoder: dict) -> list[tuple[Path, bytes]]:
    """Every file of one ``explain`` run, rendered in memory (write them with ``write_outputs_together``).

    Parameters
    ----------
    explained : dict
        From :func:`~invariance.explain.explain_pairs`.
    pairs : invariance.data.PairSet
        The set the pairs came from (their images are drawn in the figures).
    out_dir : path-like
    encoder : dict
        The encoder's description (``Encoder.describe()``).

    Returns
    -------
    list of (Path, bytes)
        ``NN_<name>.png`` (clean, cluttered, map over the cluttered view), ``NN_<name>.npy``
        (the map, float32 (H, W), pixel rows and columns as in the image) per pair, and
        ``explain.json``.
    """
    from .._io import dumps_json

    out_dir = Path(out_dir)
    files, entries = [], []
    for rank, entry in enumerate(explained["pairs"], start=1):
        stem = _stem(rank, entry["name"])
        i = entry["index"]
        png = figure_png(load_rgb(pairs.clean[i]), load_rgb(pairs.cluttered[i]), entry, title=_title(entry))
        files += [(out_dir / f"{stem}.png", png), (out_dir / f"{stem}.npy", _npy_bytes(entry["map"]))]
        entries.append(_summary_entry(entry, stem))
    summary = {"schema": SCHEMA, "encoder": encoder, "dataset": pairs.describe(),
               "method": explained["method"], "patch": explained["patch"], "layer": explained["layer"],
               "scene_seed": explained["scene_seed"], "units": _UNITS[explained["method"]],
               "shares_mean": _mean_shares(entries), "pairs": entries}
    files.append((out_dir / SUMMARY_FILE, (dumps_json(summary) + "\n").encode("utf-8")))
    return files


def check_targets(files) -> None:
    """Refuse outputs that a folder stands in the way of, before any file is moved into place.

    ``write_outputs_together`` stages every file first, but a folder at a target path is
    only met when the files are renamed into place, after earlier ones already landed.
    """
    for path, _ in files:
        if Path(path).is_dir():
            raise InvarianceError(f"{path} is a folder; remove it or choose another --out folder")


_UNITS = {
    "occlusion": "map: drop in 1 - cos(feature, clean feature) when a patch of the clean view is restored, "
                 "shared evenly by the patch's pixels",
    "gradient": "map: gradient of 1 - cos(feature, clean feature) times (cluttered - clean), per pixel, "
                "a first-order estimate",
}
