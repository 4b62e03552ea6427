"""A whole policy's outputs on both views of every pair, for output drift in the output's units."""

from __future__ import annotations

import numpy as np
import torch

from invariance.errors import InvarianceError
from invariance.progress import as_reporter
from invariance.validation import check_int

from ..data import load_rgb
from ..encoders.messages import _first_line, _on_images
from ._common import _check_encoder


def _run(encoder, batch: torch.Tensor, names) -> np.ndarray:
    """The module's raw output of one batch as float64 (rows, d); only (N, D) tensors pass."""
    try:
        with torch.inference_mode():
            out = encoder.module(batch.to(encoder.device))
    except Exception as exc:  # noqa: BLE001 - user code may raise anything
        raise InvarianceError(f"policy {encoder.spec} failed{_on_images(names)} ({_first_line(exc)}); "
                              "fix the model's code or its input size") from None
    if not isinstance(out, torch.Tensor) or out.dim() != 2 or out.shape[0] != batch.shape[0]:
        shape = tuple(out.shape) if isinstance(out, torch.Tensor) else type(out).__name__
        raise InvarianceError(
            f"policy {encoder.spec} returns {shape} for a batch of {batch.shape[0]} images, not one 1-D output per "
            "image (N, D); output drift needs the action or state vector: flatten or select it in the model"
        )
    return out.detach().double().cpu().numpy()


def policy_outputs(pairs, encoder, *, batch_size: int = 32, progress=False) -> tuple[np.ndarray, np.ndarray]:
    """The raw outputs of a whole policy (encoder plus head) on the clean and cluttered views.

    Unlike feature extraction nothing is pooled: the module's own output is taken as it
    is, and anything but one vector per image is refused, because output drift is read in
    the output's units.

    Parameters
    ----------
    pairs : invariance.data.PairSet
    encoder : Encoder
        A policy loaded with :func:`invariance.encoders.load_encoder` (``python:`` or
        ``torchscript:`` spec) whose module returns (N, D).
    batch_size : int, default=32
        Pairs per forward pass (both views of each).
    progress : bool, callable or Reporter

    Returns
    -------
    clean, cluttered : ndarray of shape (n_pairs, d), float64
        Row i of each is pair i; feed them to
        :func:`invariance.metrics.output_drift.output_drift`.
    """
    encoder = _check_encoder(encoder)
    batch_size = check_int("batch_size", batch_size, low=1)
    rows = []
    with as_reporter(progress).bar(len(pairs), f"policy outputs {encoder.spec}") as bar:
        for start in range(0, len(pairs), batch_size):
            idx = range(start, min(start + batch_size, len(pairs)))
            names = [f"{view}/{pairs.names[i]}" for i in idx for view in ("clean", "cluttered")]
            views = [encoder.preprocess(load_rgb(p)) for i in idx for p in (pairs.clean[i], pairs.cluttered[i])]
            rows.append(_run(encoder, torch.stack(views), names))
            bar.update(len(idx))
    out = np.concatenate(rows)
    if not np.isfinite(out).all():
        raise InvarianceError(f"policy {encoder.spec} gives NaN or infinite outputs; check its weights and inputs")
    return out[0::2], out[1::2]


def policy_output_drift(pairs, encoder, tolerance=None, *, batch_size: int = 32, progress=False) -> dict:
    """Output drift of a whole policy on a data set, in the output's units.

    :func:`policy_outputs` then :func:`invariance.metrics.output_drift.output_drift`; a
    tolerance of the wrong length is refused before the policy runs on every pair.

    Parameters
    ----------
    pairs : invariance.data.PairSet
    encoder : Encoder
        The policy, whose module returns (N, D).
    tolerance : array-like of shape (D,) or str, optional
        Largest acceptable change per output dimension (``"0.01,0.01,0.02"`` accepted).
    batch_size : int, default=32
    progress : bool, callable or Reporter

    Returns
    -------
    dict
        As :func:`~invariance.metrics.output_drift.output_drift`, with pair names.
    """
    from ..metrics.output_drift import output_drift

    if tolerance is not None and len(pairs):  # one pair first: a wrong length fails in seconds
        first_clean, first_cluttered = policy_outputs(pairs.subset([0]), encoder, batch_size=1)
        output_drift(first_clean, first_cluttered, tolerance)
    clean, cluttered = policy_outputs(pairs, encoder, batch_size=batch_size, progress=progress)
    return output_drift(clean, cluttered, tolerance, names=pairs.names)
