"""Where in the image clutter moves the features: drift maps of clean / cluttered pairs.

For a pair of views, a *drift map* gives each region of the cluttered view the part of
the pair's drift, 1 - cos(f(cluttered), f(clean)), that the clutter there causes:

:func:`occlusion_map`
    exact: patches of the cluttered view are restored from the clean view one at a time
    and the drop in drift recorded (occlusion sensitivity, Zeiler & Fergus, ECCV 2014),
    batched, skipping patches that are the same in both views;
:func:`gradient_map`
    fast: the drift's gradient times the pixel change, a first-order estimate (Simonyan
    et al., ICLR 2014 workshop; Shrikumar et al., ICML 2017);
:func:`positive_mass_shares`
    the share of the map's positive mass on given pixels, e.g. the generator's
    distractor, surface and lighting masks (:func:`invariance.scenes.clutter_masks`);
:func:`overlay_rgb`
    the map over a grey copy of the view, for the report's thumbnails;
:func:`explain_pairs`, :func:`explain_outputs`
    maps of named or worst pairs of a data set, and the files ``invariance explain``
    writes;
:func:`policy_outputs`, :func:`policy_output_drift`
    a whole policy's outputs on both views, and their drift in the output's units
    (:func:`invariance.metrics.output_drift.output_drift`).
"""

from .files import SCHEMA, explain_outputs
from .gradient import gradient_map
from .occlusion import occlusion_map, spread_drops
from .overlay import figure_png, map_scale, overlay_rgb
from .pairs import DEFAULT_WORST, METHODS, explain_pairs
from .policy import policy_output_drift, policy_outputs
from .shares import positive_mass_shares

__all__ = [
    "DEFAULT_WORST",
    "METHODS",
    "SCHEMA",
    "explain_outputs",
    "explain_pairs",
    "figure_png",
    "gradient_map",
    "map_scale",
    "occlusion_map",
    "overlay_rgb",
    "policy_output_drift",
    "policy_outputs",
    "positive_mass_shares",
    "spread_drops",
]
