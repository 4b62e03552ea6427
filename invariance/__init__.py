"""invariance: does a visual encoder see a cluttered scene the way it sees the clean one?

The library is the product; :mod:`invariance.cli` is a thin shell over it.
"""

__version__ = "0.1.0"

SAFETY_CAUTION = (
    "Passing these checks is evidence, not a certificate that a robot is safe. "
    "Trials on hardware follow the site's safety rules and the applicable "
    "machine-safety standards (for example ISO 10218 and ISO/TS 15066 for "
    "industrial and collaborative robots)."
)
