"""Every metric per clutter factor value, with the subgroup tests corrected for multiplicity.

``breakdowns`` keeps the shape ``{column: {value: {"pairs", "metrics"}}}``. Each subgroup's
domain-classifier and MMD p-values get a Holm-adjusted partner ``p_value_adjusted``
(Holm, Scand. J. Statist. 6, 1979); the correction itself, and the subgroups too small
for the tests, are reported once beside the breakdowns (``breakdowns_correction``,
``breakdowns_skipped``), never inside a column. Unpaired domains have no pairs: their
subgroup is the rows of both domains that share a value (``unpaired_subgroups``), sized in
``rows`` and ``groups`` per domain instead of ``pairs``, tested and corrected the same way.

Why Holm and not Benjamini-Hochberg (JRSS B 57, 1995): each pair sits in one subgroup of
every column, so tests of different columns share pairs and are dependent in ways no one
can check. Holm controls the family-wise error rate under any dependence; BH controls the
false discovery rate under independence or positive regression dependence only
(Benjamini & Yekutieli, Ann. Statist. 29, 2001). The families are small (a few factors of
three or four values), where Holm costs little power, and a reader acts on each flagged
subgroup by itself ("lighting 2 moves the features"), which is the claim FWER protects.
"""

from __future__ import annotations

import copy
import os
from concurrent.futures import ThreadPoolExecutor

import numpy as np

# The subgroup tests that are corrected; each is its own family across all columns.
TESTED = ("domain_classifier", "mmd")

# Most worker threads for the subgroups (their numpy products release the GIL; BLAS stays
# single-threaded); more workers than cores only queue (common practice).
MAX_WORKERS = 4


def holm_adjust(p_values):
    """Holm's step-down adjusted p-values.

    With the m p-values sorted, p_(1) <= ... <= p_(m), the adjusted value of the i-th is
    max_{j <= i} min(1, (m - j + 1) p_(j)) (Holm, "A simple sequentially rejective
    multiple test procedure", Scand. J. Statist. 6, 1979; the adjusted-p form of Wright,
    Biometrics 48, 1992). Rejecting where it is <= alpha is Holm's procedure at level
    alpha, which keeps the family-wise error rate <= alpha under any dependence.

    Parameters
    ----------
    p_values : sequence of float
        Raw p-values in [0, 1].

    Returns
    -------
    ndarray of float
        Adjusted p-values in the input order; ties keep equal adjusted values.
    """
    p = np.asarray(p_values, dtype=np.float64).ravel()
    m = p.size
    if m == 0:
        return p
    order = np.argsort(p, kind="stable")
    stepped = np.maximum.accumulate((m - np.arange(m)) * p[order])
    adjusted = np.empty(m)
    adjusted[order] = np.minimum(stepped, 1.0)
    return adjusted


def _is_missing(value):
    text = str(value)
    return value is None or text == "" or text.lower() == "nan"


def _factor_key(value):
    """A factor value as the breakdown key: 2.0 reads "2", text stays as it is."""
    if isinstance(value, (float, np.floating)) and float(value).is_integer():
        return str(int(value))
    return str(value)


def subgroups(factors):
    """``{column: {value: pair indices}}`` and the number of unlabelled pairs per column."""
    groups, unlabelled = {}, {}
    for column, values in factors.items():
        keys = np.array(["" if _is_missing(v) else _factor_key(v) for v in values.tolist()])
        groups[column] = {
            value: np.flatnonzero(keys == value) for value in sorted(set(keys.tolist()) - {""})
        }
        unlabelled[column] = int((keys == "").sum())
    return groups, unlabelled


def _workers(jobs):
    return max(1, min(MAX_WORKERS, os.cpu_count() or 1, jobs))


def _pair_count(idx):
    return {"pairs": int(idx.size)}


def run(groups, metrics_of, workers=None, counts=_pair_count):
    """Score every subgroup with ``metrics_of(indices)``; the same pairs are scored once.

    With ``workers`` > 1 (``None``: as many as the cores, at most MAX_WORKERS) subgroups
    run on a thread pool; each one is seeded by itself, so the result does not depend on
    the order they finish in. ``counts(indices)`` gives the size keys stored beside each
    subgroup's metrics (default ``{"pairs": n}``).
    """
    unique = {}
    for by_value in groups.values():
        for idx in by_value.values():
            unique.setdefault(idx.tobytes(), idx)
    workers = _workers(len(unique)) if workers is None else workers
    if workers > 1:
        with ThreadPoolExecutor(max_workers=workers) as pool:
            done = dict(zip(unique, pool.map(metrics_of, unique.values())))
    else:
        done = {key: metrics_of(idx) for key, idx in unique.items()}
    # a copy per subgroup: the correction writes into each one
    return {
        column: {
            value: {**counts(idx), "metrics": copy.deepcopy(done[idx.tobytes()])}
            for value, idx in by_value.items()
        }
        for column, by_value in groups.items()
    }


def correct(breakdowns):
    """Add ``p_value_adjusted`` (Holm) to every subgroup test; return the correction note.

    One family per test in ``TESTED``: every subgroup of every column whose test was
    computed. The entries are edited in place.
    """
    tests = {}
    for name in TESTED:
        entries = [
            group["metrics"][name]
            for groups in breakdowns.values()
            for group in groups.values()
            if isinstance(group["metrics"].get(name), dict)
            and group["metrics"][name].get("p_value") is not None
        ]
        for entry, adjusted in zip(entries, holm_adjust([e["p_value"] for e in entries])):
            entry["p_value_adjusted"] = float(adjusted)
        tests[name] = len(entries)
    return {
        "method": "holm",
        "family": "one per test: the p-values of every subgroup of every factor column where "
        "the test was computed",
        "tests": tests,
        "reference": "Holm, Scand. J. Statist. 6 (1979); FWER under any dependence between "
        "subgroups that share pairs or rows",
    }


def skipped(groups, min_pairs, reason):
    """Subgroups with fewer than ``min_pairs`` pairs, each listed once with why."""
    return [
        {"column": column, "value": value, "pairs": int(idx.size), "needed": int(min_pairs),
         "reason": reason}
        for column, by_value in groups.items()
        for value, idx in by_value.items()
        if idx.size < min_pairs
    ]


def warnings(skipped_groups, unlabelled, min_pairs):
    """One sentence for the small subgroups and one per column with unlabelled pairs."""
    out = []
    if skipped_groups:
        listed = ", ".join(f"{s['column']}={s['value']} ({s['pairs']})" for s in skipped_groups[:6])
        more = f" and {len(skipped_groups) - 6} more" if len(skipped_groups) > 6 else ""
        out.append(
            f"{len(skipped_groups)} breakdown subgroups have fewer than {min_pairs} pairs, too "
            f"few for the subgroup tests: {listed}{more} (see breakdowns_skipped)"
        )
    for column, count in unlabelled.items():
        if count:
            out.append(f"{count} pairs have no {column} value and are in none of its subgroups")
    return out


# ---------------------------------------------------------------- unpaired domains
#
# Two domains with no scene in common have no pairs to sort by a factor. A subgroup is
# then the rows of A and the rows of B that share the factor's value, and its tests ask
# "at this value, do the domains still differ?". Rows are numbered in the pooled order
# [A; B], so one index array names a subgroup and ``run`` and ``correct`` serve as they are.


def domain_rows(idx, n_a):
    """Rows of A and rows of B (numbered within B) of a pooled index array."""
    idx = np.asarray(idx)
    return idx[idx < n_a], idx[idx >= n_a] - n_a


def unpaired_subgroups(factors_a, factors_b, n_a):
    """The rows of A and of B that share each factor value.

    Parameters
    ----------
    factors_a, factors_b : dict of str to ndarray
        Factor columns (``factor_*``, ``level``) per row of each domain; an empty cell
        leaves the row out of that column's subgroups.
    n_a : int
        Rows of A; B's rows are numbered after them.

    Returns
    -------
    groups : dict
        ``{column: {value: pooled row indices}}`` for the values both domains have.
    one_sided : list of dict
        For ``breakdowns_skipped``: each column labelled in one domain only, and each value
        found in one domain only, with the reason it cannot be compared.
    unlabelled : dict
        ``{column: [rows of A, rows of B]}`` without a value, for columns in both domains.
    """
    side_a, empty_a = subgroups(factors_a)
    side_b, empty_b = subgroups(factors_b)
    groups, one_sided, unlabelled = {}, [], {}
    for column in [*side_a, *(c for c in side_b if c not in side_a)]:
        values_a, values_b = side_a.get(column, {}), side_b.get(column, {})
        if not values_a or not values_b:
            has, lacks = ("A", "B") if values_a else ("B", "A")
            one_sided.append({"column": column, "labelled_in": has, "reason": (
                f"labelled in domain {has} only: a breakdown compares the two domains' rows at the same value, "
                f"so domain {lacks}'s rows need this column too")})
            continue
        groups[column] = {v: np.r_[values_a[v], n_a + values_b[v]] for v in values_a if v in values_b}
        for value in sorted(set(values_a) ^ set(values_b)):
            has, lacks = ("A", "B") if value in values_a else ("B", "A")
            rows = (values_a if has == "A" else values_b)[value].size
            one_sided.append({"column": column, "value": value, "labelled_in": has, "reason": (
                f"{rows} rows of domain {has} and none of domain {lacks} have this value: nothing to compare")})
        unlabelled[column] = [empty_a[column], empty_b[column]]
    return groups, one_sided, unlabelled


def unpaired_counts(idx, n_a, codes):
    """``{"rows": [A, B], "groups": [A, B]}`` of a subgroup; ``codes`` the pooled group codes."""
    ia, ib = domain_rows(idx, n_a)
    return {"rows": [int(ia.size), int(ib.size)],
            "groups": [int(np.unique(codes[ia]).size), int(np.unique(codes[n_a + ib]).size)]}


def unpaired_skipped(groups, n_a, codes, min_rows, min_groups, reason):
    """Split off the subgroups with fewer than ``min_rows`` rows or ``min_groups`` groups in a domain.

    Returns
    -------
    kept : dict
        ``groups`` without the small subgroups (a column left with none is dropped).
    skipped : list of dict
        Each small subgroup once: ``column``, ``value``, ``rows``, ``groups``, ``needed``
        (rows per domain), ``needed_groups`` and ``reason``.
    """
    kept, small = {}, []
    for column, by_value in groups.items():
        for value, idx in by_value.items():
            size = unpaired_counts(idx, n_a, codes)
            if min(size["rows"]) < min_rows or min(size["groups"]) < min_groups:
                small.append({"column": column, "value": value, **size, "needed": int(min_rows),
                              "needed_groups": int(min_groups), "reason": reason})
            else:
                kept.setdefault(column, {})[value] = idx
    return kept, small


def unpaired_warnings(small, one_sided, unlabelled, min_rows, min_groups):
    """Sentences for small subgroups, one-sided columns and values, and unlabelled rows."""
    out = []
    if small:
        listed = ", ".join(f"{s['column']}={s['value']} (rows {s['rows'][0]}/{s['rows'][1]}, groups "
                           f"{s['groups'][0]}/{s['groups'][1]})" for s in small[:6])
        more = f" and {len(small) - 6} more" if len(small) > 6 else ""
        out.append(f"{len(small)} breakdown subgroups have fewer than {min_rows} rows or {min_groups} groups in a "
                   f"domain, too few for the subgroup tests: {listed}{more} (see breakdowns_skipped)")
    for entry in one_sided:
        where = entry["column"] if "value" not in entry else f"{entry['column']}={entry['value']}"
        out.append(f"breakdown {where} not tested: {entry['reason']}")
    for column, (rows_a, rows_b) in unlabelled.items():
        if rows_a or rows_b:
            out.append(f"{rows_a} rows of domain A and {rows_b} of domain B have no {column} value and are in none "
                       f"of its subgroups")
    return out
