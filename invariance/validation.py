"""Parameter checks with one message format, built on scikit-learn's ``check_scalar``.

Every public function and options object validates through these helpers, so a bad value
always reads ``name=value is not valid: reason; pass ...`` and raises
:class:`InvalidParameter`, which names the parameter (the command line maps that name to
its flag).
"""

from __future__ import annotations

import math
import numbers

import numpy as np
from sklearn.utils import check_scalar

from .errors import InvalidParameter


def _fail(name: str, value, wanted: str, reason: str | None = None):
    why = f": {reason}" if reason else ""
    raise InvalidParameter(name, f"{name}={value!r} is not valid{why}; pass {wanted}")


def _bounds_text(kind: str, low, high, include_low: bool = True, include_high: bool = True) -> str:
    if low is not None and high is not None:
        left = "from" if include_low else "above"
        right = "to" if include_high else "below"
        return f"{kind} {left} {low} {right} {high}"
    if low is not None:
        return f"{kind} {'of at least' if include_low else 'above'} {low}"
    if high is not None:
        return f"{kind} {'of at most' if include_high else 'below'} {high}"
    return kind


def check_int(name: str, value, *, low: int | None = None, high: int | None = None,
              allow_none: bool = False) -> int | None:
    """``value`` as an ``int`` within ``[low, high]``; booleans are refused."""
    if value is None and allow_none:
        return None
    wanted = _bounds_text("an integer", low, high)
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Integral):
        _fail(name, value, wanted)
    try:
        return int(check_scalar(int(value), name, numbers.Integral, min_val=low, max_val=high))
    except (TypeError, ValueError):
        _fail(name, value, wanted)


def check_float(name: str, value, *, low: float | None = None, high: float | None = None,
                include_low: bool = True, include_high: bool = True, allow_none: bool = False) -> float | None:
    """``value`` as a finite ``float`` within the given bounds; booleans, NaN and inf are refused."""
    if value is None and allow_none:
        return None
    wanted = _bounds_text("a finite number", low, high, include_low, include_high)
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Real):
        _fail(name, value, wanted)
    if not math.isfinite(float(value)):
        _fail(name, value, wanted, "not finite")
    closed = {(True, True): "both", (True, False): "left", (False, True): "right", (False, False): "neither"}
    try:
        return float(check_scalar(float(value), name, numbers.Real, min_val=low, max_val=high,
                                  include_boundaries=closed[(include_low, include_high)]))
    except (TypeError, ValueError):
        _fail(name, value, wanted)


def check_seed(value, name: str = "seed") -> int:
    """A seed for numpy's and torch's generators: an integer from 0 to 2**63 - 1."""
    return check_int(name, value, low=0, high=2**63 - 1)


def check_choice(name: str, value, choices) -> str:
    """``value`` if it is one of ``choices``."""
    if not isinstance(value, str) or value not in choices:
        _fail(name, value, "one of " + ", ".join(map(repr, choices)))
    return value


def check_bool(name: str, value) -> bool:
    """``value`` if it is ``True`` or ``False``."""
    if not isinstance(value, (bool, np.bool_)):
        _fail(name, value, "True or False")
    return bool(value)
