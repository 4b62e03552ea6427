"""How a drift map's positive mass splits over the pixels of each clutter factor."""

from __future__ import annotations

from typing import Mapping

import numpy as np

from invariance.errors import InvarianceError


def positive_mass_shares(drift_map, masks: Mapping[str, np.ndarray]) -> dict:
    """Share of the map's positive mass that lies on each mask's pixels.

    Only the positive part counts: it is the drift that clutter in a region adds (a
    negative value means restoring the region would move the feature further away). The
    share answers "how much of the drift do the distractors' pixels carry?" for one pair
    (common practice for scoring attribution maps against object masks, e.g. the
    "energy-based pointing game" of Wang et al., CVPR 2020 workshops, Score-CAM).

    Parameters
    ----------
    drift_map : ndarray of shape (H, W)
    masks : mapping of str to bool ndarray of shape (H, W)
        For generated scenes, :func:`invariance.scenes.clutter_masks`.

    Returns
    -------
    dict
        ``{mask name: share in [0, 1]}``, or ``None`` for every mask when the map has no
        positive mass (no region adds drift); an empty mask has share 0.
    """
    arr = np.asarray(drift_map, dtype=np.float64)
    if arr.ndim != 2 or not np.isfinite(arr).all():
        raise InvarianceError(f"a drift map must be a finite 2-D array, got shape {arr.shape}")
    positive = np.maximum(arr, 0.0)
    total = positive.sum()
    out = {}
    for name, mask in masks.items():
        mask = np.asarray(mask, dtype=bool)
        if mask.shape != arr.shape:
            raise InvarianceError(f"mask {name!r} is {mask.shape}, the drift map {arr.shape}; give masks of the "
                                  "image's size")
        out[name] = float(positive[mask].sum() / total) if total > 0 else None
    return out
