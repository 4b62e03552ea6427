"""Paired feature generators for calibrating the statistics: nulls and a shifted alternative.

Every ``null(kind, n, d, rng)`` returns ``(clean, cluttered)``, two float64 arrays of
shape (n, d) whose rows are exchangeable within each pair: both views of scene i are
drawn by the same rule from the same scene, so swapping them leaves the joint
distribution unchanged (the null of a paired two-sample test).

Kinds (the 0.3 noise scale makes the shared scene component dominate, as for two
photographs of one scene; common practice, chosen to stress tests that ignore pairing):

``iid``
    Both views i.i.d. N(0, I), no shared component.
``paired_shared``
    scene ~ N(0, I), view = scene + 0.3 * noise, noise ~ N(0, I).
``heavy_tailed``
    As ``paired_shared`` with scene and noise Student t with 3 degrees of freedom
    (finite variance 3, infinite fourth moment).
``relu_sparse``
    view = ReLU(scene + 0.3 * noise - 1), scene and noise N(0, I): about 17% of the
    entries are non-zero (P(N(0, 1.09) > 1) = 0.169), like post-ReLU encoder features.

Import from tests as ``from nulls import KINDS, null, shifted`` (pytest puts ``tests/``
on ``sys.path``, as for ``conftest``).
"""

from __future__ import annotations

import numpy as np

KINDS = ("iid", "paired_shared", "heavy_tailed", "relu_sparse")

# Scale of the per-view noise around the shared scene (see the module docstring).
NOISE = 0.3
# Degrees of freedom of the heavy-tailed kind: the smallest integer with finite variance.
T_DOF = 3
# ReLU threshold of the sparse kind; 1.0 leaves about 17% of entries non-zero.
RELU_OFFSET = 1.0


def _rng(rng):
    return rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)


def _latent(kind, n, d, rng):
    """Pre-nonlinearity views (clean, cluttered) and their marginal sd per coordinate."""
    if kind == "iid":
        return rng.standard_normal((n, d)), rng.standard_normal((n, d)), 1.0
    if kind in ("paired_shared", "relu_sparse"):
        scene = rng.standard_normal((n, d))
        a = scene + NOISE * rng.standard_normal((n, d))
        b = scene + NOISE * rng.standard_normal((n, d))
        return a, b, float(np.sqrt(1.0 + NOISE**2))
    if kind == "heavy_tailed":
        scene = rng.standard_t(T_DOF, (n, d))
        a = scene + NOISE * rng.standard_t(T_DOF, (n, d))
        b = scene + NOISE * rng.standard_t(T_DOF, (n, d))
        # Var t_nu = nu / (nu - 2)
        return a, b, float(np.sqrt(T_DOF / (T_DOF - 2) * (1.0 + NOISE**2)))
    raise ValueError(f"unknown kind {kind!r}; choose one of {KINDS}")


def _observe(kind, latent):
    if kind == "relu_sparse":
        return np.maximum(latent - RELU_OFFSET, 0.0)
    return latent


def null(kind, n, d, rng):
    """Paired features under the null: views exchangeable within each pair.

    Parameters
    ----------
    kind : {"iid", "paired_shared", "heavy_tailed", "relu_sparse"}
    n, d : int
        Pairs and features.
    rng : numpy.random.Generator or int
        Random source (an int seeds a new Generator).

    Returns
    -------
    clean, cluttered : ndarray of shape (n, d)
    """
    a, b, _ = _latent(kind, n, d, _rng(rng))
    return _observe(kind, a), _observe(kind, b)


def shifted(kind, n, d, rng, shift=0.35, fraction=0.25):
    """Paired features under a mean-shift alternative.

    The cluttered view's first ``max(1, round(fraction * d))`` coordinates are moved by
    ``shift`` marginal standard deviations. The shift is added before the kind's
    nonlinearity (only ``relu_sparse`` has one), so its zeros stay zeros; there the
    shift of the observed mean is smaller than ``shift`` sd.

    Parameters
    ----------
    kind, n, d, rng
        As for :func:`null`.
    shift : float, default=0.35
        Size of the shift in marginal sd of one coordinate.
    fraction : float, default=0.25
        Share of the coordinates that move.

    Returns
    -------
    clean, cluttered : ndarray of shape (n, d)
    """
    a, b, sd = _latent(kind, n, d, _rng(rng))
    k = max(1, int(round(fraction * d)))
    b[:, :k] += shift * sd
    return _observe(kind, a), _observe(kind, b)
