"""One vocabulary for the numbers (invariance.readings): the terminal and the report agree."""

from __future__ import annotations

import copy
import re

import numpy as np
import pytest
from scipy.stats import binomtest

from invariance import readings
from invariance.readings import (
    BANDS,
    SMALL_SAMPLE_NOTE,
    SMALL_SAMPLE_WORDS,
    describe_metrics,
    format_interval,
    format_p_value,
    format_percent,
    read_cka,
    read_domain_accuracy,
    read_mmd,
    read_probe_gap,
    read_relative_drift,
)
from invariance.report import cells, render_report
from report_fixtures import make_metrics, make_result


def _domain_entry(correct: int, n_test: int, **extra) -> dict:
    """The domain_classifier entry for ``correct`` of ``n_test`` held-out images.

    The interval is the exact Clopper-Pearson 95% interval (Clopper & Pearson, Biometrika
    1934) and the p-value the one-sided binomial test against 0.5, both from scipy.stats,
    as invariance.metrics.domain computes them.
    """
    ci = binomtest(correct, n_test, 0.5).proportion_ci(0.95, method="exact")
    accuracy = correct / n_test
    return {"accuracy": accuracy, "ci": [float(ci.low), float(ci.high)],
            "proxy_a_distance": max(0.0, 2.0 * (2.0 * accuracy - 1.0)),
            "p_value": float(binomtest(correct, n_test, 0.5, alternative="greater").pvalue),
            "folds": 5, "n_test": n_test, **extra}


def _with_domain(entry: dict) -> dict:
    result = make_result(seed=3, name="Bench CNN", spec="python:bench_models:plain", pairs=entry["n_test"] // 2,
                         with_layers=False, with_breakdowns=False)
    result["metrics"]["domain_classifier"] = entry
    return result


def _summary_domain_reading(page: str) -> str:
    """The reading under the domain accuracy in the summary row (the row's first reading)."""
    summary = page[page.index('id="summary"'):page.index('id="charts"')]
    row = summary.split("<tr>")[2]
    return re.search(r'<span class="reading[^"]*">([^<]*)</span>', row).group(1)


def test_113_of_200_reads_the_same_in_the_terminal_and_the_report():
    # 113 of 200: one-sided binomial p = 0.038 but the 95% Clopper-Pearson interval is
    # [0.493, 0.635] (scipy.stats.binomtest); the interval includes chance.
    entry = _domain_entry(113, 200)
    assert entry["p_value"] == pytest.approx(0.0384, abs=1e-4)
    assert entry["ci"] == pytest.approx([0.4933, 0.6348], abs=1e-4)
    terminal = describe_metrics({"domain_classifier": entry})[0][3]
    report = _summary_domain_reading(render_report([_with_domain(entry)]))
    assert report == "close to chance"
    assert terminal.startswith(report + ":")
    assert "no evidence the encoder separates the domains" in terminal


def test_an_interval_above_chance_separates_the_domains_in_both():
    # 150 of 200: the whole Clopper-Pearson interval [0.684, 0.810] lies above 0.5.
    entry = _domain_entry(150, 200)
    assert entry["ci"][0] > 0.5
    terminal = describe_metrics({"domain_classifier": entry})[0][3]
    report = _summary_domain_reading(render_report([_with_domain(entry)]))
    assert report == "partly separable"
    assert terminal.startswith(report + ":") and "the encoder separates the domains" in terminal
    assert "no evidence" not in terminal


def test_the_domain_reading_follows_the_interval_not_the_p_value():
    # Common practice: a 95% interval is read against chance; the one-sided p-value is not.
    assert read_domain_accuracy(0.565, (0.493, 0.635)).words == readings.CLOSE_TO_CHANCE
    assert read_domain_accuracy(0.565, (0.501, 0.635)).words == "barely separable"
    assert read_domain_accuracy(0.40, (0.30, 0.49)).words == readings.BELOW_CHANCE
    assert read_domain_accuracy(0.97, (0.95, 0.99)).words == "fully separable"
    assert read_domain_accuracy(0.70, None).words == readings.NO_INTERVAL
    assert readings.separates_domains((0.5, 0.6)) is False  # a bound at chance does not rule it out


def test_small_sample_words_come_from_one_place():
    entry = _domain_entry(30, 48, small_sample=True)
    terminal = describe_metrics({"domain_classifier": entry})[0][3]
    page = render_report([_with_domain(entry)])
    report = _summary_domain_reading(page)
    assert report.endswith("; " + SMALL_SAMPLE_WORDS) and terminal.startswith(report + ":")
    encoder = page[page.index('id="encoder-0"'):]
    assert SMALL_SAMPLE_NOTE in encoder


@pytest.mark.parametrize("separability", [0.0, 0.15, 0.4, 0.7, 1.0])
def test_every_terminal_reading_starts_with_the_report_words(separability):
    metrics = make_metrics(np.random.default_rng(int(10 * separability)), separability=separability)
    rows = {row[0]: row for row in describe_metrics(metrics)}
    expected = {
        "domain classifier accuracy": cells.accuracy_cell(metrics),
        "MMD^2": cells.mmd_cell(metrics),
        "relative drift": cells.drift_cell(metrics),
        "pair retrieval top-1": cells.retrieval_cell(metrics),
        "linear CKA": cells.cka_cell(metrics),
    }
    for name, cell in expected.items():
        assert cell["reading"] and rows[name][3].startswith(cell["reading"] + ":"), name
    for label, probe in metrics["probe"].items():
        row = rows[f"probe {label} ({probe['metric']})"]
        assert row[3].startswith(read_probe_gap(probe["gap"]).words + ":")


def test_rows_keep_the_format_the_terminal_prints():
    metrics = make_metrics(np.random.default_rng(0), separability=0.5)
    rows = describe_metrics(metrics)
    assert all(len(row) == 4 and all(isinstance(cell, str) for cell in row) for row in rows)
    assert [row[0] for row in rows][:2] == ["domain classifier accuracy", "MMD^2"]
    assert rows[0][1].endswith("%") and re.fullmatch(r"\[\d+%, \d+%\]", rows[0][2])


def test_not_computable_metrics_read_n_a_with_their_reason():
    metrics = copy.deepcopy(make_metrics(np.random.default_rng(1), separability=0.3))
    metrics["cka"] = {"not_computable": "only 2 pairs; need 3"}
    metrics["probe"]["x"] = {"not_computable": "the x column is constant"}
    rows = {row[0]: row for row in describe_metrics(metrics)}
    assert rows["linear CKA"] == ("linear CKA", "n/a", "", "only 2 pairs; need 3")
    assert rows["probe x"][1:] == ("n/a", "", "the x column is constant")
    metrics["probe"] = {"not_computable": "no labels.csv"}
    assert describe_metrics(metrics)[-1] == ("probe", "n/a", "", "no labels.csv")


def test_mmd_reading_uses_the_five_percent_level():
    # Fisher's conventional 5% significance level (common practice).
    assert read_mmd(0.049).words == readings.DISTRIBUTIONS_DIFFER
    assert read_mmd(0.05).words == readings.NO_DETECTABLE_DIFFERENCE
    assert read_mmd(None).words == readings.NO_TEST


def test_band_bounds_are_inclusive_and_sourced():
    # The bands are reading aids (common practice); a value on a bound falls in the
    # better band.
    assert read_relative_drift(0.1).words == "small" and read_relative_drift(0.1001).words == "moderate"
    assert read_relative_drift(5.0).words == "near a scene change"
    assert read_cka(0.9).words == "very similar" and read_cka(0.8999).words == "similar"
    assert read_probe_gap(0.02).words == "task kept" and read_probe_gap(0.5).words == "task degraded"
    for metric, bands in BANDS.items():
        assert bands[-1].bound is None and all(b.bound is not None for b in bands[:-1]), metric
        assert all(b.source and b.tone in {"good", "fair", "warn", "bad"} for b in bands), metric
        bounds = [b.bound for b in bands[:-1]]
        assert bounds == sorted(bounds, reverse=metric in {"pair_retrieval", "cka"}), metric


def test_number_formats():
    # Common practice: three decimals, p-values below 0.001 not spelled out.
    assert format_p_value(0.0384) == "p = 0.038" and format_p_value(0.0004) == "p < 0.001"
    assert format_p_value(None) == "p \u2013"
    assert format_interval([0.49326, 0.63478]) == "[0.493, 0.635]" and format_interval(None) == ""
    assert format_percent(0.818) == "82%" and format_percent(float("nan")) == "\u2013"
    assert readings.format_number(True) == "\u2013"  # a flag is not a number
