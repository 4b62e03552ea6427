"""Pair discovery, labels and image loading: every bad input gets a one-line error."""

from __future__ import annotations

import io

import numpy as np
import pytest
from click.testing import CliRunner
from PIL import Image

from invariance.cli import cli
from invariance.data import PairSet, discover_pairs, load_manifest, load_rgb, read_labels_in_order
from invariance.errors import InvarianceError


def _png(path, colour=(10, 200, 30), size=(8, 6)):
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.new("RGB", size, colour).save(path)
    return path


def _dataset(root, names=("a.png", "b.png", "c.png"), labels=None):
    for n in names:
        _png(root / "clean" / n)
        _png(root / "cluttered" / n, colour=(200, 20, 20))
    if labels is not None:
        (root / "labels.csv").write_text(labels)
    return root


def test_discovers_pairs_sorted_with_labels(tmp_path):
    labels = "file,part,x,factor_surface,level\nc.png,nut,0.5,2,2\na.png,bolt,0.25,0,1\nb.png,nut,1e-1,1,3\n"
    pairs = discover_pairs(_dataset(tmp_path, labels=labels))
    assert pairs.names == ["a.png", "b.png", "c.png"]
    assert pairs.clean[1] == tmp_path / "clean" / "b.png"
    assert pairs.labels.task_kinds == {"part": "classification", "x": "regression"}
    np.testing.assert_allclose(pairs.labels.tasks["x"], [0.25, 0.1, 0.5])
    assert list(pairs.labels.tasks["part"]) == ["bolt", "nut", "nut"]
    # factor_* and level are breakdown columns, never probe targets
    assert set(pairs.labels.factors) == {"factor_surface", "level"}
    assert list(pairs.labels.factors["level"]) == ["1", "3", "2"]


def test_subset_keeps_pairs_and_labels_together(tmp_path):
    pairs = discover_pairs(_dataset(tmp_path, labels="file,x\na.png,1\nb.png,2\nc.png,3\n"))
    sub = pairs.subset([2, 0])
    assert sub.names == ["c.png", "a.png"]
    assert sub.cluttered[0].name == "c.png"
    np.testing.assert_array_equal(sub.labels.tasks["x"], [3.0, 1.0])


def test_nested_relative_names(tmp_path):
    pairs = discover_pairs(_dataset(tmp_path, names=("bench1/s1.png", "bench2/s1.png")))
    assert pairs.names == ["bench1/s1.png", "bench2/s1.png"]


def test_content_hash_changes_with_image_bytes(tmp_path):
    root = _dataset(tmp_path)
    before = discover_pairs(root).content_hash()
    assert discover_pairs(root).content_hash() == before
    _png(root / "cluttered" / "b.png", colour=(1, 2, 3))
    assert discover_pairs(root).content_hash() != before


def test_missing_folder(tmp_path):
    with pytest.raises(InvarianceError, match="data folder not found: .*nope.*invariance scenes"):
        discover_pairs(tmp_path / "nope")


def test_missing_cluttered_subfolder(tmp_path):
    _png(tmp_path / "clean" / "a.png")
    with pytest.raises(InvarianceError, match="cluttered is missing"):
        discover_pairs(tmp_path)


def test_empty_folders(tmp_path):
    (tmp_path / "clean").mkdir()
    (tmp_path / "cluttered").mkdir()
    with pytest.raises(InvarianceError, match="no images in"):
        discover_pairs(tmp_path)


def test_unpaired_lists_ten_and_counts(tmp_path):
    root = _dataset(tmp_path, names=("a.png",))
    for i in range(12):
        _png(root / "clean" / f"only_{i:02d}.png")
    with pytest.raises(InvarianceError) as err:
        discover_pairs(root)
    msg = str(err.value)
    assert msg.startswith("12 images")
    assert "clean/only_00.png" in msg and "clean/only_09.png" in msg
    assert "clean/only_10.png" not in msg and "and 2 more" in msg
    assert "--skip-unpaired" in msg and "\n" not in msg


def test_skip_unpaired_goes_on(tmp_path):
    root = _dataset(tmp_path, names=("a.png", "b.png"))
    _png(root / "cluttered" / "z.png")
    pairs = discover_pairs(root, skip_unpaired=True)
    assert pairs.names == ["a.png", "b.png"]
    assert pairs.skipped == ["cluttered/z.png"]


def test_labels_missing_rows(tmp_path):
    root = _dataset(tmp_path, labels="file,x\na.png,1\n")
    with pytest.raises(InvarianceError, match=r"labels.csv has no row for 2 pairs: b.png, c.png"):
        discover_pairs(root)


def test_labels_duplicate_names(tmp_path):
    root = _dataset(tmp_path, labels="file,x\na.png,1\nb.png,2\nc.png,3\nb.png,4\n")
    with pytest.raises(InvarianceError, match="names 1 files twice: b.png"):
        discover_pairs(root)


def test_labels_non_numeric_value_in_numeric_column(tmp_path):
    root = _dataset(tmp_path, labels="file,x\na.png,1\nb.png,oops\nc.png,3\n")
    with pytest.raises(InvarianceError, match=r"line 3, column 'x': 'oops' is not a finite number"):
        discover_pairs(root)


def test_labels_ragged_row(tmp_path):
    root = _dataset(tmp_path, labels="file,x\na.png,1\nb.png,2,9\nc.png,3\n")
    with pytest.raises(InvarianceError, match="line 3 has 3 fields"):
        discover_pairs(root)


def test_manifest(tmp_path):
    _png(tmp_path / "imgs" / "one_c.png")
    _png(tmp_path / "imgs" / "one_k.png")
    _png(tmp_path / "imgs" / "two_c.png")
    _png(tmp_path / "imgs" / "two_k.png")
    manifest = tmp_path / "pairs.csv"
    manifest.write_text("name,clean,cluttered,part\none,imgs/one_c.png,imgs/one_k.png,gear\ntwo,imgs/two_c.png,imgs/two_k.png,nut\n")
    pairs = discover_pairs(manifest)
    assert pairs.names == ["one", "two"]
    assert pairs.cluttered[1] == tmp_path / "imgs" / "two_k.png"
    assert list(pairs.labels.tasks["part"]) == ["gear", "nut"]


def test_manifest_missing_file(tmp_path):
    manifest = tmp_path / "pairs.csv"
    manifest.write_text("clean,cluttered\na.png,b.png\n")
    with pytest.raises(InvarianceError, match="2 files named in .*pairs.csv do not exist"):
        load_manifest(manifest)


def test_labels_in_order_for_feature_files(tmp_path):
    path = tmp_path / "l.csv"
    path.write_text("file,part,level\nr0,nut,1\nr1,bolt,2\n")
    names, table = read_labels_in_order(path, 2)
    assert names == ["r0", "r1"] and list(table.tasks["part"]) == ["nut", "bolt"]
    with pytest.raises(InvarianceError, match="has 2 rows but the feature files have 3"):
        read_labels_in_order(path, 3)


# --- image loading: any PIL mode becomes 8-bit RGB -------------------------------------

@pytest.mark.parametrize(
    "mode, value, expected",
    [
        ("L", 77, (77, 77, 77)),
        ("LA", (77, 255), (77, 77, 77)),
        ("RGBA", (10, 20, 30, 255), (10, 20, 30)),
        ("RGBA", (10, 20, 30, 0), (255, 255, 255)),  # transparent over white
        ("CMYK", (0, 0, 0, 0), (255, 255, 255)),
        ("I;16", 65535, (255, 255, 255)),  # 16-bit scaled, not clipped
        ("I;16", 257 * 100, (100, 100, 100)),
    ],
)
def test_modes_become_rgb(tmp_path, mode, value, expected):
    path = tmp_path / ("x.tif" if mode in ("CMYK", "I;16") else "x.png")
    Image.new(mode, (4, 3), value).save(path)
    im = load_rgb(path)
    assert im.mode == "RGB" and im.size == (4, 3)
    assert im.getpixel((1, 1)) == expected


def test_palette_mode(tmp_path):
    path = tmp_path / "p.png"
    Image.new("RGB", (4, 4), (0, 128, 255)).convert("P", palette=Image.Palette.ADAPTIVE).save(path)
    assert load_rgb(path).getpixel((0, 0)) == (0, 128, 255)


def test_exif_orientation_applied(tmp_path):
    path = tmp_path / "rot.jpg"
    exif = Image.Exif()
    exif[0x0112] = 6  # "rotate 90 CW to display" (EXIF 2.3, tag 274 Orientation)
    Image.new("RGB", (40, 20), (0, 0, 0)).save(path, exif=exif.tobytes())
    assert load_rgb(path).size == (20, 40)


def test_truncated_image(tmp_path):
    buf = io.BytesIO()
    Image.fromarray(np.random.default_rng(0).integers(0, 255, (64, 64, 3), dtype=np.uint8)).save(buf, "PNG")
    path = tmp_path / "cut.png"
    path.write_bytes(buf.getvalue()[: len(buf.getvalue()) // 2])
    with pytest.raises(InvarianceError, match=r"cut.png .*truncated or not an image"):
        load_rgb(path)


def test_not_an_image(tmp_path):
    path = tmp_path / "notes.png"
    path.write_text("hello")
    with pytest.raises(InvarianceError, match="notes.png"):
        load_rgb(path)


def test_decompression_bomb(tmp_path, monkeypatch):
    path = _png(tmp_path / "big.png", size=(100, 100))
    monkeypatch.setattr(Image, "MAX_IMAGE_PIXELS", 1000)  # PIL's limit, lowered for the test
    with pytest.raises(InvarianceError, match="big.png has more pixels than the safety limit"):
        load_rgb(path)


def test_pairset_from_paths_length_mismatch(tmp_path):
    with pytest.raises(InvarianceError, match="2 clean paths but 1 cluttered"):
        PairSet.from_paths([tmp_path / "a", tmp_path / "b"], [tmp_path / "c"])


# --- command line: exit code 1, one line, nothing written ------------------------------

def test_cli_bad_data_exit_1_and_nothing_written(tmp_path):
    out = tmp_path / "out.json"
    result = CliRunner().invoke(cli, ["score", str(tmp_path / "missing"), "--encoder", "torchvision:resnet18",
                                      "--json", str(out), "--quiet"])
    assert result.exit_code == 1
    assert "data folder not found" in result.output
    assert not out.exists()


def test_cli_unpaired_exit_1(tmp_path):
    root = _dataset(tmp_path / "d", names=("a.png",))
    _png(root / "clean" / "b.png")
    out = tmp_path / "r.json"
    result = CliRunner().invoke(cli, ["score", str(root), "--encoder", "torchvision:resnet18", "--json", str(out)])
    assert result.exit_code == 1 and "clean/b.png" in result.output and not out.exists()


def test_cli_usage_error_exit_2():
    result = CliRunner().invoke(cli, ["score"])
    assert result.exit_code == 2


# --------------------------------------------------------------------------- silent wrong results


def _ids(n, repeat=1):
    return "file,part,scene_id\n" + "".join(f"s{i:02d}.png,{'ab'[i % 2]},id{i // repeat}\n" for i in range(n))


def test_a_duplicated_header_is_refused_naming_the_column(tmp_path):
    # csv.DictReader-style reading would keep the last 'y' and drop the first silently.
    root = _dataset(tmp_path, labels="file,y,part,y\na.png,1,bolt,2\nb.png,2,nut,3\nc.png,3,nut,4\n")
    with pytest.raises(InvarianceError, match=r"labels.csv: column 'y' appears more than once in the header"):
        discover_pairs(root)


def test_a_text_column_of_distinct_values_is_an_identifier_not_a_task(tmp_path):
    # Rule (data._IDENTIFIER_MIN_ROWS): with 10 or more labelled rows, a text column in which
    # more than half the rows hold a value no other row has is an identifier. A probe on it
    # scores 0 on both views, a gap of 0 that would pass --max-probe-gap.
    names = [f"s{i:02d}.png" for i in range(12)]
    root = _dataset(tmp_path, names=names, labels=_ids(12))
    with pytest.warns(UserWarning, match=r"column 'scene_id' is not probed: more than half of its rows"):
        pairs = discover_pairs(root)
    assert set(pairs.labels.tasks) == {"part"} and pairs.labels.identifiers == ["scene_id"]
    assert pairs.describe()["identifier_columns"] == ["scene_id"] and pairs.labels.notes
    assert pairs.subset([0, 1]).labels.identifiers == ["scene_id"]


def test_classes_shared_by_pairs_of_scenes_stay_a_task(tmp_path):
    names = [f"s{i:02d}.png" for i in range(12)]
    root = _dataset(tmp_path, names=names, labels=_ids(12, repeat=2))  # every value twice: no singleton
    pairs = discover_pairs(root)
    assert pairs.labels.task_kinds == {"part": "classification", "scene_id": "classification"}
    # under 10 labelled rows no probe is fitted, so the column is left alone
    small = _dataset(tmp_path / "small", names=names[:3], labels=_ids(3))
    assert "scene_id" in discover_pairs(small).labels.tasks


def test_an_identifier_column_through_score_features_is_warned_about_on_one_line(tmp_path):
    rng = np.random.default_rng(0)
    for name in ("a.npy", "b.npy"):
        np.save(tmp_path / name, rng.normal(size=(30, 4)))
    (tmp_path / "l.csv").write_text("file,who\n" + "".join(f"s{i},person{i}\n" for i in range(30)))
    res = CliRunner().invoke(cli, ["score", "--features", str(tmp_path / "a.npy"), str(tmp_path / "b.npy"),
                                   "--labels", str(tmp_path / "l.csv"), "--permutations", "20",
                                   "--max-probe-gap", "0.1"])
    assert "warning: " in res.stderr and "column 'who' is not probed" in res.stderr
    assert "probe who" not in res.output and "UserWarning" not in res.output


def test_dataset_path_is_stored_absolute(tmp_path, monkeypatch):
    _dataset(tmp_path / "set")
    monkeypatch.chdir(tmp_path)
    described = discover_pairs("set").describe()["path"]
    assert described == str(tmp_path / "set")


def test_load_rgb_records_the_file_for_later_messages(tmp_path):
    from invariance.data import IMAGE_SOURCE_KEY

    path = _png(tmp_path / "x.png")
    assert load_rgb(path).info[IMAGE_SOURCE_KEY] == str(path)


# --------------------------------------------------------------------------- episodes (groups)


def test_episode_column_is_the_group_not_a_task(tmp_path):
    labels = "file,episode,part\na.png,ep1,nut\nb.png,ep1,bolt\nc.png,ep2,nut\n"
    pairs = discover_pairs(_dataset(tmp_path / "d", labels=labels))
    assert list(pairs.labels.groups) == ["ep1", "ep1", "ep2"]
    assert "episode" not in pairs.labels.tasks and "part" in pairs.labels.tasks
    assert pairs.describe()["groups"] == 2
    assert list(pairs.subset([2, 0]).labels.groups) == ["ep2", "ep1"]


def test_an_empty_episode_cell_names_its_line(tmp_path):
    labels = "file,episode\na.png,ep1\nb.png,\nc.png,ep2\n"
    with pytest.raises(InvarianceError, match="line 3: empty 'episode' cell"):
        discover_pairs(_dataset(tmp_path / "d", labels=labels))


def test_folders_sharing_no_name_are_unpaired_and_others_are_not(tmp_path):
    from invariance.data import unpaired_folder

    root = tmp_path / "u"
    for n in ("a.png", "b.png"):
        _png(root / "clean" / n)
    for n in ("x.png", "y.png", "z.png"):
        _png(root / "cluttered" / n)
    clean, cluttered = unpaired_folder(root)
    assert [p.name for p in clean] == ["a.png", "b.png"] and len(cluttered) == 3
    assert unpaired_folder(_dataset(tmp_path / "p")) is None  # shared names: a paired set
