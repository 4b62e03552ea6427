"""The jobs behind the commands, callable from Python: score a data set, compare encoders.

Each function returns a result dict in the ``invariance.result/1`` schema of DESIGN.md;
the command line only parses options, prints and writes files.
"""

from __future__ import annotations

import os
import platform
import sys
import time
from pathlib import Path
from typing import Sequence

import numpy as np

from . import __version__
from .errors import GateFailed, InvarianceError
from .results import RESULT_SCHEMA

DEFAULT_LAYER = "output"

# Gate name -> (path into the metrics object, how the value is read). A gate fails when
# the value is above its threshold.
GATES = {
    "max_domain_accuracy": ("domain_classifier", "accuracy"),
    "max_relative_drift": ("paired_drift", "relative_drift"),
    "max_probe_gap": ("probe", None),
}


def default_cache_dir() -> Path:
    """Feature cache folder: ``$INVARIANCE_CACHE`` or ``~/.cache/invariance/features``."""
    env = os.environ.get("INVARIANCE_CACHE")
    if env:
        return Path(env)
    return Path(os.environ.get("XDG_CACHE_HOME", Path.home() / ".cache")) / "invariance" / "features"


def environment_info(*, seed: int, device: str | None = None, command: str | None = None, timings=None) -> dict:
    """Versions, device, seed and timings, so a colleague can reproduce a result."""
    import scipy
    import sklearn

    info = {
        "invariance": __version__,
        "python": platform.python_version(),
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "scikit-learn": sklearn.__version__,
        "platform": platform.platform(),
        "seed": int(seed),
        "device": device or "cpu",
        "command": command if command is not None else " ".join(["invariance", *sys.argv[1:]]),
        "timings_s": {k: round(float(v), 3) for k, v in (timings or {}).items()},
    }
    try:
        import torch
        import torchvision

        info["torch"] = torch.__version__
        info["torchvision"] = torchvision.__version__
    except ImportError:  # the --features path needs no torch
        pass
    return info


def _scoring_kwargs(seed, permutations, folds, tsne=False):
    from .options import ScoringOptions

    return {"options": ScoringOptions(seed=seed, permutations=permutations, folds=folds, tsne=tsne)}


def _labels_of(pairs):
    if pairs.labels is None:
        return None, None
    return pairs.labels.tasks or None, pairs.labels.factors or None


def score_dataset(
    data,
    spec: str,
    *,
    weights=None,
    layers: Sequence[str] | None = None,
    name: str | None = None,
    seed: int = 0,
    permutations: int = 1000,
    folds: int = 5,
    image_size: int | None = None,
    device: str = "auto",
    cache_dir=None,
    batch_size: int = 32,
    skip_unpaired: bool = False,
    progress: bool = True,
    pairs=None,
    encoder=None,
    tsne: bool = False,
) -> dict:
    """Extract features of every pair with one encoder and score them.

    Parameters
    ----------
    data : str or Path
        Data set folder (``clean/``, ``cluttered/``, optional ``labels.csv``) or manifest CSV.
    spec : str
        Encoder spec (see :func:`invariance.encoders.load_encoder`).
    layers : list of str, optional
        Graph nodes to tap; the result's ``metrics`` are those of the last one given and
        ``layers`` holds every layer's metrics when more than one is given.

    Returns
    -------
    dict
        A result in the ``invariance.result/1`` schema.
    """
    from .data import discover_pairs

    timings = {}
    if pairs is None:
        pairs = discover_pairs(data, skip_unpaired=skip_unpaired)
    from .encoders import extract_features, load_encoder  # after the data checks: bad data fails fast

    if encoder is None:
        encoder = load_encoder(spec, weights=weights, device=device, image_size=image_size)
    layer_list = list(layers) if layers else [DEFAULT_LAYER]
    start = time.perf_counter()
    from .options import ExtractionOptions

    features = extract_features(
        pairs, encoder, layers=layer_list, options=ExtractionOptions(batch_size=batch_size, cache_dir=cache_dir),
        progress=progress,
    )
    timings["extract"] = time.perf_counter() - start
    start = time.perf_counter()
    result = _score_layers(features, layer_list, pairs, seed=seed, permutations=permutations, folds=folds, tsne=tsne)
    timings["score"] = time.perf_counter() - start
    result["encoder"] = {**encoder.describe(), "name": name or spec, "layer": layer_list[-1]}
    result["dataset"] = {**pairs.describe(), "content_hash": pairs.content_hash(), "image_size": _image_size(pairs)}
    result["environment"] = environment_info(seed=seed, device=str(encoder.device), timings=timings)
    return result


def _image_size(pairs):
    from PIL import Image

    try:
        with Image.open(pairs.clean[0]) as im:
            return list(im.size)
    except OSError:
        return None


def _score_layers(features: dict, layer_list, pairs, *, seed, permutations, folds, tsne=False) -> dict:
    from .scoring import score_features

    tasks, factors = _labels_of(pairs)
    per_layer = {}
    primary = None
    for layer in layer_list:
        clean, cluttered = features[layer]
        scored = score_features(
            clean, cluttered, tasks=tasks, factors=factors, names=list(pairs.names),
            **_scoring_kwargs(seed, permutations, folds, tsne and layer == layer_list[-1]),
        )
        per_layer[layer] = scored
        primary = scored
    result = {"schema": RESULT_SCHEMA, **primary}
    if len(layer_list) > 1:
        result["layers"] = {layer: s["metrics"] for layer, s in per_layer.items()}
    return result


def score_feature_arrays(
    clean: np.ndarray,
    cluttered: np.ndarray,
    *,
    tasks=None,
    factors=None,
    names=None,
    seed: int = 0,
    permutations: int = 1000,
    folds: int = 5,
    source: dict | None = None,
    tsne: bool = False,
) -> dict:
    """Score features computed anywhere (rows paired) into a result dict."""
    from .scoring import score_features

    start = time.perf_counter()
    scored = score_features(
        clean, cluttered, tasks=tasks, factors=factors, names=names,
        **_scoring_kwargs(seed, permutations, folds, tsne),
    )
    elapsed = time.perf_counter() - start
    source = source or {}
    return {
        "schema": RESULT_SCHEMA,
        **scored,
        "encoder": {"spec": source.get("spec", "features"), "name": source.get("name", "features"), "layer": DEFAULT_LAYER},
        "dataset": {"path": source.get("path"), "pairs": int(np.asarray(clean).shape[0])},
        "environment": environment_info(seed=seed, timings={"score": elapsed}),
    }


def probe_gap(metrics: dict) -> float | None:
    """The largest clean-minus-cluttered probe gap over labels, or None without probes."""
    gaps = [p["gap"] for p in metrics.get("probe", {}).values() if isinstance(p, dict) and "gap" in p]
    return max(gaps) if gaps else None


def evaluate_gates(result: dict, thresholds: dict) -> dict:
    """Compare the result's metrics against user-set thresholds (None = not set).

    Returns the ``gates`` object ``{name: {"threshold", "value", "passed"}}``; a gate whose
    metric is not computable fails, since nothing shows the encoder meets it.
    """
    metrics = result["metrics"]
    gates = {}
    for gate, threshold in thresholds.items():
        if threshold is None:
            continue
        group, key = GATES[gate]
        value = probe_gap(metrics) if key is None else metrics.get(group, {}).get(key)
        passed = value is not None and value <= threshold
        gates[gate] = {"threshold": float(threshold), "value": value, "passed": bool(passed)}
    return gates


def raise_for_gates(gates: dict) -> None:
    """Raise :class:`GateFailed` naming every gate that was not met."""
    failed = [
        f"{name} (value {g['value'] if g['value'] is None else round(g['value'], 4)} > {g['threshold']})"
        for name, g in gates.items()
        if not g["passed"]
    ]
    if failed:
        raise GateFailed("gate not met: " + "; ".join(failed))


def compare_encoders(
    data,
    encoders: Sequence[dict],
    *,
    seed: int = 0,
    permutations: int = 1000,
    folds: int = 5,
    image_size: int | None = None,
    device: str = "auto",
    cache_dir=None,
    batch_size: int = 32,
    skip_unpaired: bool = False,
    progress: bool = True,
    echo=None,
    tsne: bool = False,
) -> dict:
    """Score several encoders on the same pairs, folds and permutations.

    ``encoders`` is a list of dicts with ``spec`` and optional ``weights``, ``layers``,
    ``name``. An encoder that fails is recorded under ``failures`` with its message and
    the others are still scored.
    """
    from .data import discover_pairs

    pairs = discover_pairs(data, skip_unpaired=skip_unpaired)
    results, failures = [], []
    for entry in encoders:
        label = entry.get("name") or entry["spec"]
        if echo:
            echo(f"scoring {label} on {len(pairs)} pairs")
        try:
            results.append(
                score_dataset(
                    data, entry["spec"], weights=entry.get("weights"), layers=entry.get("layers"),
                    name=entry.get("name"), seed=seed, permutations=permutations, folds=folds,
                    image_size=entry.get("image_size", image_size), device=device, cache_dir=cache_dir,
                    batch_size=batch_size, progress=progress, pairs=pairs, tsne=tsne,
                )
            )
        except InvarianceError as exc:
            failures.append({"spec": entry["spec"], "name": label, "error": str(exc)})
            if echo:
                echo(f"  failed: {exc}")
    if not results:
        raise InvarianceError("every encoder failed: " + " | ".join(f"{f['name']}: {f['error']}" for f in failures))
    from .results import make_comparison

    return make_comparison(results, failures=failures)


def align_dataset(
    data,
    spec: str,
    *,
    out,
    weights=None,
    steps: int | None = None,
    minutes: float | None = None,
    train_from: str | None = None,
    held_out_fraction: float = 0.3,
    anchor_weight: float | None = None,
    paired_weight: float | None = None,
    mean_weight: float | None = None,
    task_weight: float | None = None,
    learning_rate: float | None = None,
    guard_margin: float | None = None,
    seed: int = 0,
    image_size: int | None = None,
    device: str = "auto",
    batch_size: int = 32,
    skip_unpaired: bool = False,
    permutations: int = 1000,
    progress: bool = True,
    pairs=None,
) -> dict:
    """Align an encoder on a data set and return a result whose ``metrics`` are the
    aligned encoder's on the held-out pairs, with ``alignment`` holding before/after.
    """
    from .data import discover_pairs

    if pairs is None:
        pairs = discover_pairs(data, skip_unpaired=skip_unpaired)
    from .align import align_encoder
    from .encoders import load_encoder

    encoder = load_encoder(spec, weights=weights, device=device, image_size=image_size)
    # Options left as None take the library's defaults (documented in align_encoder).
    optional = {"anchor_weight": anchor_weight, "paired_weight": paired_weight, "mean_weight": mean_weight,
                "minutes": minutes, "train_from": train_from, "steps": steps, "task_weight": task_weight,
                "learning_rate": learning_rate, "guard_margin": guard_margin}
    start = time.perf_counter()
    alignment = align_encoder(
        pairs, encoder, out=out, held_out_fraction=held_out_fraction, seed=seed,
        batch_size=batch_size, progress=progress, permutations=permutations,
        **{k: v for k, v in optional.items() if v is not None},
    )
    elapsed = time.perf_counter() - start
    return {
        "schema": RESULT_SCHEMA,
        "encoder": {**encoder.describe(), "name": f"{spec} aligned", "spec": f"checkpoint:{out}", "source_spec": spec,
                    "layer": DEFAULT_LAYER},
        "dataset": {**pairs.describe(), "content_hash": pairs.content_hash(), "image_size": _image_size(pairs)},
        "metrics": alignment["after"],
        "alignment": alignment,
        "environment": environment_info(seed=seed, device=str(encoder.device), timings={"align": elapsed}),
    }
