"""What a scene request may ask for: clutter factors, part kinds, image size and level.

The checks here run before anything is drawn or written, so a bad request fails with a
one-line :class:`~invariance.errors.InvarianceError` and leaves nothing behind.
"""

from __future__ import annotations

import numpy as np

from invariance.errors import InvarianceError

FACTORS = ("surface", "distractors", "lighting")
PART_KINDS = ("bolt", "nut", "washer", "gear", "bracket")

MIN_SIZE, MAX_SIZE = 32, 1024
MAX_LEVEL = 3


def _is_int(value) -> bool:
    """True for Python and numpy integers; booleans are refused although ``bool`` is an ``int``."""
    return not isinstance(value, bool) and isinstance(value, (int, np.integer))


def _check_factors(factors) -> tuple[str, ...]:
    """The requested factors in :data:`FACTORS` order; a comma-separated string is accepted."""
    wanted = f"factors must be a subset of {','.join(FACTORS)}"
    if factors is None:
        raise InvarianceError(f"{wanted}, got None")
    if isinstance(factors, str):
        factors = [f for f in (p.strip() for p in factors.split(",")) if f]
    try:
        items = list(factors)
    except TypeError:
        raise InvarianceError(f"{wanted}, got {factors!r}") from None
    unknown = [f for f in items if f not in FACTORS]
    if unknown:
        raise InvarianceError(
            f"unknown clutter factor {unknown[0]!r}: choose from {','.join(FACTORS)}"
        )
    return tuple(f for f in FACTORS if f in items)


def _check_params(size, factors, level) -> tuple[int, tuple[str, ...], int | None]:
    """Validated ``(size, factors, level)`` as plain Python values."""
    if not _is_int(size) or not (MIN_SIZE <= size <= MAX_SIZE):
        raise InvarianceError(f"size must be an integer from {MIN_SIZE} to {MAX_SIZE} pixels, got {size!r}")
    if level is not None and (not _is_int(level) or not (0 <= level <= MAX_LEVEL)):
        raise InvarianceError(f"level must be 0, 1, 2, 3 or None (random 1-3 per pair), got {level!r}")
    factors = _check_factors(factors)
    if not factors and level != 0:
        raise InvarianceError(
            "factors is empty: choose at least one of "
            f"{','.join(FACTORS)}, or use level 0 for identical control pairs"
        )
    return int(size), factors, None if level is None else int(level)


def _check_run(pairs, seed) -> None:
    """Refuse a pair count below 1 and a negative seed."""
    if not _is_int(pairs) or pairs < 1:
        raise InvarianceError(f"pairs must be an integer of at least 1, got {pairs!r}")
    if not _is_int(seed) or seed < 0:
        raise InvarianceError(f"seed must be a non-negative integer, got {seed!r}")
