"""Linear CKA between paired clean and cluttered feature matrices."""

from __future__ import annotations

import numpy as np

from invariance.errors import InvarianceError


def linear_cka(X, Y):
    """Linear centred kernel alignment (Kornblith et al., ICML 2019).

    With column-centred X (n x p) and Y (n x q), CKA = |Y'X|_F^2 / (|X'X|_F |Y'Y|_F).
    When the feature width exceeds the number of rows the same value is computed from
    the n x n Gram matrices (|Y'X|_F^2 = <XX', YY'>_F), which is cheaper.

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
    # private float64 copies, centred in place below
    X = np.array(X, dtype=np.float64)
    Y = np.array(Y, dtype=np.float64)
    if X.ndim != 2 or Y.ndim != 2 or X.shape[0] != Y.shape[0] or X.shape[0] < 2:
        raise InvarianceError(
            f"linear_cka needs two 2-D arrays with the same number (>= 2) of rows; got "
            f"shapes {X.shape} and {Y.shape}"
        )
    if np.ptp(X, axis=0).max() == 0 or np.ptp(Y, axis=0).max() == 0:
        raise InvarianceError(
            "linear CKA is undefined when one feature matrix is constant across rows: "
            "check that the encoder output varies between images"
        )
    X -= X.mean(0)
    Y -= Y.mean(0)
    n = X.shape[0]
    if max(X.shape[1], Y.shape[1]) > n:
        gx, gy = X @ X.T, Y @ Y.T
        cross, norm_x, norm_y = (gx * gy).sum(), np.linalg.norm(gx), np.linalg.norm(gy)
    else:
        cross = np.linalg.norm(Y.T @ X) ** 2
        norm_x, norm_y = np.linalg.norm(X.T @ X), np.linalg.norm(Y.T @ Y)
    # rounding can push a perfect alignment a hair past 1
    return float(min(1.0, cross / (norm_x * norm_y)))
