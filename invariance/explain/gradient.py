"""Gradient times input of the drift: the fast, first-order drift map.

The gradient of the drift d(x) = 1 - cos(f(x), f(clean)) with respect to the cluttered
view's pixels says how strongly each pixel pulls the feature (a saliency map, Simonyan,
Vedaldi & Zisserman, ICLR 2014 workshop, "Deep inside convolutional networks"). Multiplied
by the change that clutter made to that pixel, (cluttered - clean), it becomes the
first-order Taylor estimate of the drift each pixel adds: the gradient-times-input
attribution with the clean view as the baseline (Shrikumar, Greenside & Kundaje, ICML
2017, "Learning important features through propagating activation differences";
Ancona, Ceolini, Öztireli & Gross, ICLR 2018). One forward and one backward pass, but
only a linear estimate: where the encoder is far from linear between the two views the
occlusion map (:mod:`.occlusion`) is the exact figure.

The encoder's preprocessing (resize, centre crop, normalisation) is rebuilt from torch
operations (:func:`._common._preprocess`) so the gradient reaches the stored pixels.
"""

from __future__ import annotations

import torch

from invariance.errors import InvarianceError

from ..encoders.messages import _first_line
from ._common import _check_encoder, _check_resized, _layer_runner, _pair_arrays, _preprocess, _to_tensor


def _pooled(encoder, run, key, x: torch.Tensor, name: str) -> torch.Tensor:
    from ..encoders.taps import _pool

    try:
        out = run(_preprocess(encoder.preprocess, x))
    except InvarianceError:
        raise
    except Exception as exc:  # noqa: BLE001 - user code may raise anything
        raise InvarianceError(f"encoder {encoder.spec} failed on pair {name} ({_first_line(exc)}); "
                              "try --method occlusion, which runs the encoder as feature extraction does") from None
    return _pool(out[key], encoder.layout, key, encoder.spec, [name]).double()


def gradient_map(encoder, clean, cluttered, *, layer: str | None = None, name: str = "(unnamed)") -> dict:
    """First-order drift map: gradient of the drift times (cluttered - clean), per pixel.

    Parameters
    ----------
    encoder : Encoder
        From :func:`invariance.encoders.load_encoder`; its module must be differentiable.
    clean, cluttered : PIL.Image.Image or ndarray of shape (H, W, 3), uint8
        The two views of one scene, at the size they are stored.
    layer : str, optional
        Graph node whose pooled feature is compared; default the output feature.
    name : str, default="(unnamed)"
        The pair's name, for messages.

    Returns
    -------
    dict
        ``method`` ("gradient"), ``map`` (float64 (H, W): gradient of 1 - cos with respect
        to the pixel, in [0, 1] intensity units, times the pixel's change, summed over
        the three channels; the map sums to the linear estimate of the drift), ``drift``
        (1 - cos of the pair), ``layer``, ``forward_images`` (2).
    """
    encoder = _check_encoder(encoder)
    clean_arr, cluttered_arr = _pair_arrays(clean, cluttered, name)
    _check_resized(encoder, clean_arr.shape, name)
    run, key = _layer_runner(encoder, layer)
    x_clean = _to_tensor(clean_arr, encoder.device)
    x = _to_tensor(cluttered_arr, encoder.device).requires_grad_(True)
    with torch.inference_mode(False), torch.enable_grad():
        with torch.no_grad():
            reference = _pooled(encoder, run, key, x_clean, name)
        feature = _pooled(encoder, run, key, x, name)
        cos = torch.nn.functional.cosine_similarity(feature, reference, dim=1)
        drift = 1.0 - cos.sum()
        if not bool(torch.isfinite(drift.detach())) or not bool((feature.detach().norm() > 0) & (reference.norm() > 0)):
            raise InvarianceError(f"pair {name}: the feature is zero or not finite, so the cosine drift is "
                                  "undefined; tap another layer (--layer)")
        (grad,) = torch.autograd.grad(drift, x)
    attribution = (grad * (x.detach() - x_clean)).sum(dim=1)[0]
    return {
        "method": "gradient",
        "map": attribution.cpu().double().numpy(),
        "drift": max(float(drift.detach()), 0.0),
        "layer": key if layer is None else layer,
        "forward_images": 2,
    }
