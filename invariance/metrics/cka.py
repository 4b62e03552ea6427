"""Centred kernel alignment (CKA) between paired clean and cluttered feature matrices.

Two forms: ``linear_cka`` (Kornblith et al., ICML 2019), biased towards 1 when the
feature width is large against the number of pairs, and ``debiased_cka`` built on the
unbiased HSIC estimator (Song et al., JMLR 2012), which stays near 0 for unrelated
features at any width (Nguyen, Raghu & Kornblith, ICLR 2021).
"""

from __future__ import annotations

import numpy as np

from invariance.errors import InvarianceError

# The unbiased HSIC estimator divides by n (n - 1) (n - 2) (n - 3) terms: it needs four
# pairs (Song et al., JMLR 13, 2012, eq. 5).
DEBIASED_MIN_PAIRS = 4

# An unbiased self-similarity HSIC_1(K, K) at or below this fraction of its scale, the
# squared mean squared row norm, is rounding of zero: the features carry no variation
# the estimator can see. Float64 sums of a few million terms are exact to ~1e-10 of
# their scale, so 1e-9 keeps a margin (common practice for rounding guards).
_SELF_HSIC_ROUNDING = 1e-9


def _centred(X, Y, caller, label, min_rows):
    """Float64 copies of X and Y, column-centred, after the shape and constant checks."""
    # private float64 copies, centred in place below
    X = np.array(X, dtype=np.float64)
    Y = np.array(Y, dtype=np.float64)
    if X.ndim != 2 or Y.ndim != 2 or X.shape[0] != Y.shape[0] or X.shape[0] < min_rows:
        raise InvarianceError(
            f"{caller} needs two 2-D arrays with the same number (>= {min_rows}) of rows; "
            f"got shapes {X.shape} and {Y.shape}"
        )
    if np.ptp(X, axis=0).max() == 0 or np.ptp(Y, axis=0).max() == 0:
        raise InvarianceError(
            f"{label} CKA is undefined when one feature matrix is constant across rows: "
            "check that the encoder output varies between images"
        )
    X -= X.mean(0)
    Y -= Y.mean(0)
    return X, Y


def _cross(X, Y):
    """<XX', YY'>_F = |Y'X|_F^2, from whichever side is cheaper (n x n or p x q)."""
    # the n x n side when a matrix is wider than it is tall, as in linear_cka
    if max(X.shape[1], Y.shape[1]) > X.shape[0]:
        return float(((X @ X.T) * (Y @ Y.T)).sum())
    return float(np.linalg.norm(Y.T @ X) ** 2)


def linear_cka(X, Y):
    """Linear centred kernel alignment (Kornblith et al., ICML 2019).

    With column-centred X (n x p) and Y (n x q), CKA = |Y'X|_F^2 / (|X'X|_F |Y'Y|_F).
    When the feature width exceeds the number of rows the same value is computed from
    the n x n Gram matrices (|Y'X|_F^2 = <XX', YY'>_F), which is cheaper.

    This is the plug-in (biased) estimate: for independent X and Y it is far above 0
    when p is large against n (about 0.8 at n = 120, p = 512); ``debiased_cka`` is not.

    Parameters
    ----------
    X : ndarray of shape (n, p)
    Y : ndarray of shape (n, q)
        Rows are paired (row i of each is the same scene).

    Returns
    -------
    float
        In [0, 1]; 1 when Y is an orthogonal transform and isotropic scaling of X.

    Raises
    ------
    InvarianceError
        When shapes disagree, fewer than 2 rows, or a matrix is constant after
        centring (CKA is 0/0 there).
    """
    X, Y = _centred(X, Y, "linear_cka", "linear", 2)
    n = X.shape[0]
    if max(X.shape[1], Y.shape[1]) > n:
        gx, gy = X @ X.T, Y @ Y.T
        cross, norm_x, norm_y = (gx * gy).sum(), np.linalg.norm(gx), np.linalg.norm(gy)
    else:
        cross = np.linalg.norm(Y.T @ X) ** 2
        norm_x, norm_y = np.linalg.norm(X.T @ X), np.linalg.norm(Y.T @ Y)
    # rounding can push a perfect alignment a hair past 1
    return float(min(1.0, cross / (norm_x * norm_y)))


def _unbiased_hsic(cross, kx, ky):
    """Unbiased HSIC of two linear kernels (Song et al., JMLR 13, 2012, eq. 5).

    HSIC_1 = [tr(K~L~) + 1'K~1 1'L~1 / ((n-1)(n-2)) - 2/(n-2) 1'K~L~1] / (n(n-3)), with
    K~ = K with its diagonal set to 0. For column-centred features K1 = 0, so
    tr(K~L~) = <K, L>_F - kx.ky, 1'K~1 = -sum(kx) and K~1 = -kx, where kx = diag(K)
    (squared row norms): no n x n matrix is needed.
    """
    n = kx.size
    diag = float(kx @ ky)
    return (
        cross - diag + kx.sum() * ky.sum() / ((n - 1) * (n - 2)) - 2.0 * diag / (n - 2)
    ) / (n * (n - 3))


def debiased_cka(X, Y):
    """Debiased linear CKA: linear CKA with the unbiased HSIC estimator.

    CKA = HSIC_1(K, L) / sqrt(HSIC_1(K, K) HSIC_1(L, L)) with linear kernels K = XX',
    L = YY' and HSIC_1 the unbiased estimator of Song et al. ("Feature selection via
    dependence maximization", JMLR 13, 2012, eq. 5), as used for CKA by Nguyen, Raghu &
    Kornblith ("Do wide and deep networks learn the same things?", ICLR 2021). Unlike
    ``linear_cka`` it is about 0 for independent features whatever the width: at
    n = 120, p = 512 linear CKA of independent Gaussian features averages 0.81, this
    form 0.00.

    Parameters
    ----------
    X : ndarray of shape (n, p)
    Y : ndarray of shape (n, q)
        Rows are paired (row i of each is the same scene); n >= 4.

    Returns
    -------
    float
        In [-1, 1]; 1 when Y is an orthogonal transform and isotropic scaling of X.
        Not clipped at 0: the numerator is an unbiased estimate, so for unrelated
        features it falls on either side of 0 (a small negative value reads "no linear
        relation beyond sampling noise"), and clipping would bias averages upwards.
        HSIC_1 is an inner product of U-centred Gram matrices (Szekely & Rizzo, Annals
        of Statistics 2014, "Partial distance correlation"), so the Cauchy-Schwarz
        bound |CKA| <= 1 holds; only rounding is clipped.

    Raises
    ------
    InvarianceError
        When shapes disagree, fewer than 4 rows, a matrix is constant across rows, or
        its unbiased self-similarity is not positive (too few distinct rows to
        estimate it).
    """
    X, Y = _centred(X, Y, "debiased_cka", "debiased", DEBIASED_MIN_PAIRS)
    kx, ky = (X * X).sum(1), (Y * Y).sum(1)
    hsic_xy = _unbiased_hsic(_cross(X, Y), kx, ky)
    hsic_xx = _unbiased_hsic(_cross(X, X), kx, kx)
    hsic_yy = _unbiased_hsic(_cross(Y, Y), ky, ky)
    for name, self_hsic, k in (("clean", hsic_xx, kx), ("cluttered", hsic_yy, ky)):
        if not self_hsic > _SELF_HSIC_ROUNDING * k.mean() ** 2:
            raise InvarianceError(
                f"debiased CKA is not computable: the unbiased estimate of the {name} "
                f"features' self-similarity is not positive with {kx.size} pairs; add pairs"
            )
    return float(np.clip(hsic_xy / np.sqrt(hsic_xx * hsic_yy), -1.0, 1.0))
