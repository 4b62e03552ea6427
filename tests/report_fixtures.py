"""Builders of realistic result dicts and small scene images for the report and result tests.

The numbers are random but seeded and respect the ``invariance.result/1`` schema: accuracies
in [0.5, 1] with intervals around them, drifts in [0, 1.5], probe gaps equal to clean minus
cluttered. Images show the demo's own scenario, a parts-sorting workbench seen from above:
a plain bench with one part (clean) and the same part among offcuts and stains (cluttered).
"""

from __future__ import annotations

import copy
from pathlib import Path

import numpy as np
from PIL import Image

FACTORS = ("factor_surface", "factor_distractors", "factor_light")
LAYERS = ("stem", "block1", "block2", "block3", "output")


def scene_names(pairs: int) -> list[str]:
    """File names of ``pairs`` scenes in data set order."""
    return [f"scene_{i:05d}.png" for i in range(pairs)]


def make_metrics(rng: np.random.Generator, *, separability: float, pairs: int = 48) -> dict:
    """A METRICS object whose numbers move together with ``separability`` in [0, 1].

    Parameters
    ----------
    rng : numpy.random.Generator
        Source of the seeded noise.
    separability : float
        0 = clutter invisible in the features, 1 = fully separable.
    pairs : int
        Number of pairs the metrics pretend to be measured on.
    """
    accuracy = float(np.clip(0.5 + 0.48 * separability + rng.normal(0, 0.01), 0.45, 1.0))
    half = float(1.96 * np.sqrt(accuracy * (1 - accuracy) / (2 * pairs)) + 0.01)
    drift = float(np.clip(0.05 + 0.9 * separability + rng.normal(0, 0.02), 0.0, 1.5))
    clean_acc = float(rng.uniform(0.85, 0.97))
    clean_r2 = float(rng.uniform(0.7, 0.9))
    part_cluttered = clean_acc - 0.5 * separability * clean_acc
    x_cluttered = clean_r2 - 0.6 * separability
    return {
        "domain_classifier": {
            "accuracy": accuracy, "ci": [max(0.0, accuracy - half), min(1.0, accuracy + half)],
            "proxy_a_distance": 2 * (1 - 2 * (1 - accuracy)), "p_value": float(max(1e-4, 0.5 - separability)),
            "folds": 5, "n_test": 2 * pairs, "small_sample": pairs < 30,
        },
        "mmd": {"mmd2": float(0.002 + 0.3 * separability ** 2), "p_value": float(max(1 / 1001, 0.6 - separability)),
                "permutations": 1000, "bandwidth": float(rng.uniform(5, 20)), "method": "exact"},
        "probe": {
            "part": {"kind": "classification", "metric": "accuracy", "clean": clean_acc,
                     "cluttered": part_cluttered, "gap": clean_acc - part_cluttered,
                     "gap_ci": [clean_acc - part_cluttered - 0.08, clean_acc - part_cluttered + 0.08],
                     "baseline": 0.25, "decodable": True, "n_train": pairs - pairs * 3 // 10,
                     "n_test": pairs * 3 // 10},
            "x": {"kind": "regression", "metric": "r2", "clean": clean_r2, "cluttered": x_cluttered,
                  "gap": clean_r2 - x_cluttered, "gap_ci": [clean_r2 - x_cluttered - 0.1, clean_r2 - x_cluttered + 0.1],
                  "baseline": -0.01, "decodable": True, "n_train": pairs - pairs * 3 // 10,
                  "n_test": pairs * 3 // 10},
        },
        "paired_drift": {"relative_drift": drift, "relative_drift_ci": [max(0.0, drift - 0.04), drift + 0.04],
                         "pair_retrieval_top1": float(np.clip(1 - 0.8 * separability, 0, 1))},
        "cka": float(np.clip(0.97 - 0.6 * separability + rng.normal(0, 0.01), 0, 1)),
        "cka_linear": float(np.clip(0.98 - 0.5 * separability + rng.normal(0, 0.01), 0, 1)),
    }


def make_result(*, seed: int, name: str, spec: str, dataset_path: str | Path = "scenes",
                separability: float = 0.4, pairs: int = 48, content_hash: str = "sha256:0a1b2c3d",
                with_layers: bool = True, with_breakdowns: bool = True, with_alignment: bool = False,
                with_gates: bool = True) -> dict:
    """A complete ``invariance.result/1`` dict for one encoder.

    Parameters
    ----------
    seed : int
        Seed of every random number in the result.
    name, spec : str
        Display name and encoder spec.
    dataset_path : path-like
        ``dataset.path``; thumbnails are read from its ``clean/`` and ``cluttered/``.
    separability : float
        How visible clutter is in the output features (0 invisible, 1 obvious).
    pairs : int
        Number of pairs.
    content_hash : str
        ``dataset.content_hash``.
    with_layers, with_breakdowns, with_alignment, with_gates : bool
        Which optional blocks to include.
    """
    rng = np.random.default_rng(seed)
    names = scene_names(pairs)
    result = {
        "schema": "invariance.result/1",
        "encoder": {"spec": spec, "name": name, "layer": "output", "arch": "workbench_cnn",
                    "weights": None, "weights_sha256": None,
                    "preprocess": {"resize": 96, "mean": [0.5, 0.5, 0.5], "std": [0.25, 0.25, 0.25]}},
        "dataset": {"path": str(dataset_path), "pairs": pairs, "content_hash": content_hash,
                    "image_size": [64, 64], "factors": list(FACTORS) + ["level"]},
        "metrics": make_metrics(rng, separability=separability, pairs=pairs),
        "pairs": [{"name": n, "drift": float(d)} for n, d in
                  zip(names, rng.gamma(2.0, 0.15 + 0.4 * separability, size=pairs))],
        "projection": _projection(rng, pairs, separability),
        "environment": {"invariance": "0.1.0", "python": "3.11.7", "torch": "2.4.0", "torchvision": "0.19.0",
                        "numpy": "2.1.0", "scikit-learn": "1.5.1", "platform": "Linux-x86_64", "device": "cpu",
                        "seed": 0, "command": f"invariance score {dataset_path} --encoder {spec}",
                        "timings_s": {"extract": float(rng.uniform(5, 20)), "score": float(rng.uniform(0.5, 3))}},
        "warnings": [],
    }
    if with_layers:
        result["layers"] = {layer: make_metrics(rng, separability=separability * (i + 1) / len(LAYERS), pairs=pairs)
                            for i, layer in enumerate(LAYERS)}
    if with_breakdowns:
        result["breakdowns"] = _breakdowns(rng, separability, pairs)
    if with_alignment:
        result["alignment"] = _alignment(rng, separability, pairs)
    if with_gates:
        accuracy = result["metrics"]["domain_classifier"]["accuracy"]
        result["gates"] = {"max_domain_accuracy": {"threshold": 0.75, "value": accuracy, "passed": accuracy <= 0.75}}
    return result


def make_failure(name: str = "Offcut net", spec: str = "torchscript:missing.pt") -> dict:
    """A failure entry as ``compare`` records it."""
    return {"spec": spec, "name": name, "error": f"{spec.split(':', 1)[-1]}: file not found; check the path"}


def two_encoder_results(dataset_path: str | Path) -> list[dict]:
    """The standard comparison: a weaker encoder listed first, a more invariant one second."""
    return [
        make_result(seed=1, name="Bench CNN (plain)", spec="python:bench_models:plain", dataset_path=dataset_path,
                    separability=0.7),
        make_result(seed=2, name="Bench CNN (aligned)", spec="checkpoint:aligned.pt", dataset_path=dataset_path,
                    separability=0.15, with_alignment=True),
    ]


def blind_metrics(pairs: int = 48) -> dict:
    """The metrics scoring records for a constant-output ("blind") encoder.

    Every feature is constant, so the domain classifier's note says so (accuracy 0.5 by
    construction), CKA and drift are not computable, and every probe scores its no-feature
    baseline, so no task is decodable on clean (what invariance.scoring writes for such
    features).
    """
    base = {"kind": "classification", "metric": "accuracy", "clean": 0.25, "cluttered": 0.25, "gap": 0.0,
            "gap_ci": [0.0, 0.0], "baseline": 0.25, "decodable": False, "n_train": 34, "n_test": 14,
            "note": "not decodable on clean"}
    x = {**base, "kind": "regression", "metric": "r2", "clean": -0.01, "cluttered": -0.01, "baseline": -0.01}
    return {
        "domain_classifier": {"accuracy": 0.5, "ci": [0.44, 0.56], "proxy_a_distance": 0.0, "p_value": 1.0,
                              "folds": 5, "n_test": 2 * pairs, "pairs_used": pairs,
                              "note": "every feature is constant within the training folds: nothing separates "
                                      "the domains, so the accuracy is chance by construction"},
        "mmd": {"mmd2": 0.0, "p_value": 1.0, "permutations": 1000, "bandwidth": 1.0, "method": "exact"},
        "probe": {"part": base, "x": x},
        "paired_drift": {"not_computable": "the clean features of different scenes point the same way (median "
                                           "cosine distance 0), so there is no scene scale to compare with"},
        "cka": {"not_computable": "debiased CKA is undefined when one feature matrix is constant across rows"},
        "cka_linear": {"not_computable": "linear CKA is undefined when one feature matrix is constant across rows"},
    }


def not_computable(result: dict, metric: str, reason: str) -> dict:
    """A copy of ``result`` whose output-layer ``metric`` is not computable for ``reason``."""
    result = copy.deepcopy(result)
    result["metrics"][metric] = {"not_computable": reason}
    return result


def write_scene_images(root: Path, names: list[str], *, size: int = 64, seed: int = 0) -> Path:
    """Write paired workbench scenes under ``root/clean`` and ``root/cluttered``.

    Parameters
    ----------
    root : Path
        Data set folder to create.
    names : list of str
        File names (PNG).
    size : int
        Image side in pixels.
    seed : int
        Seed for part positions and clutter.
    """
    rng = np.random.default_rng(seed)
    (root / "clean").mkdir(parents=True, exist_ok=True)
    (root / "cluttered").mkdir(parents=True, exist_ok=True)
    for name in names:
        clean = _bench(size, rng)
        cluttered = _clutter(clean.copy(), rng)
        Image.fromarray(clean).save(root / "clean" / name)
        Image.fromarray(cluttered).save(root / "cluttered" / name)
    return root


def _bench(size: int, rng: np.random.Generator) -> np.ndarray:
    image = np.empty((size, size, 3), dtype=np.uint8)
    image[:] = (196, 170, 128)  # light plywood bench
    w = int(rng.integers(size // 6, size // 3))
    x, y = rng.integers(0, size - w, size=2)
    image[y:y + w, x:x + w] = rng.integers(30, 120, size=3)  # the part to sort
    return image


def _clutter(image: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    size = image.shape[0]
    noise = rng.normal(0, 14, size=image.shape)
    image = np.clip(image.astype(float) + noise, 0, 255)
    for _ in range(int(rng.integers(2, 5))):  # offcuts and stray screws
        w = int(rng.integers(3, size // 5))
        x, y = rng.integers(0, size - w, size=2)
        image[y:y + w // 2 + 1, x:x + w] = rng.integers(60, 230, size=3)
    return (image * rng.uniform(0.75, 1.05)).clip(0, 255).astype(np.uint8)


def _projection(rng: np.random.Generator, pairs: int, separability: float) -> dict:
    clean = rng.normal(0, 1, size=(pairs, 2))
    cluttered = clean + np.array([2.5 * separability, 0.0]) + rng.normal(0, 0.2 + separability, size=(pairs, 2))
    return {"method": "pca", "clean": clean.round(4).tolist(), "cluttered": cluttered.round(4).tolist(),
            "explained_variance_ratio": [0.31, 0.12]}


def _breakdowns(rng: np.random.Generator, separability: float, pairs: int) -> dict:
    out = {}
    for f, factor in enumerate(FACTORS):
        groups = {}
        for level in ("0", "1"):
            s = separability * (0.4 + 0.5 * int(level)) * (1 - 0.2 * f)
            groups[level] = {"pairs": pairs // 2, "metrics": make_metrics(rng, separability=s, pairs=pairs // 2)}
        out[factor] = groups
    out["level"] = {str(level): {"pairs": pairs // 4,
                                 "metrics": make_metrics(rng, separability=separability * level / 3, pairs=pairs // 4)}
                    for level in range(4)}
    return out


def _alignment(rng: np.random.Generator, separability: float, pairs: int) -> dict:
    steps = list(range(0, 200, 10))
    progress = np.linspace(0, 1, len(steps))
    return {
        "before": make_metrics(rng, separability=min(1.0, separability + 0.4), pairs=pairs // 4),
        "after": make_metrics(rng, separability=separability, pairs=pairs // 4),
        "held_out_pairs": pairs // 4,
        "checkpoint": "aligned.pt",
        "curves": {
            "step": steps,
            "discriminator_accuracy": (0.95 - 0.4 * progress + rng.normal(0, 0.02, len(steps))).tolist(),
            "val_domain_accuracy": (0.9 - 0.35 * progress).tolist(),
            "loss_total": (1.2 * np.exp(-2 * progress) + 0.3).tolist(),
            "loss_domain": (0.69 - 0.1 * np.exp(-3 * progress)).tolist(),
            "loss_anchor": (0.1 + 0.05 * progress).tolist(),
            "loss_task": (0.6 * np.exp(-3 * progress) + 0.1).tolist(),
            "loss_paired": (0.8 * np.exp(-4 * progress) + 0.2).tolist(),
            "loss_mean": (0.3 * np.exp(-6 * progress) + 0.01).tolist(),
            "lambda": (2 / (1 + np.exp(-10 * progress)) - 1).tolist(),
        },
    }
