"""Drift maps for chosen pairs of a data set: by name, or the pairs clutter moves most."""

from __future__ import annotations

import difflib
import re

import numpy as np

from invariance.errors import InvalidParameter, InvarianceError
from invariance.validation import check_choice, check_int

from ..data import load_rgb
from ._common import _check_encoder, _pair_arrays
from .gradient import gradient_map
from .occlusion import DEFAULT_BATCH, occlusion_map
from .shares import positive_mass_shares

METHODS = ("occlusion", "gradient")
# Pairs explained when neither names nor a count are given: a handful to look at (common practice).
DEFAULT_WORST = 4
# File names written by `invariance scenes` (invariance.scenes.writer): scene_<index>.png.
_SCENE_NAME = re.compile(r"(?:^|/)scene_(\d+)\.png$")
_SEVERITY_COLUMNS = ("factor_surface", "factor_distractors", "factor_lighting")


def _indices_of(pairs, names) -> list[int]:
    """Row of each named pair, refusing a name that is not in the set (with the nearest names)."""
    where = {name: i for i, name in enumerate(pairs.names)}
    out = []
    for name in names:
        if name not in where:
            close = difflib.get_close_matches(str(name), pairs.names, n=3, cutoff=0.5)
            example = pairs.names[0] if pairs.names else "scene_00000.png"
            hint = f"nearest: {', '.join(close)}" if close else f"names are paths under clean/, e.g. {example}"
            raise InvarianceError(f"pair {name!r} is not in the data set {pairs.root or ''} ({len(pairs)} pairs); "
                                  f"{hint}")
        out.append(where[name])
    return list(dict.fromkeys(out))


def _worst(pairs, encoder, layer, worst: int, extraction, progress) -> tuple[list[int], np.ndarray]:
    """The ``worst`` pairs by relative drift (highest first) and every pair's relative drift."""
    from ..encoders import extract_features
    from ..metrics.drift import paired_drift

    clean, cluttered = extract_features(pairs, encoder, [layer or "output"], options=extraction,
                                        progress=progress)[layer or "output"]
    drift = paired_drift(clean, cluttered, resamples=100)
    if "not_computable" in drift:
        raise InvarianceError(f"cannot rank pairs by drift: {drift['not_computable']}; name pairs with --pair")
    per_pair = drift["per_pair"]
    order = np.argsort(-per_pair, kind="stable")[:worst]
    return [int(i) for i in order], per_pair


def _severity(pairs, i: int) -> dict:
    """The pair's clutter severities from labels.csv, as `invariance scenes` writes them."""
    factors = pairs.labels.factors if pairs.labels is not None else {}
    missing = [c for c in _SEVERITY_COLUMNS if c not in factors]
    if missing:
        raise InvarianceError(f"--scene-seed needs labels.csv with the columns {', '.join(_SEVERITY_COLUMNS)} "
                              f"as `invariance scenes` writes them; {missing[0]} is missing")
    try:
        return {c.removeprefix("factor_"): int(factors[c][i]) for c in _SEVERITY_COLUMNS}
    except ValueError:
        raise InvarianceError(f"labels.csv: pair {pairs.names[i]} has a non-integer clutter severity; "
                              "--scene-seed needs the file `invariance scenes` wrote") from None


def _generator_masks(pairs, i: int, seed: int, clean: np.ndarray, cluttered: np.ndarray) -> dict:
    """The generator's masks of pair ``i``, after checking that the files are that pair."""
    from ..scenes import render_views
    from ..scenes.masks import clutter_masks

    name = pairs.names[i]
    match = _SCENE_NAME.search(name)
    size = clean.shape[0]
    if match is None or clean.shape[0] != clean.shape[1]:
        raise InvarianceError(f"pair {name}: not a scene_<index>.png square image from `invariance scenes`; "
                              "drop --scene-seed for data sets made elsewhere")
    index, severity = int(match.group(1)), _severity(pairs, i)
    views = render_views(seed, index, size, severity)
    if not (np.array_equal(views[0], clean) and np.array_equal(views[1], cluttered)):
        raise InvarianceError(f"pair {name} is not scene {index} of `invariance scenes --seed {seed}`; "
                              "give the seed the set was made with, or drop --scene-seed")
    return clutter_masks(seed, index, size, severity)


def _one_map(encoder, clean, cluttered, method, patch, layer, batch_size, name):
    if method == "occlusion":
        return occlusion_map(encoder, clean, cluttered, patch=patch, layer=layer, batch_size=batch_size, name=name)
    return gradient_map(encoder, clean, cluttered, layer=layer, name=name)


def _explain_one(pairs, i: int, encoder, method, patch, layer, batch_size, scene_seed) -> dict:
    """The map of pair ``i`` and, with the set's seed, its shares over the generator's masks."""
    name = pairs.names[i]
    clean, cluttered = _pair_arrays(np.asarray(load_rgb(pairs.clean[i])), np.asarray(load_rgb(pairs.cluttered[i])),
                                    name)
    masks = _generator_masks(pairs, i, scene_seed, clean, cluttered) if scene_seed is not None else None
    result = _one_map(encoder, clean, cluttered, method, patch, layer, batch_size, name)
    shares = None
    if masks is not None:  # a factor that is off in this pair has no pixels and no share
        shares = {k: (v if masks[k].any() else None) for k, v in positive_mass_shares(result["map"], masks).items()}
    return {"name": name, "index": i, **result, "shares": shares}


def _check_selection(names, worst):
    if isinstance(names, str):
        names = [names]
    names = list(names or ())
    worst = check_int("worst", worst, low=1, high=1000, allow_none=True)
    if names and worst is not None:
        raise InvalidParameter("worst", "give pair names or a number of worst pairs, not both")
    return names, (DEFAULT_WORST if not names and worst is None else worst)


def explain_pairs(pairs, encoder, *, names=(), worst: int | None = None, method: str = "occlusion",
                  patch: int | None = None, layer: str | None = None, scene_seed: int | None = None,
                  batch_size: int = DEFAULT_BATCH, extraction=None, progress=True) -> dict:
    """Drift maps of the named pairs, or of the ``worst`` pairs by relative drift.

    Parameters
    ----------
    pairs : invariance.data.PairSet
    encoder : Encoder
    names : sequence of str, optional
        Pair names as in ``pairs.names``; a name not in the set is an error.
    worst : int, optional
        Explain the pairs with the highest relative drift (features extracted, and cached,
        for the whole set); default 4 when no names are given.
    method : {"occlusion", "gradient"}, default="occlusion"
        :func:`~invariance.explain.occlusion_map` (exact) or
        :func:`~invariance.explain.gradient_map` (fast, first order).
    patch : int, optional
        Occlusion patch side in image pixels; default each image's shorter side over 16
        (:func:`invariance.explain.occlusion.default_patch`; 8 px at 128 px).
    layer : str, optional
        Graph node to compare at; default the output feature.
    scene_seed : int, optional
        The seed ``invariance scenes`` made the set with: each pair is redrawn from it and
        checked to match the files, and the map's positive mass is split over the
        generator's masks (target, distractors, surface, lighting).
    batch_size : int, default=16
        Images per forward pass of the occlusion map.
    extraction : ExtractionOptions, optional
        For ranking by drift (cache, batch size).
    progress : bool, callable or Reporter

    Returns
    -------
    dict
        ``method``, ``patch`` (occlusion: the side given, or ``None`` when each pair used
        its default, which its own ``patch`` records), ``layer``, ``pairs``: one dict per explained
        pair with ``name``, ``index``, ``relative_drift`` (when ranked, else ``None``),
        the map's keys (``map``, ``drift``, ``forward_images``, ...) and ``shares``
        (``{mask: share of the positive map mass}``, ``None`` for a factor that is off in the
        pair; ``None`` altogether without ``scene_seed``).
    """
    encoder = _check_encoder(encoder)
    method = check_choice("method", method, METHODS)
    names, worst = _check_selection(names, worst)
    if scene_seed is not None:
        scene_seed = check_int("scene_seed", scene_seed, low=0)
    if names:
        chosen, per_pair = _indices_of(pairs, names), None
    else:
        chosen, per_pair = _worst(pairs, encoder, layer, worst, extraction, progress)
    out = [_explain_one(pairs, i, encoder, method, patch, layer, batch_size, scene_seed) for i in chosen]
    for entry in out:
        entry["relative_drift"] = None if per_pair is None else float(per_pair[entry["index"]])
    return {"method": method, "patch": patch if method == "occlusion" else None, "layer": layer or "output",
            "scene_seed": scene_seed, "pairs": out}
