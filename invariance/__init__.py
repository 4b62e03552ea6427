"""invariance: does a visual encoder see a cluttered scene the way it sees the clean one?

The library is the product; :mod:`invariance.cli` is a thin shell over it. A notebook
session needs only the names in ``__all__``::

    import invariance as inv
    result = inv.score_features(clean, cluttered, tasks={"part": labels})
    for metric, value, interval, reading in inv.describe_metrics(result["metrics"]):
        print(metric, value, interval, reading)

Names are imported on first use, so ``import invariance`` stays quick and the
``score_features`` path never loads torch.
"""

from __future__ import annotations

import importlib

__version__ = "0.1.0"

SAFETY_CAUTION = (
    "Passing these checks is evidence, not a certificate that a robot is safe. "
    "Trials on hardware follow the site's safety rules and the applicable "
    "machine-safety standards (for example ISO 10218 and ISO/TS 15066 for "
    "industrial and collaborative robots)."
)

# public name -> module that defines it
_EXPORTS = {
    # options
    "ExtractionOptions": "invariance.options",
    "ScoringOptions": "invariance.options",
    "AlignmentOptions": "invariance.options",
    "Gates": "invariance.options",
    "EncoderEntry": "invariance.options",
    # data and encoders
    "discover_pairs": "invariance.data",
    "load_manifest": "invariance.data",
    "load_encoder": "invariance.encoders",
    "extract_features": "invariance.encoders",
    "available_layers": "invariance.encoders",
    # scoring
    "score_features": "invariance.scoring",
    "load_feature_files": "invariance.scoring",
    "describe_metrics": "invariance.readings",
    "score_dataset": "invariance.pipeline",
    "score_feature_arrays": "invariance.pipeline",
    "compare_encoders": "invariance.pipeline",
    "evaluate_gates": "invariance.gates",
    # alignment
    "align_dataset": "invariance.pipeline",
    "align_encoder": "invariance.align",
    # results and report
    "load_result_files": "invariance.results",
    "load_as_comparison": "invariance.results",
    "rank_results": "invariance.results",
    "write_report": "invariance.report",
    # where in the image, and what clutter does to a policy's output
    "occlusion_map": "invariance.explain",
    "gradient_map": "invariance.explain",
    "explain_pairs": "invariance.explain",
    "output_drift": "invariance.metrics.output_drift",
    "clutter_masks": "invariance.scenes",
    # errors
    "InvarianceError": "invariance.errors",
    "InvalidParameter": "invariance.errors",
    "GateFailed": "invariance.errors",
}

__all__ = ["SAFETY_CAUTION", "__version__", *_EXPORTS]


def __getattr__(name):
    if name in _EXPORTS:
        value = getattr(importlib.import_module(_EXPORTS[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'invariance' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(__all__))
