"""The self-contained HTML report (invariance.report)."""

from __future__ import annotations

import base64
import io
import re
from html.parser import HTMLParser

import matplotlib
import numpy as np
import pytest
from markupsafe import escape  # the escape autoescaping applies (' becomes &#39;)
from PIL import Image

import invariance
from invariance.errors import InvarianceError
from invariance.report import check_writable, plots, render_report, write_report
from invariance.report import render as report_render
from invariance.report.context import EXAMPLE_PAIRS
from invariance.report.encoder import WORST_PAIRS
from invariance.report.thumbnails import THUMBNAIL_PX, Thumbnails
from invariance.results import rank_results
from report_fixtures import (
    make_failure,
    make_result,
    not_computable,
    scene_names,
    two_encoder_results,
    write_scene_images,
)

SECTION_IDS = ("header", "safety-caution", "warnings", "summary", "charts", "encoder-0", "encoder-1",
               "failures", "data", "environment", "reading-notes", "safety-caution-end")
DATA_URI = re.compile(r"data:image/png;base64,([A-Za-z0-9+/=]+)")
EVIL = "<script>alert('x')</script>"


class _Collect(HTMLParser):
    """Element ids, image sources and the order of sections as they appear."""

    def __init__(self):
        super().__init__()
        self.ids, self.srcs, self.tags = [], [], []

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        self.tags.append(tag)
        if "id" in attrs:
            self.ids.append(attrs["id"])
        if tag == "img":
            self.srcs.append(attrs.get("src", ""))


def _parse(page: str) -> _Collect:
    parser = _Collect()
    parser.feed(page)
    return parser


def _section(page: str, element_id: str) -> str:
    start = page.index(f'id="{element_id}"')
    end = page.find("<section", start + 1)
    return page[start:end if end != -1 else len(page)]


@pytest.fixture(scope="module")
def two_encoders(tmp_path_factory):
    """The two-encoder comparison with layers, breakdowns, alignment, a failure and real thumbnails."""
    root = tmp_path_factory.mktemp("bench")
    scenes = write_scene_images(root / "scenes", scene_names(48))
    results = two_encoder_results(scenes)
    out = write_report(root / "out" / "report.html", results, failures=[make_failure()],
                       warnings=["Only 48 pairs: intervals are wide."])
    return results, out.read_text(encoding="utf-8"), out


@pytest.fixture(scope="module")
def edge_case(tmp_path_factory):
    """Hostile names, metrics that cannot be computed, mixed data sets, moved and missing images."""
    root = tmp_path_factory.mktemp("edge")
    scenes = write_scene_images(root / "moved", scene_names(12), seed=3)
    hostile = make_result(seed=5, name=EVIL, spec='python:m:"><img src=x onerror=alert(1)>',
                          dataset_path="/nowhere/scenes", pairs=12, with_layers=False, with_breakdowns=False)
    hostile["pairs"][0] = {"name": "<b>scene</b>.png", "drift": 9.0}  # worst pair, no image on disk
    hostile["warnings"] = ["<i>raw</i> warning"]
    hostile = not_computable(hostile, "mmd", "fewer than 4 pairs in a fold")
    hostile["metrics"]["probe"]["x"] = {"not_computable": "the x column is constant"}
    tsne = hostile["projection"]
    tsne["tsne"] = {"clean": tsne["clean"], "cluttered": tsne["cluttered"]}
    other = make_result(seed=6, name="Other data", spec="torchvision:resnet18", dataset_path=root / "absent",
                        pairs=30, content_hash="sha256:beef", with_layers=False, with_breakdowns=False,
                        with_gates=False)
    other = not_computable(other, "domain_classifier", "only one domain present")
    other["projection"] = {"not_computable": "all feature vectors are identical"}
    failure = {"spec": "torchscript:<evil>.pt", "name": "Evil & co", "error": "RuntimeError: <shape> mismatch"}
    no_tsne = make_result(seed=7, name="PCA only", spec="torchvision:resnet50", dataset_path="/nowhere/scenes",
                          pairs=12, separability=0.9, with_layers=False, with_breakdowns=False)
    page = render_report([hostile, other, no_tsne], failures=[failure], tsne=True,
                         image_root_overrides={"/nowhere/scenes": scenes})
    return page


def test_every_section_is_present_once(two_encoders):
    _, page, _ = two_encoders
    ids = _parse(page).ids
    for element_id in SECTION_IDS:
        assert ids.count(element_id) == 1, element_id


def test_every_embedded_image_is_a_png(two_encoders):
    _, page, _ = two_encoders
    payloads = DATA_URI.findall(page)
    # 7 cross-encoder charts (task information, accuracy, drift, CKA, MMD, two probes); per
    # encoder a projection, a histogram, a layer profile and four breakdown charts (factors and
    # level on their own axes, accuracy and drift each); one alignment chart; thumbnails.
    thumbnails = 2 * 2 * WORST_PAIRS + 2 * EXAMPLE_PAIRS
    assert len(payloads) == 7 + 2 * 7 + 1 + thumbnails
    for payload in payloads:
        with Image.open(io.BytesIO(base64.b64decode(payload))) as image:
            assert image.format == "PNG"
            image.load()
            assert image.width > 0 and image.height > 0


def test_every_img_is_embedded_and_thumbnails_are_small(two_encoders):
    _, page, _ = two_encoders
    srcs = _parse(page).srcs
    assert srcs and all(src.startswith("data:image/png;base64,") for src in srcs)
    thumbs = re.findall(r'<img class="thumb" src="data:image/png;base64,([^"]+)"', page)
    assert len(thumbs) == 2 * 2 * WORST_PAIRS + 2 * EXAMPLE_PAIRS
    for payload in thumbs:
        with Image.open(io.BytesIO(base64.b64decode(payload))) as image:
            assert max(image.size) <= THUMBNAIL_PX


def test_self_contained_no_address_no_script(two_encoders):
    _, page, _ = two_encoders
    assert "http://" not in page and "https://" not in page
    assert "<script" not in page.lower()
    assert "<link" not in page.lower() and "@import" not in page


def test_safety_caution_at_top_and_end_and_beside_every_gate_table(two_encoders):
    results, page, _ = two_encoders
    caution = escape(invariance.SAFETY_CAUTION)
    with_gates = sum(bool(r.get("gates")) for r in results)
    assert with_gates == 2 and page.count(caution) == 2 + with_gates
    assert page.index(caution) < page.index('id="summary"') < page.rindex(caution)
    for i in range(2):
        gates = _section(page, f"encoder-{i}")
        gates = gates[gates.index("<h3>Gates"):]
        assert "a regression check, not a safety function: " + caution in gates


def test_summary_rows_and_sections_follow_the_ranking(two_encoders):
    results, page, _ = two_encoders
    order = rank_results(results)
    assert order == [1, 0]  # the aligned encoder is less separable
    summary = _section(page, "summary")
    names = [escape(results[i]["encoder"]["name"]) for i in order]
    assert summary.index(names[0]) < summary.index(names[1])
    assert page.index('id="encoder-1"') < page.index('id="encoder-0"')
    assert "first on hardware" in summary and names[0] in summary.split("first on hardware")[0]
    assert "like-for-like" not in summary  # one data set: no mixed-data caution


def test_summary_cells_carry_plain_readings(two_encoders):
    _, page, _ = two_encoders
    summary = _section(page, "summary")
    rows = summary.split("<tbody>")[1].split("</tr>")[:2]
    # 48 pairs: the aligned encoder's interval covers chance but is too wide to call it invariant
    assert "inconclusive (48 pairs; the interval reaches" in rows[0] and "distributions differ" not in rows[0]
    assert "no detectable difference" in rows[0] and 'class="reading neutral"' in rows[0]
    assert "separable" in rows[1] and "distributions differ" in rows[1]
    assert "1 of 1 failed" in rows[1] and "all 1 met" in rows[0]
    for anchor in ("note-information", "note-domain", "note-mmd", "note-drift", "note-cka", "note-probe"):
        assert f'href="#{anchor}"' in summary and f'id="{anchor}"' in _section(page, "reading-notes")


def test_encoder_sections_hold_their_blocks(two_encoders):
    _, page, _ = two_encoders
    aligned, plain = _section(page, "encoder-1"), _section(page, "encoder-0")
    for block in ("Per-layer profile", "By clutter factor and level", "Worst pairs", "PCA projection"):
        assert block in aligned and block in plain
    assert "Alignment (gradient reversal)" in aligned and "Alignment" not in plain
    assert "factor_distractors" in aligned and "<td>level</td>" in aligned


def test_failures_and_warnings_are_shown(two_encoders):
    _, page, _ = two_encoders
    assert "missing.pt: file not found" in _section(page, "failures")
    warnings = _section(page, "warnings")
    assert "Only 48 pairs" in warnings
    assert page.index('id="warnings"') < page.index('id="summary"')


def test_environment_and_data_sections(two_encoders):
    results, page, _ = two_encoders
    environment = _section(page, "environment")
    assert "invariance score" in environment and "extract" in environment and "cpu" in environment
    data = _section(page, "data")
    assert "64 \u00d7 64" in data and "sha256:0a1b2c3d" in data and 'class="thumb"' in data


def test_report_is_small_for_two_encoders(two_encoders):
    _, _, out = two_encoders
    assert out.stat().st_size < 1_500_000


def test_write_is_atomic_and_leaves_no_temporary_file(two_encoders):
    _, _, out = two_encoders
    assert sorted(p.name for p in out.parent.iterdir()) == ["report.html"]


def test_print_layout_breaks_pages_between_encoders(two_encoders):
    _, page, _ = two_encoders
    print_css = page[page.index("@media print"):]
    assert "section.encoder { break-before: page; }" in print_css


def test_user_text_is_escaped(edge_case):
    assert EVIL not in edge_case and escape(EVIL) in edge_case
    assert "<img src=x" not in edge_case
    assert "<b>scene</b>" not in edge_case and "&lt;b&gt;scene&lt;/b&gt;" in edge_case
    assert "<i>raw</i>" not in edge_case and "<evil>" not in edge_case
    assert "RuntimeError: &lt;shape&gt; mismatch" in _section(edge_case, "failures")
    assert "Evil &amp; co" in edge_case
    assert "<script" not in edge_case.lower()


def test_not_computable_metrics_render_their_reason(edge_case):
    hostile, other = _section(edge_case, "encoder-0"), _section(edge_case, "encoder-1")
    assert "not computable: fewer than 4 pairs in a fold" in hostile
    assert "not computable: the x column is constant" in hostile
    assert "not computable: only one domain present" in other
    assert "Projection not computable: all feature vectors are identical" in other
    summary = _section(edge_case, "summary")
    row = summary[summary.index("Other data</a>"):]
    assert "not computable: only one domain present" in row.split("</tr>")[0]


def test_mixed_datasets_show_a_visible_warning(edge_case):
    warnings = _section(edge_case, "warnings")
    assert "different data sets" in warnings and "sha256:beef" in warnings
    assert "not a like-for-like comparison" in _section(edge_case, "summary")
    assert "&lt;i&gt;raw&lt;/i&gt; warning" in warnings


def test_image_root_override_and_missing_images(edge_case):
    hostile, other = _section(edge_case, "encoder-0"), _section(edge_case, "encoder-1")
    assert 'class="thumb"' in hostile and "Images for 1 of these pairs were not found" in hostile
    assert 'class="thumb"' not in other and "were not found" in other and "<figcaption><code>scene_000" in other


def test_tsne_shown_when_coordinates_exist_else_explained(edge_case):
    hostile, other = _section(edge_case, "encoder-0"), _section(edge_case, "encoder-1")
    assert "t-SNE projection" in hostile
    assert "t-SNE projection" not in other
    pca_only = _section(edge_case, "encoder-2")
    assert "t-SNE was asked for" in pca_only and "PCA projection" in pca_only


def test_thumbnail_names_cannot_leave_the_dataset(tmp_path):
    root = write_scene_images(tmp_path / "scenes", scene_names(1))
    Image.new("RGB", (8, 8)).save(tmp_path / "scenes" / "outside.png")
    thumbnails = Thumbnails(None)
    dataset = {"path": str(root)}
    assert thumbnails.uri(dataset, "clean", "scene_00000.png").startswith("data:image/png;base64,")
    assert thumbnails.uri(dataset, "clean", "../outside.png") is None
    assert thumbnails.uri(dataset, "clean", "absent.png") is None


def test_unwritable_output_fails_before_rendering(tmp_path, monkeypatch):
    def _must_not_render(*args, **kwargs):
        raise AssertionError("rendered before checking the output path")

    monkeypatch.setattr(report_render, "render_report", _must_not_render)
    blocker = tmp_path / "a_file"
    blocker.write_text("x", encoding="utf-8")
    result = make_result(seed=1, name="a", spec="python:m:a")
    for bad in (blocker / "report.html", blocker / "deeper" / "report.html", tmp_path):
        with pytest.raises(InvarianceError) as info:
            write_report(bad, [result])
        assert str(bad) in str(info.value) and "\n" not in str(info.value)


def test_check_writable_accepts_a_new_nested_folder(tmp_path):
    target = tmp_path / "new" / "deeper" / "report.html"
    assert check_writable(target) == target
    assert not (tmp_path / "new").exists()  # checking creates nothing


def test_no_results_and_no_failures_is_an_error():
    with pytest.raises(InvarianceError, match="no results to report"):
        render_report([])


def test_only_failures_still_renders():
    page = render_report([], failures=[make_failure("only one")])
    assert "only one" in _section(page, "failures") and "No encoder finished" in page


def test_figures_are_pngs_and_leave_no_pyplot_figure():
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    before = plt.get_fignums()
    png = plots.bar_with_intervals(["a$b$^{", "plain"], [0.6, None], [(0.5, 0.7), None],
                                   ylabel=plots.ACCURACY_LABEL, title="t $x", reference=0.5)
    projection = plots.projection_chart(np.zeros((5, 2)), np.ones((5, 2)), explained=[0.4, 0.2])
    for data in (png, projection):
        with Image.open(io.BytesIO(data)) as image:
            assert image.format == "PNG" and image.width > 100
        assert b"http" not in data  # no text chunk carrying a web address
    assert plt.get_fignums() == before


def test_alignment_curves_need_steps():
    assert plots.alignment_curves({"step": [], "lambda": []}) is None
    png = plots.alignment_curves({"step": [0, 1, 2], "lambda": [0.0, 0.5, 0.9], "loss_total": [1, None, 0.5]})
    with Image.open(io.BytesIO(png)) as image:
        assert image.format == "PNG"


def test_alignment_curves_draw_every_logged_loss():
    # The six losses an alignment run logs (invariance.align): leaving any one out of the
    # curves must change the chart, so each is drawn.
    losses = ("loss_total", "loss_domain", "loss_anchor", "loss_task", "loss_paired", "loss_mean")
    steps = list(range(0, 200, 10))
    progress = np.linspace(0, 1, len(steps))
    curves = {"step": steps, "lambda": (2 / (1 + np.exp(-10 * progress)) - 1).tolist()}
    curves.update({key: (0.05 * (i + 1) + np.exp(-(i + 1) * progress)).tolist() for i, key in enumerate(losses)})
    full = plots.alignment_curves(curves)
    for key in losses:
        without = plots.alignment_curves({k: v for k, v in curves.items() if k != key})
        assert without != full, key


def test_alignment_chart_knows_every_loss_the_alignment_logs():
    from invariance.align import LOSS_NAMES

    assert plots.ALIGNMENT_LOSSES == tuple(f"loss_{name}" for name in LOSS_NAMES)


def test_sparse_and_odd_results_still_render():
    bare = {"schema": "invariance.result/1", "encoder": {"spec": "python:m:bare"}, "dataset": {}, "metrics": {}}
    odd = {
        "schema": "invariance.result/1", "encoder": {"spec": "python:m:odd", "name": None},
        "dataset": {"path": None, "image_size": "odd"},
        "metrics": {"domain_classifier": [0.7], "mmd": {"mmd2": "high"}, "probe": {"not_computable": "no labels.csv"},
                    "paired_drift": {"relative_drift": 0.3, "relative_drift_ci": ["a", "b"]}, "cka": None},
        "pairs": [{"name": "a.png"}, "junk"], "projection": {"clean": [], "cluttered": []},
        "layers": {"stem": {}}, "breakdowns": {"factor_light": {"0": None}, "level": "junk"},
        "alignment": {"before": {}, "after": None, "curves": {"step": [1, 2], "lambda": [1.0]}},
        "gates": {"max_relative_drift": "junk"}, "environment": {"timings_s": "x"}, "warnings": None,
    }
    page = render_report([bare, odd])
    assert _section(page, "encoder-0").count("not reported") >= 6
    odd_section = _section(page, "encoder-1")
    assert "no labels.csv" in odd_section and "unreadable value in the result file" in odd_section
    assert "0.300" in odd_section  # the readable drift survives its unreadable interval
    assert "could not be drawn" not in page


def test_factor_zero_is_labelled_off_and_level_has_its_own_axis(two_encoders):
    _, page, _ = two_encoders
    section = _section(page, "encoder-0")
    assert "<td>0 (this factor off, the others on)</td>" in section and "<td>level</td><td>0</td>" in section
    assert 'alt="breakdown of accuracy by factor severity (0 = this factor off, the others on)"' in section
    assert 'alt="breakdown of accuracy by clutter level (every active factor)"' in section


def test_mmd_chart_says_bandwidths_differ_and_drift_says_mean(two_encoders):
    _, page, _ = two_encoders
    charts = _section(page, "charts")
    assert "bar heights are not on one scale" in charts
    assert "The headline drift is the mean over pairs" in _section(page, "encoder-0")
    assert "Mean relative drift [95% interval]" in _section(page, "summary")


def test_chart_labels_keep_whole_names():
    # Two names that share a prefix ("workbench CNN, clean-...") must not be cut alike.
    from matplotlib.figure import Figure

    names = ["workbench CNN, clean-only training", "workbench CNN, clean-only, aligned"]
    fig = Figure()
    ax = fig.add_subplot(1, 1, 1)
    plots._categorical_axis(ax, np.arange(2), names)
    shown = [label.get_text().replace("\n", " ") for label in ax.get_xticklabels()]
    assert shown == names
    assert all(label.get_fontsize() >= 8 for label in ax.get_xticklabels())


def test_random_weights_reference_and_a_failed_alignment_are_named_plainly():
    reference = make_result(seed=3, name="ResNet-18", spec="torchvision:resnet18", with_layers=False,
                            with_breakdowns=False)
    copy_ = make_result(seed=4, name="bench CNN, aligned", spec="checkpoint:a.pt", with_layers=False,
                        with_breakdowns=False, with_alignment=True)
    copy_["alignment"].update(improved=False, cut_short=True,
                              drift_change={"relative_fall": 0.062, "relative_fall_ci": [-0.011, 0.129]})
    page = render_report([reference, copy_])
    assert "random-weights reference, not a trained encoder" in _section(page, "encoder-0")
    aligned = _section(page, "encoder-1")
    assert "bench CNN (alignment did not improve it)" in aligned and "bench CNN, aligned" not in page
    assert "did not improve on the original encoder" in aligned and "cut short" in aligned
    # the judged drift fall with its paired interval, which here covers 0
    assert "fell by 6.2% (relative fall 6.2%, 95% interval -1.1% to 12.9%" in aligned


def test_a_blind_encoder_is_labelled_collapsed_and_listed_last():
    from report_fixtures import blind_metrics

    good = make_result(seed=1, name="bench CNN", spec="python:m:a", with_layers=False, with_breakdowns=False)
    blind = make_result(seed=2, name="blank net", spec="python:m:b", with_layers=False, with_breakdowns=False)
    blind["metrics"] = blind_metrics()
    blind["warnings"] = ["a repeated warning", "a repeated warning"]
    page = render_report([blind, good])
    summary = _section(page, "summary")
    assert summary.index("bench CNN</a>") < summary.index("blank net</a>")
    assert "collapsed: constant features" in summary and "blank net has collapsed" in summary
    assert _section(page, "warnings").count("a repeated warning") == 1
