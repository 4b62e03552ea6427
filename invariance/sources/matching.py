"""Matching two domains' sources: paired by (episode, frame index), or unpaired."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from invariance.errors import InvarianceError

_LISTED = 10


@dataclass
class Domains:
    """Two opened sources and how they are matched.

    ``mode`` is ``"paired"`` (both hold the same episodes; rows join on (episode, frame
    index)) or ``"unpaired"``; ``notes`` says why, ``skipped`` lists episodes dropped.
    """

    a: object
    b: object
    mode: str
    notes: list = field(default_factory=list)
    skipped: list = field(default_factory=list)


def _listing(names) -> str:
    names = sorted(names)
    shown = ", ".join(names[:_LISTED])
    return shown + (f" and {len(names) - _LISTED} more" if len(names) > _LISTED else "")


def match_domains(a, b, options) -> Domains:
    """Decide paired or unpaired before any frame is read (bad matches fail fast).

    Paired when both sources share episode names and ``options.unpaired`` is off. An
    episode present in one domain only stops the run with the list, unless
    ``options.skip_unpaired`` drops it (recorded in ``skipped``). No shared name at all
    means unpaired domains, announced in ``notes``.
    """
    names_a, names_b = {e.name for e in a.episodes}, {e.name for e in b.episodes}
    shared = names_a & names_b
    if options.unpaired:
        notes = ["scored as unpaired domains (--unpaired)"]
        if shared:
            notes.append(f"the domains share {len(shared)} episode names; if those are recordings of the same "
                         f"scenes, score them paired: an unpaired classifier can learn the scenes and fall below "
                         f"chance, and the unpaired tests lose power")
        return Domains(a, b, "unpaired", notes)
    if not shared:
        return Domains(a, b, "unpaired", [
            f"the two domains share no episode name ({len(names_a)} and {len(names_b)} episodes): scored as "
            f"unpaired domains; paired-only measures (drift, pair retrieval, CKA) are not computed"])
    only = sorted(f"A:{n}" for n in names_a - shared) + sorted(f"B:{n}" for n in names_b - shared)
    if only and not options.skip_unpaired:
        raise InvarianceError(
            f"{len(only)} episodes are in one domain only: {_listing(only)}; record them in both, pass "
            f"--skip-unpaired to score the {len(shared)} shared episodes, or --unpaired to drop the pairing"
        )
    for source in (a, b):
        source.episodes = [e for e in source.episodes if e.name in shared]
    notes = [f"paired by (episode, frame index) over {len(shared)} shared episodes"]
    if only:
        notes.append(f"{len(only)} episodes in one domain only were skipped (--skip-unpaired)")
    return Domains(a, b, "paired", notes, only)


def join_rows(keys_a, keys_b):
    """Row indices of A and B whose (episode, frame index) keys match, in A's order.

    Returns
    -------
    idx_a, idx_b : ndarray of int
    unmatched : int
        Rows of either domain without a partner (e.g. a video cut short in one domain).
    """
    where_b = {key: i for i, key in enumerate(keys_b)}
    idx_a, idx_b = [], []
    for i, key in enumerate(keys_a):
        j = where_b.get(key)
        if j is not None:
            idx_a.append(i)
            idx_b.append(j)
    unmatched = len(keys_a) + len(keys_b) - 2 * len(idx_a)
    return np.asarray(idx_a, dtype=np.intp), np.asarray(idx_b, dtype=np.intp), unmatched
