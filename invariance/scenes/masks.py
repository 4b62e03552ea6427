"""Where each clutter factor acts in a generated pair, from the scene's seed and severities.

The generator knows where it put every distractor, which pixels are bench and which are
the target, so the masks here are exact: they are recomputed from the pair's random
streams (the same draws :func:`~invariance.scenes.render_pair` makes), never guessed from
the difference between the two images. They are what a drift map of a generated pair is
checked against (:mod:`invariance.explain`).
"""

from __future__ import annotations

from typing import Mapping

import numpy as np

from invariance.errors import InvarianceError

from .distractors import DISTRACTOR_COUNTS, _distractor_layers
from .params import FACTORS, MAX_LEVEL, _check_params, _is_int
from .raster import _composite, _layer_mask, _to_uint8
from .sampler import (_DISTRACTORS, _SCENE, _cluttered_bench, _scene, _stream, _stream_keys, _target_layer,
                      _with_target, pair_rng)
from .surfaces import _clean_background

MASK_NAMES = ("target", *FACTORS)


def _check_severity(severity) -> dict:
    """``{factor: 0..3}`` for every factor; a missing factor is 0 (off)."""
    if not isinstance(severity, Mapping):
        raise InvarianceError(f"severity must be a mapping of clutter factor to 0-{MAX_LEVEL}, got {severity!r}")
    unknown = [k for k in severity if k not in FACTORS]
    if unknown:
        raise InvarianceError(f"unknown clutter factor {unknown[0]!r}: choose from {','.join(FACTORS)}")
    out = {}
    for factor in FACTORS:
        value = severity.get(factor, 0)
        if not _is_int(value) or not 0 <= value <= MAX_LEVEL:
            raise InvarianceError(f"severity of {factor} must be an integer 0-{MAX_LEVEL}, got {value!r}")
        out[factor] = int(value)
    return out


def clutter_masks(seed: int, index: int, size: int = 128, severity: Mapping[str, int] | None = None) -> dict:
    """Pixels of each clutter factor in pair ``index`` of ``generate_scenes(seed=seed)``.

    Parameters
    ----------
    seed, index
        As in :func:`~invariance.scenes.pair_rng`.
    size
        Image side in pixels, 32..1024.
    severity
        ``{"surface": s, "distractors": s, "lighting": s}``, each 0-3, as in the pair's
        ``factor_*`` columns of ``labels.csv``; a missing factor is off.

    Returns
    -------
    dict of str to ndarray
        bool arrays of shape (size, size) keyed by :data:`MASK_NAMES`:

        ``target``
            pixels at least half covered by the target (identical in the two views);
        ``distractors``
            pixels at least half covered by a distractor and not by the target (empty when
            the factor is off);
        ``surface``
            visible bench pixels, neither target nor distractor, when the surface factor
            is on (empty when off);
        ``lighting``
            every pixel but the target's when the lighting factor is on, since light
            changes the bench and the distractors alike (empty when off).

        ``lighting`` overlaps ``surface`` and ``distractors``; the other three are disjoint.
    """
    size, _, _ = _check_params(size, FACTORS, None)
    if not _is_int(seed) or seed < 0 or not _is_int(index) or index < 0:
        raise InvarianceError(f"seed and index must be non-negative integers, got {seed!r} and {index!r}")
    sev = _check_severity({} if severity is None else severity)
    keys = _stream_keys(pair_rng(seed, index))
    scene = _scene(_stream(keys, _SCENE), size)
    target = _layer_mask(_target_layer(scene, size), size)
    distractors = np.zeros((size, size), dtype=bool)
    if sev["distractors"]:
        count = DISTRACTOR_COUNTS[sev["distractors"]]
        for layer in _distractor_layers(_stream(keys, _DISTRACTORS), scene, size, count):
            distractors |= _layer_mask(layer, size)
        distractors &= ~target  # the target is drawn on top of the distractors
    empty = np.zeros((size, size), dtype=bool)
    return {
        "target": target,
        "distractors": distractors,
        "surface": ~(target | distractors) if sev["surface"] else empty,
        "lighting": ~target if sev["lighting"] else empty.copy(),
    }


def render_views(seed: int, index: int, size: int = 128, severity: Mapping[str, int] | None = None):
    """The two views of pair ``index`` of ``generate_scenes(seed=seed)`` at the given severities.

    What :func:`~invariance.scenes.render_pair` draws for that pair, with the severities
    taken from the pair's ``factor_*`` columns instead of drawn again, so a pair read from
    disk can be checked to be the pair the masks describe.

    Parameters
    ----------
    seed, index, size, severity
        As in :func:`clutter_masks`.

    Returns
    -------
    clean, cluttered : ndarray of shape (size, size, 3), uint8
    """
    size, _, _ = _check_params(size, FACTORS, None)
    sev = _check_severity({} if severity is None else severity)
    keys = _stream_keys(pair_rng(seed, index))
    scene = _scene(_stream(keys, _SCENE), size)
    bg = _clean_background(scene, size)
    target = _target_layer(scene, size)
    clean_f = bg.copy()
    _composite(clean_f, target)
    clean = _to_uint8(clean_f)
    if not any(sev.values()):
        return clean, clean.copy()
    return clean, _with_target(_cluttered_bench(keys, scene, bg, sev), target, _layer_mask(target, size), clean)
