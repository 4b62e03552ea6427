"""Invariance statistics on paired feature matrices: numpy in, plain dicts out.

Every function takes ``clean`` and ``cluttered`` arrays of shape (n_pairs, d) whose row
``i`` is the same scene, and every split is made over pair indices so the two images of
a scene never land on different sides of a split.
"""

from invariance.metrics.cka import debiased_cka, linear_cka
from invariance.metrics.domain import domain_classifier, paired_folds
from invariance.metrics.drift import paired_drift
from invariance.metrics.mmd import (
    gaussian_kernel,
    median_bandwidth,
    mmd2_unbiased,
    paired_permutation_test,
)
from invariance.metrics.probe import linear_probes

__all__ = [
    "debiased_cka",
    "domain_classifier",
    "gaussian_kernel",
    "linear_cka",
    "linear_probes",
    "median_bandwidth",
    "mmd2_unbiased",
    "paired_drift",
    "paired_folds",
    "paired_permutation_test",
]
