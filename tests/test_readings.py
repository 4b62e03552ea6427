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
    read_probe,
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
    """The reading under the domain accuracy in the summary row (its fifth cell)."""
    summary = page[page.index('id="summary"'):page.index('id="charts"')]
    row = summary.split("<tbody>")[1].split("</tr>")[0]
    cell = row.split("<td")[5]
    return re.search(r'<span class="reading[^"]*">([^<]*)</span>', cell).group(1)


def test_113_of_200_is_inconclusive_in_the_terminal_and_the_report():
    # 113 of 200: one-sided binomial p = 0.038 but the 95% Clopper-Pearson interval is
    # [0.493, 0.635] (scipy.stats.binomtest): it includes chance, yet reaches far beyond
    # the 0.05 margin, so it shows neither separation nor invariance.
    entry = _domain_entry(113, 200)
    assert entry["p_value"] == pytest.approx(0.0384, abs=1e-4)
    assert entry["ci"] == pytest.approx([0.4933, 0.6348], abs=1e-4)
    terminal = describe_metrics({"domain_classifier": entry}, pairs=100)[0][3]
    report = _summary_domain_reading(render_report([_with_domain(entry)]))
    assert report.startswith("inconclusive (") and "the interval reaches 0.493\u20130.635" in report
    assert terminal.startswith(report + ":")
    assert "too wide to show invariance" in terminal and "indistinguishable" not in terminal


def test_the_issue_case_after_alignment_is_not_green():
    # Issue 13: 0.533 [0.440, 0.625] on 60 held-out pairs was shown in green.
    reading = read_domain_accuracy(0.533, (0.440, 0.625), pairs=60)
    assert reading.tone == "neutral"
    assert reading.words == "inconclusive (60 pairs; the interval reaches 0.440\u20130.625)"


def test_a_tight_interval_at_chance_reads_indistinguishable():
    # 1000 of 2000: Clopper-Pearson [0.478, 0.522] (scipy.stats.binomtest) lies inside 0.5 +- 0.05.
    entry = _domain_entry(1000, 2000)
    assert entry["ci"][0] > 0.45 and entry["ci"][1] < 0.55
    reading = read_domain_accuracy(entry["accuracy"], entry["ci"])
    assert reading == readings.Reading(readings.CLOSE_TO_CHANCE, "good")
    assert describe_metrics({"domain_classifier": entry})[0][3].startswith(readings.CLOSE_TO_CHANCE + ":")


def test_an_interval_above_chance_separates_the_domains_in_both():
    # 150 of 200: the whole Clopper-Pearson interval [0.684, 0.810] lies above 0.5.
    entry = _domain_entry(150, 200)
    assert entry["ci"][0] > 0.5
    terminal = describe_metrics({"domain_classifier": entry})[0][3]
    report = _summary_domain_reading(render_report([_with_domain(entry)]))
    assert report == "partly separable"
    assert terminal.startswith(report + ":") and "the encoder separates the domains" in terminal


def test_the_domain_reading_follows_the_interval_not_the_p_value():
    # Common practice: a 95% interval is read against chance and the margin; the p-value is not.
    assert read_domain_accuracy(0.565, (0.493, 0.635)).words.startswith(readings.INCONCLUSIVE)
    assert read_domain_accuracy(0.50, (0.46, 0.54)).words == readings.CLOSE_TO_CHANCE
    assert read_domain_accuracy(0.50, (0.449, 0.54)).words.startswith(readings.INCONCLUSIVE)
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
        "mean relative drift": cells.drift_cell(metrics),
        "pair retrieval top-1": cells.retrieval_cell(metrics),
        "CKA (debiased)": cells.cka_cell(metrics),
    }
    for name, cell in expected.items():
        assert cell["reading"] and rows[name][3].startswith(cell["reading"] + ":"), name
    for label, probe in metrics["probe"].items():
        row = rows[f"probe {label} ({probe['metric']})"]
        assert row[3].startswith(read_probe(probe).words + ":")


def test_rows_show_accuracies_as_fractions_like_the_report():
    metrics = make_metrics(np.random.default_rng(0), separability=0.5)
    rows = describe_metrics(metrics)
    assert all(len(row) == 4 and all(isinstance(cell, str) for cell in row) for row in rows)
    assert [row[0] for row in rows][:2] == ["domain classifier accuracy", "MMD^2"]
    # one unit for accuracies everywhere: 0.658, never 66%
    assert re.fullmatch(r"0\.\d{3}", rows[0][1]) and re.fullmatch(r"\[0\.\d{3}, [01]\.\d{3}\]", rows[0][2])
    assert rows[0][1] == cells.accuracy_cell(metrics)["value"]
    assert not any("%" in row[1] or "%" in row[2] for row in rows)


def test_not_computable_metrics_read_n_a_with_their_reason():
    metrics = copy.deepcopy(make_metrics(np.random.default_rng(1), separability=0.3))
    metrics["cka"] = {"not_computable": "only 2 pairs; need 3"}
    metrics["probe"]["x"] = {"not_computable": "the x column is constant"}
    rows = {row[0]: row for row in describe_metrics(metrics)}
    assert rows["CKA (debiased)"] == ("CKA (debiased)", "n/a", "", "only 2 pairs; need 3")
    assert rows["probe x"][1:] == ("n/a", "", "the x column is constant")
    metrics["probe"] = {"not_computable": "no labels.csv"}
    assert describe_metrics(metrics)[-1] == ("probe", "n/a", "", "no labels.csv")


def test_a_metric_left_out_on_purpose_says_why():
    metrics = copy.deepcopy(make_metrics(np.random.default_rng(1), separability=0.3))
    del metrics["paired_drift"]
    metrics["not_computed"] = {"paired_drift": "unpaired episodes have no twin view"}
    rows = {row[0]: row for row in describe_metrics(metrics)}
    assert rows["mean relative drift"][3] == "not computed: unpaired episodes have no twin view"
    assert cells.drift_cell(metrics)["missing"] == "not computed: unpaired episodes have no twin view"


def test_mmd_reading_never_calls_a_non_rejection_invariance():
    # Fisher's conventional 5% level (common practice); not rejecting is no evidence of
    # equality (Altman & Bland, BMJ 1995): neutral, never the "good" tone.
    assert read_mmd(0.049).words == readings.DISTRIBUTIONS_DIFFER
    assert read_mmd(0.05) == readings.Reading(readings.NO_DETECTABLE_DIFFERENCE, "neutral")
    assert read_mmd(0.9).tone == "neutral"
    assert read_mmd(None).words == readings.NO_TEST
    row = describe_metrics({"mmd": {"mmd2": 0.001, "p_value": 0.4}})[0]
    assert "not evidence that they are the same" in row[3]


def _probe(clean, cluttered, gap_ci=None, decodable=True, metric="accuracy"):
    entry = {"kind": "classification" if metric == "accuracy" else "regression", "metric": metric,
             "clean": clean, "cluttered": cluttered, "gap": clean - cluttered, "baseline": 0.25,
             "decodable": decodable, "n_test": 90}
    if gap_ci is not None:
        entry["gap_ci"] = list(gap_ci)
    return entry


def test_probe_readings_use_the_gap_interval_and_the_baseline():
    # Common practice: a gap is kept only when its whole 95% interval lies within 0.05 of 0.
    assert read_probe(_probe(0.9, 0.89, (-0.03, 0.04))) == readings.Reading(readings.TASK_KEPT, "good")
    assert read_probe(_probe(0.9, 0.6, (0.2, 0.4))).words == "task degraded"
    assert read_probe(_probe(0.9, 0.83, (0.06, 0.09))).words == "some loss"
    assert read_probe(_probe(0.9, 0.89, (0.005, 0.02))).words == readings.TASK_KEPT  # inside the margin
    straddle = read_probe(_probe(0.9, 0.89, (-0.08, 0.1)))
    assert straddle.tone == "neutral" and straddle.words.startswith("inconclusive (90 held-out pairs;")
    # a label the probe never learned: neutral, whatever its gap
    lost = read_probe(_probe(0.26, 0.25, (-0.1, 0.12), decodable=False))
    assert lost == readings.Reading(readings.NOT_DECODABLE, "neutral")
    row = describe_metrics({"probe": {"angle": _probe(-0.05, -0.04, decodable=False, metric="r2")}})[0]
    assert row[3].startswith(readings.NOT_DECODABLE + ":") and "R\u00b2" in row[1]
    # results written before gap_ci existed fall back on the point gap's band
    assert read_probe(_probe(0.9, 0.5)).words == "task degraded"


def test_band_bounds_are_inclusive_and_sourced():
    # The bands are reading aids (common practice); a value on a bound falls in the
    # better band.
    assert read_relative_drift(0.1).words == "small" and read_relative_drift(0.1001).words == "moderate"
    assert read_relative_drift(5.0).words == "near a scene change"
    assert read_cka(0.9).words == "very similar" and read_cka(0.8999).words == "similar"
    assert read_cka(-0.2).words == "dissimilar"  # debiased CKA can be negative
    assert read_probe_gap(0.02).words == "task kept" and read_probe_gap(0.5).words == "task degraded"
    assert readings.read_task_information(0.1).words == "mostly lost"
    assert readings.read_task_information(0.099).words == "lost (uninformative)"
    for metric, bands in BANDS.items():
        assert bands[-1].bound is None and all(b.bound is not None for b in bands[:-1]), metric
        assert all(b.source and b.tone in {"good", "fair", "warn", "bad"} for b in bands), metric
        bounds = [b.bound for b in bands[:-1]]
        assert bounds == sorted(bounds, reverse=metric in {"pair_retrieval", "cka", "task_information"}), metric


def test_number_formats():
    # Common practice: three decimals, p-values below 0.001 not spelled out.
    assert format_p_value(0.0384) == "p = 0.038" and format_p_value(0.0004) == "p < 0.001"
    assert format_p_value(None) == "p \u2013"
    assert format_interval([0.49326, 0.63478]) == "[0.493, 0.635]" and format_interval(None) == ""
    assert format_percent(0.818) == "82%" and format_percent(float("nan")) == "\u2013"
    assert readings.format_number(True) == "\u2013"  # a flag is not a number


# ---------------------------------------------------------------- unpaired domains: rows, not pairs

def _unpaired_metrics():
    """Metrics of two unpaired domains of 8 episodes x 4 rows (6 dimensions) drawn alike."""
    from invariance.options import ScoringOptions
    from invariance.scoring import score_unpaired_features

    rng = np.random.default_rng(21)
    groups = np.repeat(np.arange(8), 4)
    a, b = (rng.standard_normal((8, 6))[groups] + 0.3 * rng.standard_normal((32, 6)) for _ in range(2))
    return score_unpaired_features(a, b, groups_a=groups, groups_b=groups,
                                   options=ScoringOptions(permutations=20))["metrics"]


def test_an_inconclusive_unpaired_domain_accuracy_names_rows_of_a_and_b():
    # The unpaired classifier holds out every row of A and B once (n_test 64 here); read as
    # a paired result that was "32 pairs". Its sample is 32 rows of each domain in 8 episodes
    # each (rows_used, grouping), and its interval resamples episodes.
    metrics = _unpaired_metrics()
    entry = metrics["domain_classifier"]
    assert entry["n_test"] == 64 and entry["rows_used"] == [32, 32]
    assert readings.domain_sample(entry) == "32 rows of A and 32 of B in 8 and 8 groups"
    assert readings.domain_pairs(entry, 0) is None
    row = describe_metrics(metrics)[0]
    assert row[3].startswith("inconclusive (32 rows of A and 32 of B in 8 and 8 groups; the interval reaches "
                             f"{format_interval(entry['ci'])[1:-1].replace(', ', chr(0x2013))})"), row[3]
    assert "domain A from domain B" in row[3] and "more episodes would settle it" in row[3]
    assert "pairs" not in row[3]
    # a paired entry keeps its pairs
    assert readings.domain_sample({"n_test": 120}) == "60 pairs"


def test_an_inconclusive_unpaired_probe_names_held_out_rows_of_a_and_the_rows_of_b():
    # The probe is fitted on A's training rows and scored on A's held-out rows and on all of
    # B: GroupShuffleSplit(test_size=0.3) of 60 rows holds out 18; B has 40. Read as paired,
    # that was "18 held-out pairs".
    from invariance.metrics.probe import unpaired_probes

    rng = np.random.default_rng(21)
    a, b = rng.standard_normal((60, 6)), rng.standard_normal((40, 6))
    probe = unpaired_probes(a, b, {"x": a[:, 0] + 0.5 * rng.standard_normal(60)},
                            {"x": b[:, 0] + 0.5 * rng.standard_normal(40)})["x"]
    assert probe["n_test"] == 18 and probe["n_test_b"] == 40 and probe["decodable"]
    ci = readings.interval(probe["gap_ci"])
    assert ci[0] < -readings.GAP_MARGIN and ci[1] > readings.GAP_MARGIN  # straddles 0 beyond the margin
    reading = read_probe(probe)
    assert reading.words.startswith("inconclusive (18 held-out rows of A and 40 rows of B; the interval reaches")
    row = describe_metrics({"probe": {"x": probe}})[0]
    assert "trained on domain A" in row[3] and "on the rows of B" in row[3] and "same scenes" not in row[3]


def test_subgroup_size_names_pairs_or_the_rows_of_each_unpaired_domain():
    from invariance.readings import DASH, subgroup_size

    assert subgroup_size({"pairs": 12, "metrics": {}}) == "12"
    assert subgroup_size({"rows": [16, 20], "groups": [4, 5], "metrics": {}}) == "16 / 20 rows"
    assert subgroup_size(None) == DASH
