"""Output drift: how far clutter moves a whole policy's output, in the output's own units.

When the encoder is the front of a policy (encoder plus head, one action or state vector
per image), the number a robotics engineer compares with the controller's tolerance is
the change of the output itself: per output dimension j and pair i,

    delta_ij = |f(cluttered_i)_j - f(clean_i)_j|,

summarised over pairs by its median and 95th percentile (numpy's default linear
interpolation between order statistics, definition 7 of Hyndman & Fan, The American
Statistician 50, 1996), and, given a tolerance per dimension, the share of pairs whose
change exceeds it, with an exact Clopper-Pearson 95% interval (Clopper & Pearson,
Biometrika 26, 1934). Numpy in, plain dict out.
"""

from __future__ import annotations

import numpy as np

from invariance import SAFETY_CAUTION
from invariance.errors import InvalidParameter, InvarianceError

# The option that carries the tolerance on the command line, named in every message
# about it so the user knows which value to fix.
TOLERANCE_OPTION = "--output-tolerance"
_PERCENTILE = 95.0
_CI_LEVEL = 0.95


def parse_tolerance(text: str) -> np.ndarray:
    """The tolerance vector from ``"0.01,0.01,0.02"`` (one non-negative number per output dimension).

    Parameters
    ----------
    text : str
        Comma-separated numbers, in the output's units.

    Returns
    -------
    ndarray of shape (d,), float64

    Raises
    ------
    InvalidParameter
        (parameter ``output_tolerance``) a value that is not a finite number >= 0.
    """
    parts = [p.strip() for p in str(text).split(",")]
    try:
        values = np.array([float(p) for p in parts], dtype=np.float64)
    except ValueError:
        raise InvalidParameter("output_tolerance", f"output_tolerance={text!r} is not valid: give comma-separated "
                                                   "numbers in the output's units, e.g. 0.01,0.01,0.02") from None
    if not np.isfinite(values).all() or (values < 0).any():
        raise InvalidParameter("output_tolerance", f"output_tolerance={text!r} is not valid: every tolerance must be "
                                                   "a finite number of at least 0")
    return values


def _check_outputs(clean, cluttered) -> tuple[np.ndarray, np.ndarray]:
    """Both outputs as float64 (n, d), refusing anything but one vector per image."""
    clean, cluttered = np.asarray(clean), np.asarray(cluttered)
    for name, arr in (("clean", clean), ("cluttered", cluttered)):
        if arr.ndim != 2 or arr.shape[0] < 1 or arr.shape[1] < 1:
            raise InvarianceError(
                f"the policy's {name} outputs have shape {arr.shape}, not one vector per image (n_pairs, d); "
                "output drift needs a 1-D action or state output per image: flatten or select it in the model"
            )
        if not np.issubdtype(arr.dtype, np.number) or not np.isfinite(arr).all():
            raise InvarianceError(f"the policy's {name} outputs hold NaN, infinite or non-numeric values; "
                                  "fix the model or its inputs")
    if clean.shape != cluttered.shape:
        raise InvarianceError(f"clean outputs have shape {clean.shape} but cluttered outputs {cluttered.shape}; "
                              "give one row per pair, in the same order")
    return clean.astype(np.float64), cluttered.astype(np.float64)


def _check_tolerance(tolerance, d: int) -> np.ndarray | None:
    if tolerance is None:
        return None
    tol = parse_tolerance(tolerance) if isinstance(tolerance, str) else np.asarray(tolerance, dtype=np.float64)
    if tol.ndim != 1 or not np.isfinite(tol).all() or (tol < 0).any():
        raise InvalidParameter("output_tolerance", f"output_tolerance={tolerance!r} is not valid: give one finite "
                                                   "number >= 0 per output dimension")
    if tol.size != d:
        raise InvarianceError(
            f"{TOLERANCE_OPTION} has {tol.size} value(s) but the policy outputs {d} number(s) per image; "
            f"give one tolerance per output dimension, in the output's units"
        )
    return tol


def _share(k: int, n: int) -> tuple[float, list[float]]:
    """``k / n`` and its exact Clopper-Pearson 95% interval."""
    from scipy.stats import binomtest

    ci = binomtest(int(k), int(n)).proportion_ci(confidence_level=_CI_LEVEL, method="exact")
    return k / n, [float(ci.low), float(ci.high)]


def _dimension(j: int, delta: np.ndarray, tol: np.ndarray | None) -> dict:
    row = {
        "dimension": j,
        "median": float(np.median(delta)),
        "p95": float(np.percentile(delta, _PERCENTILE)),
        "max": float(delta.max()),
        "tolerance": None, "pairs_exceeding": None, "share_exceeding": None, "share_exceeding_ci": None,
    }
    if tol is not None:
        k = int((delta > tol[j]).sum())
        share, ci = _share(k, delta.size)
        row.update(tolerance=float(tol[j]), pairs_exceeding=k, share_exceeding=share, share_exceeding_ci=ci)
    return row


def output_drift(clean, cluttered, tolerance=None, *, names=None) -> dict:
    """Per output dimension, how far clutter moves a policy's output, in its own units.

    Parameters
    ----------
    clean, cluttered : array-like of shape (n_pairs, d)
        The policy's output on the clean and on the cluttered view; row i of each is
        scene i (:func:`invariance.explain.policy_outputs` runs a policy on a data set).
        Anything but one vector per image is refused.
    tolerance : array-like of shape (d,) or str, optional
        Largest acceptable change per output dimension, in the output's units (a string
        is read as ``"0.01,0.01,0.02"``). A wrong length is an error naming
        ``--output-tolerance``.
    names : sequence of str, optional
        Pair names, to list the pair with the largest change.

    Returns
    -------
    dict
        ``pairs``, ``dimensions``, ``per_dimension`` (one dict per output dimension:
        ``dimension``, ``median``, ``p95``, ``max`` of |cluttered - clean|, and with a
        tolerance ``tolerance``, ``pairs_exceeding``, ``share_exceeding`` (change >
        tolerance) and ``share_exceeding_ci``), ``any_exceeding`` and
        ``any_exceeding_ci`` (pairs where at least one dimension exceeds; ``None``
        without a tolerance), ``largest_change_pair``, ``statistic``, ``ci_method`` and
        ``caution``.
    """
    clean, cluttered = _check_outputs(clean, cluttered)
    n, d = clean.shape
    tol = _check_tolerance(tolerance, d)
    delta = np.abs(cluttered - clean)
    any_share = any_ci = None
    if tol is not None:
        any_share, any_ci = _share(int((delta > tol).any(axis=1).sum()), n)
    worst = int(np.argmax((delta / tol).max(axis=1) if tol is not None and (tol > 0).all() else delta.max(axis=1)))
    return {
        "pairs": n,
        "dimensions": d,
        "per_dimension": [_dimension(j, delta[:, j], tol) for j in range(d)],
        "any_exceeding": any_share,
        "any_exceeding_ci": any_ci,
        "largest_change_pair": names[worst] if names is not None else worst,
        "statistic": "|f(cluttered) - f(clean)| per output dimension over pairs, in the output's units; "
                     "median and 95th percentile by linear interpolation (Hyndman & Fan 1996, definition 7)",
        "ci_method": "exact Clopper-Pearson 95% for the shares of pairs exceeding the tolerance",
        "caution": SAFETY_CAUTION,
    }


def describe_output_drift(result: dict) -> list[str]:
    """Terminal lines for an :func:`output_drift` result, ending with the safety caution.

    Parameters
    ----------
    result : dict

    Returns
    -------
    list of str
    """
    lines = [f"output drift over {result['pairs']} pairs (|cluttered - clean|, in the output's units):"]
    for row in result["per_dimension"]:
        text = f"  output[{row['dimension']}]: median {row['median']:.4g}, 95th percentile {row['p95']:.4g}"
        if row["tolerance"] is not None:
            low, high = row["share_exceeding_ci"]
            text += (f"; above tolerance {row['tolerance']:.4g} in {row['pairs_exceeding']} of {result['pairs']} "
                     f"pairs ({row['share_exceeding']:.3f} [{low:.3f}, {high:.3f}])")
        lines.append(text)
    if result["any_exceeding"] is not None:
        low, high = result["any_exceeding_ci"]
        lines.append(f"  any output above its tolerance: {result['any_exceeding']:.3f} of pairs "
                     f"[{low:.3f}, {high:.3f}]")
    lines.append(f"note: {SAFETY_CAUTION}")
    return lines
