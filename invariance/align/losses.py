"""The alignment's loss terms, shared by training and the step benchmark.

Each term is a plain function of feature batches, so the benchmark of a training step
(``invariance/bench.py``) runs exactly the formulas training runs.

References
----------
Ganin et al. (2016). Domain-adversarial training of neural networks. JMLR 17, 59:1-35.
Ledoit, O. & Wolf, M. (2004). A well-conditioned estimator for large-dimensional
covariance matrices. J. Multivariate Analysis 88, 365-411.
Gretton, A. et al. (2012). A kernel two-sample test. JMLR 13, 723-773, section 2.
"""

from __future__ import annotations

import numpy as np
import torch
from torch import nn
from torch.nn import functional as F

from .reversal import gradient_reversal

# Floor of the per-feature variance that standardises the paired term, as a share of the
# mean feature variance: a feature nearly constant on clean scenes would otherwise turn a
# tiny cluttered response into a huge loss (common practice for variance floors).
PAIRED_VARIANCE_FLOOR = 1e-3
# Smallest eigenvalue kept by the whitening, relative to the largest: a constant feature
# set has a zero covariance and the floor keeps the matrix finite (common practice).
_EIGENVALUE_FLOOR = 1e-9


def whitening(features: torch.Tensor) -> torch.Tensor:
    """A matrix ``W`` with ``W @ W.T`` the inverse of the features' shrunk covariance.

    ``||(a - b) @ W||^2`` is then the squared Mahalanobis distance between ``a`` and ``b``.
    The Ledoit-Wolf covariance stays invertible with fewer images than feature dimensions
    (a few hundred training images for 128-512 features here).

    Parameters
    ----------
    features : torch.Tensor of shape (n, d)

    Returns
    -------
    torch.Tensor of shape (d, d)
        float32, on the features' device.

    References
    ----------
    Ledoit & Wolf, J. Multivariate Analysis 88 (2004) 365-411.
    """
    from sklearn.covariance import LedoitWolf

    cov = LedoitWolf().fit(features.detach().cpu().double().numpy()).covariance_
    eigenvalues, eigenvectors = np.linalg.eigh(cov)
    floor = max(float(eigenvalues.max()), 1e-12) * _EIGENVALUE_FLOOR
    matrix = eigenvectors / np.sqrt(np.maximum(eigenvalues, floor))
    return torch.as_tensor(matrix, dtype=torch.float32, device=features.device)


def paired_variance(features: torch.Tensor) -> torch.Tensor:
    """Per-feature variance of the original clean features, floored for :func:`paired_loss`.

    The floor is :data:`PAIRED_VARIANCE_FLOOR` of the mean variance.

    Parameters
    ----------
    features : torch.Tensor of shape (n, d)

    Returns
    -------
    torch.Tensor of shape (d,)
    """
    variance = features.var(dim=0)
    floor = PAIRED_VARIANCE_FLOOR * float(variance.mean().clamp_min(1e-12))
    return variance.clamp_min(floor)


def paired_loss(clean: torch.Tensor, cluttered: torch.Tensor, variance: torch.Tensor) -> torch.Tensor:
    """Mean over pairs and features of ``(cluttered - clean)^2 / variance``, clean side detached.

    The clean feature is the target each cluttered view is pulled to, not a thing to move.
    Dividing by each feature's own clean variance matters because the domain classifier
    reads standardised features: a residual shift in a low-variance feature separates the
    views as well as one in a high-variance feature.

    Parameters
    ----------
    clean, cluttered : torch.Tensor of shape (n, d)
        Row i of each is the same scene.
    variance : torch.Tensor of shape (d,)
        From :func:`paired_variance`.

    Returns
    -------
    torch.Tensor
        A scalar.
    """
    return ((cluttered - clean.detach()) ** 2 / variance).mean()


def paired_drift_loss(clean: torch.Tensor, cluttered: torch.Tensor) -> torch.Tensor:
    """The batch's relative cosine drift: what ``invariance score`` reports, made differentiable.

    Mean over pairs of ``1 - cos(clean_i, cluttered_i)`` (clean side detached: it is the
    target each cluttered view is pulled to), divided by the mean ``1 - cos(clean_i,
    clean_j)`` over different clean scenes of the batch (with gradient). It is the project's
    relative drift (:func:`invariance.metrics.drift.paired_drift`) with the mean in place
    of the median scene distance, so the loss needs no normalisation: cosines ignore the
    feature scale and the dimension, and dividing by the clean scenes' spread makes the
    trivial answer (every feature constant, every view the same) cost as much as doing
    nothing. A loss on distances in fixed units has that trivial answer; on a plain CNN
    without normalisation it cut its own value 98% while the measured drift doubled
    (docs/alignment.md).

    Parameters
    ----------
    clean, cluttered : torch.Tensor of shape (n, d)
        Row i of each is the same scene; n >= 2.

    Returns
    -------
    torch.Tensor
        A scalar.
    """
    drift = 1.0 - F.cosine_similarity(clean.detach(), cluttered, dim=1, eps=1e-8)
    unit = F.normalize(clean, dim=1, eps=1e-8)
    distances = 1.0 - unit @ unit.T
    n = len(clean)
    typical = (distances.sum() - distances.diagonal().sum()) / (n * (n - 1))
    return drift.mean() / typical.clamp_min(1e-8)


def mean_matching_loss(clean: torch.Tensor, cluttered: torch.Tensor, whitening: torch.Tensor) -> torch.Tensor:
    """Squared Mahalanobis distance between the two views' mean features, per dimension.

    With ``whitening`` from the original clean features' covariance this is the squared
    distance of the means in whitened coordinates, i.e. the linear-kernel MMD^2 of the
    whitened features divided by their dimension. It measures what a linear domain
    classifier exploits (the class means' Mahalanobis distance sets the accuracy of Fisher's
    discriminant), which the per-scene paired term leaves mostly untouched: there the mean
    shift is a small part of each pair's squared distance.

    Parameters
    ----------
    clean, cluttered : torch.Tensor of shape (n, d)
    whitening : torch.Tensor of shape (d, d)
        From :func:`whitening`.

    Returns
    -------
    torch.Tensor
        A scalar.

    References
    ----------
    Gretton et al., JMLR 13 (2012) 723-773, section 2 (MMD with a linear kernel).
    """
    shift = (cluttered.mean(dim=0) - clean.mean(dim=0)) @ whitening
    return (shift ** 2).mean()


def anchor_loss(clean: torch.Tensor, original: torch.Tensor, scale: torch.Tensor) -> torch.Tensor:
    """Mean squared distance of clean features from the original encoder's, over ``scale``.

    With ``scale`` the mean variance of the original clean features, a weight of 1 makes
    "clean features moved by one typical spread" cost about as much as a confused
    discriminator's loss (log 2 ~ 0.69), whatever the encoder's feature scale.

    Parameters
    ----------
    clean, original : torch.Tensor of shape (n, d)
    scale : torch.Tensor
        A positive scalar.

    Returns
    -------
    torch.Tensor
        A scalar.
    """
    return ((clean - original) ** 2).mean() / scale


def domain_loss(discriminator: nn.Module, clean: torch.Tensor, cluttered: torch.Tensor,
                lambda_: float) -> tuple[torch.Tensor, torch.Tensor]:
    """The discriminator's logistic loss on both views, seen through gradient reversal.

    Parameters
    ----------
    discriminator : nn.Module
        Features to one logit ("cluttered" when positive).
    clean, cluttered : torch.Tensor of shape (n, d)
    lambda_ : float
        Adaptation weight of the reversal.

    Returns
    -------
    loss, accuracy : torch.Tensor
        Scalars: the binary cross-entropy and the discriminator's accuracy on the batch.

    References
    ----------
    Ganin et al., JMLR 2016, eq. 16-17.
    """
    features = torch.cat([clean, cluttered])
    domain = torch.cat([torch.zeros(len(clean)), torch.ones(len(cluttered))]).to(features.device)
    logits = discriminator(gradient_reversal(features, lambda_)).squeeze(1)
    loss = F.binary_cross_entropy_with_logits(logits, domain)
    return loss, ((logits > 0).float() == domain).float().mean()
