"""The README's first command: the whole job on the bundled sample scenes."""

from __future__ import annotations

import json
import re

import pytest

from invariance.demo import ALIGN_STEPS, run_demo

pytestmark = pytest.mark.slow


def _by_name(comparison):
    return {r["encoder"]["name"]: r for r in comparison["results"]}


def test_demo_ranks_a_clutter_robust_encoder_ahead_with_separate_intervals(tmp_path):
    summary = run_demo(tmp_path / "demo", progress=False, cache_dir=tmp_path / "cache")
    assert len(summary) == 5 and summary[0].startswith("report: ")
    alignment = json.loads((tmp_path / "demo" / "alignment.json").read_text())["alignment"]
    # The demo runs by steps, never by minutes: its figures do not depend on the machine's load.
    assert alignment["steps_run"] == ALIGN_STEPS or alignment["stopped_because"].startswith("guard:")
    assert alignment["cut_short"] is False and alignment["settings"]["minutes"] is None
    assert alignment["improved"] is True, alignment["outcome"]  # else the comparison has no aligned encoder
    comparison = json.loads((tmp_path / "demo" / "comparison.json").read_text())
    results = _by_name(comparison)
    assert len(results) == 4 and not comparison["failures"]
    clean_only = results["workbench CNN, clean-only training"]["metrics"]
    contenders = [results["workbench CNN, clutter-augmented"]["metrics"],
                  results["workbench CNN, clean-only, aligned"]["metrics"]]

    def ahead(m):
        # lower domain accuracy and lower drift, with 95% intervals that do not overlap
        acc_ok = m["domain_classifier"]["ci"][1] < clean_only["domain_classifier"]["ci"][0]
        drift_ok = m["paired_drift"]["relative_drift_ci"][1] < clean_only["paired_drift"]["relative_drift_ci"][0]
        return acc_ok and drift_ok

    assert any(ahead(m) for m in contenders)
    part = clean_only["probe"]["part"]
    assert part["cluttered"] < part["clean"]  # the clean-only encoder loses task information in clutter
    aligned = results["workbench CNN, clean-only, aligned"]
    assert aligned["alignment"]["held_out_pairs"] > 0  # before/after measured on pairs never trained on
    html = (tmp_path / "demo" / "report.html").read_text()
    assert "clean-only, aligned" in html and not re.search(r"https?://", html)
