"""Paired image sets: discovery, labels and loading.

A data set is a folder with ``clean/`` and ``cluttered/`` holding the same relative file
names (one scene, two views), plus an optional ``labels.csv`` whose first column is the
file name. Other columns are task labels (text columns are classes, numeric columns are
regression targets); columns named ``factor_*`` or ``level`` describe the clutter and are
used for breakdowns, not probes. A manifest CSV with explicit ``clean`` and ``cluttered``
path columns is accepted in place of a folder.
"""

from __future__ import annotations

import csv
import hashlib
import os
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence

import numpy as np
from PIL import Image, ImageOps

from .errors import InvarianceError

IMAGE_EXTENSIONS = frozenset({".png", ".jpg", ".jpeg", ".bmp", ".tif", ".tiff", ".webp", ".gif"})
LABELS_FILE = "labels.csv"
# The labels.csv column naming each pair's episode (group): never probed, it sets the unit of
# every split and resample (docs/sources.md).
GROUP_COLUMN = "episode"
_MAX_LISTED = 10  # names shown in an error before "and N more"
# Key of ``Image.info`` where :func:`load_rgb` records the file an image came from, so
# later steps (preprocessing) can name it in their messages.
IMAGE_SOURCE_KEY = "invariance_source"
# A text column is an identifier (a name or id), not a task, when more than half of its
# labelled rows hold a value no other row has: a probe cannot learn a class it sees once,
# and scores 0 on clean and cluttered alike, which would read as "no gap". Checked from 10
# labelled rows, the fewest a probe is fitted on (metrics.probe.MIN_LABELLED_PAIRS).
_IDENTIFIER_MIN_ROWS = 10


@dataclass
class LabelTable:
    """Per-pair labels, rows in the order of the pair set.

    Attributes
    ----------
    tasks : dict of str to ndarray
        Task label columns: float64 arrays for numeric columns, arrays of ``str`` for classes.
    task_kinds : dict of str to str
        ``"regression"`` or ``"classification"`` for each task column.
    factors : dict of str to ndarray
        ``factor_*`` and ``level`` columns as arrays of ``str`` (values are groups).
    identifiers : list of str
        Text columns left out of the probes because their values are (nearly) all
        distinct: names or ids, not classes (see :data:`_IDENTIFIER_MIN_ROWS`).
    notes : list of str
        Sentences for the result's warnings (one per identifier column).
    groups : ndarray of str or None
        The ``episode`` column: the group of each pair, kept whole by every split and
        resample (docs/sources.md); never probed.
    """

    tasks: dict[str, np.ndarray] = field(default_factory=dict)
    task_kinds: dict[str, str] = field(default_factory=dict)
    factors: dict[str, np.ndarray] = field(default_factory=dict)
    identifiers: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    groups: np.ndarray | None = None

    def subset(self, indices) -> "LabelTable":
        idx = np.asarray(indices, dtype=int)
        return LabelTable(
            tasks={k: v[idx] for k, v in self.tasks.items()},
            task_kinds=dict(self.task_kinds),
            factors={k: v[idx] for k, v in self.factors.items()},
            identifiers=list(self.identifiers),
            notes=list(self.notes),
            groups=None if self.groups is None else self.groups[idx],
        )


@dataclass
class PairSet:
    """Clean and cluttered image paths of the same scenes, row ``i`` of each is one scene."""

    names: list[str]
    clean: list[Path]
    cluttered: list[Path]
    root: Path | None = None
    labels: LabelTable | None = None
    skipped: list[str] = field(default_factory=list)
    _hash: str | None = field(default=None, repr=False, compare=False)

    def __post_init__(self):
        if not (len(self.names) == len(self.clean) == len(self.cluttered)):
            raise ValueError("names, clean and cluttered must have the same length")

    def __len__(self) -> int:
        return len(self.names)

    @classmethod
    def from_paths(cls, clean: Sequence, cluttered: Sequence, names: Sequence[str] | None = None):
        """Build a pair set from two equally long lists of image paths (row i paired)."""
        clean = [Path(p) for p in clean]
        cluttered = [Path(p) for p in cluttered]
        if len(clean) != len(cluttered):
            raise InvarianceError(
                f"{len(clean)} clean paths but {len(cluttered)} cluttered paths; give one of each per scene"
            )
        names = list(names) if names is not None else [p.name for p in clean]
        return cls(names=names, clean=clean, cluttered=cluttered)

    def subset(self, indices) -> "PairSet":
        """The pairs at ``indices`` (both views of each scene travel together)."""
        idx = [int(i) for i in indices]
        return PairSet(
            names=[self.names[i] for i in idx],
            clean=[self.clean[i] for i in idx],
            cluttered=[self.cluttered[i] for i in idx],
            root=self.root,
            labels=self.labels.subset(idx) if self.labels is not None else None,
        )

    def content_hash(self) -> str:
        """SHA-256 over the names and the bytes of every image, in pair order."""
        if self._hash is None:
            digest = hashlib.sha256()
            for name, a, b in zip(self.names, self.clean, self.cluttered):
                digest.update(name.encode("utf-8") + b"\0")
                for path in (a, b):
                    digest.update(_file_digest(path))
            self._hash = digest.hexdigest()
        return self._hash

    def describe(self) -> dict:
        """JSON-able summary for the result file."""
        # Absolute, so a report rendered from another working folder still finds the images.
        info = {"path": os.path.abspath(self.root) if self.root else None, "pairs": len(self)}
        if self.labels is not None:
            info["tasks"] = dict(self.labels.task_kinds)
            info["factors"] = sorted(self.labels.factors)
            if self.labels.identifiers:
                info["identifier_columns"] = list(self.labels.identifiers)
            if self.labels.groups is not None:
                info["groups"] = int(np.unique(self.labels.groups).size)
                info["group_column"] = GROUP_COLUMN
        if self.skipped:
            info["skipped_unpaired"] = len(self.skipped)
        return info


def _file_digest(path: Path) -> bytes:
    try:
        return hashlib.sha256(Path(path).read_bytes()).digest()
    except OSError as exc:
        raise InvarianceError(f"cannot read image {path}: {exc.strerror or exc}; check the file exists and is readable") from None


def _shown(name: str) -> str:
    """A name as typed, or quoted with escapes when it holds a line break or another control character."""
    return repr(name) if any(ord(c) < 32 or 127 <= ord(c) < 160 for c in name) else name


def _listing(names: Sequence[str]) -> str:
    shown = ", ".join(_shown(str(n)) for n in names[:_MAX_LISTED])
    more = len(names) - _MAX_LISTED
    return shown + (f" and {more} more" if more > 0 else "")


def _image_names(folder: Path) -> list[str]:
    return sorted(
        p.relative_to(folder).as_posix()
        for p in folder.rglob("*")
        if p.is_file() and p.suffix.lower() in IMAGE_EXTENSIONS and not p.name.startswith(".")
    )


def discover_pairs(path, *, skip_unpaired: bool = False, labels: bool = True) -> PairSet:
    """Find the paired images of a data set folder (or read a manifest CSV).

    Parameters
    ----------
    path : str or Path
        A folder with ``clean/`` and ``cluttered/`` (same relative names) and an optional
        ``labels.csv``, or a manifest CSV with ``clean`` and ``cluttered`` columns.
    skip_unpaired : bool
        Drop images that have no partner instead of stopping with an error.
    labels : bool
        Read ``labels.csv`` when present.

    Returns
    -------
    PairSet
    """
    path = Path(path)
    if path.is_file() and path.suffix.lower() == ".csv":
        return load_manifest(path)
    if not path.exists():
        raise InvarianceError(
            f"data folder not found: {path}; pass a folder holding clean/ and cluttered/ "
            "(make one with `invariance scenes OUT_DIR`)"
        )
    if not path.is_dir():
        raise InvarianceError(f"{path} is not a folder or a manifest .csv; pass a folder holding clean/ and cluttered/")
    clean_dir, cluttered_dir = path / "clean", path / "cluttered"
    for sub in (clean_dir, cluttered_dir):
        if not sub.is_dir():
            raise InvarianceError(
                f"{sub} is missing; a data folder holds clean/ and cluttered/ with matching file names"
            )
    clean_names, cluttered_names = _image_names(clean_dir), _image_names(cluttered_dir)
    if not clean_names and not cluttered_names:
        raise InvarianceError(
            f"no images in {clean_dir} or {cluttered_dir}; add PNG or JPEG files with matching names to both"
        )
    names, unpaired = _match_names(clean_names, cluttered_names)
    if unpaired and not skip_unpaired:
        raise InvarianceError(
            f"{len(unpaired)} images in {path} have no partner: {_listing(unpaired)}; "
            "add the missing views or pass skip_unpaired=True (--skip-unpaired) to go on without them"
        )
    if not names:
        raise InvarianceError(f"no file name appears in both {clean_dir} and {cluttered_dir}; the two views of a scene must share a name")
    pairs = PairSet(
        names=names,
        clean=[clean_dir / n for n in names],
        cluttered=[cluttered_dir / n for n in names],
        root=path,
        skipped=unpaired,
    )
    labels_path = path / LABELS_FILE
    if labels and labels_path.is_file():
        pairs.labels = read_labels(labels_path, names)
    return pairs


def _match_names(clean_names, cluttered_names):
    a, b = set(clean_names), set(cluttered_names)
    paired = sorted(a & b)
    unpaired = sorted(f"clean/{n}" for n in a - b) + sorted(f"cluttered/{n}" for n in b - a)
    return paired, unpaired


def load_manifest(path) -> PairSet:
    """Read a manifest CSV with ``clean`` and ``cluttered`` columns (paths relative to the CSV).

    An optional ``name`` column names the pair; any other columns are labels, as in
    ``labels.csv``.
    """
    path = Path(path)
    header, rows = _read_csv(path)
    for col in ("clean", "cluttered"):
        if col not in header:
            raise InvarianceError(f"{path} has no '{col}' column; a manifest needs columns clean,cluttered (paths to each view)")
    ci, ki = header.index("clean"), header.index("cluttered")
    ni = header.index("name") if "name" in header else None
    base = path.parent
    clean, cluttered, names = [], [], []
    for line_no, row in rows:
        clean.append(_resolve(base, row[ci]))
        cluttered.append(_resolve(base, row[ki]))
        names.append(row[ni] if ni is not None else row[ci])
    if not names:
        raise InvarianceError(f"{path} lists no pairs; add one row per scene with its clean and cluttered paths")
    missing = [str(p) for p in clean + cluttered if not p.is_file()]
    if missing:
        raise InvarianceError(f"{len(missing)} files named in {path} do not exist: {_listing(missing)}; fix the paths (relative to the manifest's folder)")
    _refuse_duplicates(path, names)
    label_cols = [i for i, h in enumerate(header) if i not in (ci, ki, ni)]
    table = _label_table(path, [header[i] for i in label_cols], [(n, [r[i] for i in label_cols]) for n, r in rows])
    pairs = PairSet(names=names, clean=clean, cluttered=cluttered, root=base, labels=table if label_cols else None)
    return pairs


def _resolve(base: Path, value: str) -> Path:
    p = Path(value.strip())
    return p if p.is_absolute() else base / p


def _read_csv(path: Path) -> tuple[list[str], list[tuple[int, list[str]]]]:
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            reader = csv.reader(fh)
            header = [h.strip() for h in next(reader, [])]
            rows = [(reader.line_num, [c.strip() for c in row]) for row in reader if any(c.strip() for c in row)]
    except UnicodeDecodeError:
        raise InvarianceError(f"{path} is not UTF-8 text; save it as UTF-8 CSV") from None
    except (OSError, csv.Error) as exc:
        raise InvarianceError(f"cannot read {path}: {exc}; check it is a readable CSV file") from None
    if not header:
        raise InvarianceError(f"{path} is empty; it needs a header row (file,...) and one row per pair")
    twice = sorted({h for h in header if header.count(h) > 1})
    if twice:
        raise InvarianceError(f"{path}: column {twice[0]!r} appears more than once in the header; "
                              "give each column its own name")
    for line_no, row in rows:
        if len(row) != len(header):
            raise InvarianceError(
                f"{path} line {line_no} has {len(row)} fields, the header has {len(header)}; fix that row"
            )
    return header, rows


def _refuse_duplicates(path: Path, names: Sequence[str]) -> None:
    seen, dups = set(), []
    for n in names:
        if n in seen:
            dups.append(n)
        seen.add(n)
    if dups:
        raise InvarianceError(f"{path} names {len(dups)} files twice: {_listing(sorted(set(dups)))}; keep one row per file")


def read_labels(path, names: Sequence[str]) -> LabelTable:
    """Read ``labels.csv`` and order its rows like ``names``.

    The first column is the file name (relative, as under ``clean/``). Every pair needs
    exactly one row; rows for files that are not pairs are ignored.
    """
    path = Path(path)
    header, rows = _read_csv(path)
    if len(header) < 2:
        raise InvarianceError(f"{path} has no label columns; add columns after the file name (or delete the file)")
    keys = [r[0] for _, r in rows]
    _refuse_duplicates(path, keys)
    by_name = {r[0]: (line_no, r[1:]) for line_no, r in rows}
    missing = [n for n in names if n not in by_name]
    if missing:
        raise InvarianceError(
            f"{path} has no row for {len(missing)} pairs: {_listing(missing)}; add a row per pair (first column the file name)"
        )
    ordered = [(n, by_name[n][1], by_name[n][0]) for n in names]
    return _label_table(path, header[1:], [(n, vals) for n, vals, _ in ordered], [ln for *_, ln in ordered])


def _is_factor(column: str) -> bool:
    return column.startswith("factor_") or column == "level"


def _group_values(path: Path, values: Sequence[str], lines: Sequence[int]) -> np.ndarray:
    """The ``episode`` column as strings; an empty cell is an error naming its line."""
    for value, line in zip(values, lines):
        if str(value).strip() == "":
            raise InvarianceError(
                f"{path} line {line}: empty {GROUP_COLUMN!r} cell; every row needs its episode (group) "
                f"name, or drop the column to treat each pair as its own group"
            )
    return np.array([str(v).strip() for v in values], dtype=object).astype(str)


def _label_table(path: Path, columns: Sequence[str], rows, line_numbers=None) -> LabelTable:
    table = LabelTable()
    for j, col in enumerate(columns):
        values = [vals[j] for _, vals in rows]
        lines = line_numbers or list(range(2, len(values) + 2))
        if col == GROUP_COLUMN:
            table.groups = _group_values(path, values, lines)
        elif _is_factor(col):
            table.factors[col] = np.array(values, dtype=object).astype(str)
        elif _looks_numeric(values):
            table.tasks[col] = _parse_numeric(path, col, values, lines)
            table.task_kinds[col] = "regression"
        elif _is_identifier(values):
            table.identifiers.append(col)
            table.notes.append(_identifier_note(path, col))
            warnings.warn(table.notes[-1], UserWarning, stacklevel=2)
        else:
            table.tasks[col] = np.array(values, dtype=object).astype(str)
            table.task_kinds[col] = "classification"
    return table


def _is_identifier(values: Sequence[str]) -> bool:
    """More than half of the labelled rows hold a value no other row has (see _IDENTIFIER_MIN_ROWS)."""
    filled = [v for v in values if v != "" and v.lower() != "nan"]
    if len(filled) < _IDENTIFIER_MIN_ROWS:
        return False
    counts: dict[str, int] = {}
    for v in filled:
        counts[v] = counts.get(v, 0) + 1
    return 2 * sum(1 for c in counts.values() if c == 1) > len(filled)


def _identifier_note(path: Path, col: str) -> str:
    return (f"{path}: column {col!r} is not probed: more than half of its rows hold a value no other row has, "
            "so it names or numbers the scenes instead of sorting them into classes; to probe it, give it classes "
            "that several scenes share")


def _to_float(value: str) -> float | None:
    try:
        out = float(value)
    except ValueError:
        return None
    return out if np.isfinite(out) else None


def _looks_numeric(values: Sequence[str]) -> bool:
    """A column is numeric when most of its non-empty values are numbers (common practice).

    Half or more is the rule: a column of numbers with a stray typo is a numeric column
    with an error in it, reported as such, rather than a silently created class label.
    """
    filled = [v for v in values if v != ""]
    if not filled:
        return False
    return sum(_to_float(v) is not None for v in filled) * 2 >= len(filled)


def _parse_numeric(path: Path, col: str, values: Sequence[str], lines: Sequence[int]) -> np.ndarray:
    out = np.empty(len(values), dtype=np.float64)
    for i, (v, line_no) in enumerate(zip(values, lines)):
        parsed = _to_float(v)
        if parsed is None:
            shown = repr(v) if v else "an empty value"
            raise InvarianceError(
                f"{path} line {line_no}, column {col!r}: {shown} is not a finite number in a numeric column; "
                "fix the value"
            )
        out[i] = parsed
    return out


def load_rgb(path) -> Image.Image:
    """Open an image of any PIL mode as 8-bit RGB, with its EXIF orientation applied.

    Transparent pixels are composited over white (common practice for thumbnails and
    scans); 16-bit and float greyscale are scaled to 0-255 rather than clipped. Images
    above PIL's decompression-bomb limit (``Image.MAX_IMAGE_PIXELS``) are refused.
    """
    path = Path(path)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error", Image.DecompressionBombWarning)
            with Image.open(path) as im:
                im.load()
                rgb = _to_rgb(ImageOps.exif_transpose(im))
                rgb.info[IMAGE_SOURCE_KEY] = str(path)
                return rgb
    except (Image.DecompressionBombError, Image.DecompressionBombWarning):
        raise InvarianceError(
            f"{path} has more pixels than the safety limit ({Image.MAX_IMAGE_PIXELS:,}); "
            "downscale it, it may be a decompression bomb"
        ) from None
    except FileNotFoundError:
        raise InvarianceError(f"image not found: {path}; check the data folder") from None
    except (OSError, SyntaxError, ValueError) as exc:
        raise InvarianceError(f"cannot read image {path} ({exc}); the file is truncated or not an image, replace it") from None


def _to_rgb(im: Image.Image) -> Image.Image:
    if im.mode in ("I;16", "I;16B", "I;16L", "I;16N", "I", "F"):
        arr = np.asarray(im, dtype=np.float64)
        top = 65535.0 if im.mode.startswith("I;16") else max(float(arr.max()), 1.0)
        arr = np.clip(arr / top * 255.0 + 0.5, 0, 255).astype(np.uint8)
        return Image.fromarray(arr, mode="L").convert("RGB")
    if im.mode == "P" and "transparency" in im.info:
        im = im.convert("RGBA")
    if im.mode in ("RGBA", "LA", "PA", "RGBa", "La"):
        rgba = im.convert("RGBA")
        white = Image.new("RGBA", rgba.size, (255, 255, 255, 255))
        return Image.alpha_composite(white, rgba).convert("RGB")
    return im.convert("RGB")


def read_labels_in_order(path, n_rows: int) -> tuple[list[str], LabelTable]:
    """Read a labels CSV whose rows follow the rows of a feature matrix (``--features``).

    Returns the names in the first column and the label table in file order.
    """
    path = Path(path)
    header, rows = _read_csv(path)
    if len(rows) != n_rows:
        raise InvarianceError(
            f"{path} has {len(rows)} rows but the feature files have {n_rows}; give one labels row per feature row, in order"
        )
    names = [r[0] for _, r in rows]
    _refuse_duplicates(path, names)
    table = _label_table(path, header[1:], [(r[0], r[1:]) for _, r in rows], [ln for ln, _ in rows])
    return names, table


def label_columns(pairs) -> tuple[dict | None, dict | None]:
    """The probe tasks and clutter factors of a PairSet, each ``None`` when it has none."""
    if pairs.labels is None:
        return None, None
    return pairs.labels.tasks or None, pairs.labels.factors or None


def pair_groups(pairs):
    """The group (episode) of each pair from labels.csv, or ``None`` when there is none."""
    if pairs.labels is None:
        return None
    return pairs.labels.groups


def _unpaired_names(path: Path):
    """The image names under ``clean/`` and ``cluttered/`` when they share none, else ``None``."""
    clean_dir, cluttered_dir = path / "clean", path / "cluttered"
    if not (clean_dir.is_dir() and cluttered_dir.is_dir()):
        return None
    clean_names, cluttered_names = _image_names(clean_dir), _image_names(cluttered_dir)
    if not clean_names or not cluttered_names or set(clean_names) & set(cluttered_names):
        return None
    return clean_names, cluttered_names


def unpaired_folder(path):
    """``(clean_paths, cluttered_paths)`` when a data folder's two sub-folders share no name.

    Such a folder holds two unpaired domains (sim vs real, bench vs site); ``None`` when
    it is not a folder with ``clean/`` and ``cluttered/``, or when any name is shared
    (then it is a paired set, and orphans are :func:`discover_pairs`'s business). Its
    labels: :func:`domain_labels`.
    """
    path = Path(path)
    names = _unpaired_names(path)
    if names is None:
        return None
    return [path / "clean" / n for n in names[0]], [path / "cluttered" / n for n in names[1]]


# The sub-folders of a data folder, in the order of its two domains (A, B).
_DOMAIN_FOLDERS = ("clean", "cluttered")


def domain_labels(folder, names) -> LabelTable | None:
    """Labels of the images ``names`` of one image folder scored as a domain.

    An image folder's own ``labels.csv`` names each image relative to the folder. When
    the folder is the ``clean/`` or ``cluttered/`` sub-folder of an *unpaired* data folder
    (:func:`unpaired_folder`), the labels of both domains may sit in one ``labels.csv`` at
    the data folder's root instead, whose first column is each image's path under the data
    folder: ``clean/NAME`` or ``cluttered/NAME``. The prefix says which domain a row
    belongs to, and keeps a file written for a paired folder (bare names, one row per
    pair) from being read as this one. Every image needs one row; the column kinds (class,
    number, factor, ``episode``) are decided over the whole file, so both domains read a
    column the same way. Labels in both places are refused.

    Parameters
    ----------
    folder : str or Path
        The image folder.
    names : sequence of str
        Its images, relative to it, in the order of the source's rows.

    Returns
    -------
    LabelTable or None
        Rows in the order of ``names``; ``None`` without labels.
    """
    folder = Path(folder)
    own, root = folder / LABELS_FILE, folder.parent / LABELS_FILE
    both = _unpaired_names(folder.parent) if folder.name in _DOMAIN_FOLDERS and root.is_file() else None
    if both is not None and own.is_file():
        raise InvarianceError(
            f"labels for {folder} are given twice, in {own} and in {root}; keep one (the root file names the "
            f"images clean/NAME and cluttered/NAME)"
        )
    if own.is_file():
        return read_labels(own, names)
    if both is None:
        return None
    table, keys = _root_labels(folder.parent, *both)
    row_of = {key: i for i, key in enumerate(keys)}
    wanted = [f"{folder.name}/{n}" for n in names]
    missing = [k for k in wanted if k not in row_of]
    if missing:  # an image added since the folder was listed
        raise InvarianceError(f"{root} was read for other images than {folder} holds now ({_listing(missing)}); "
                              f"run again")
    return table.subset([row_of[k] for k in wanted])


def _root_labels(root: Path, clean_names, cluttered_names):
    """The root ``labels.csv`` of an unpaired data folder over every image of both domains.

    Returns the label table and its row keys (``clean/NAME`` ..., then ``cluttered/NAME`` ...).
    """
    path = root / LABELS_FILE
    keys = [f"clean/{n}" for n in clean_names] + [f"cluttered/{n}" for n in cluttered_names]
    _, csv_rows = _read_csv(path)
    given = {r[0] for _, r in csv_rows}
    prefixes = tuple(f"{d}/" for d in _DOMAIN_FOLDERS)
    if given and not any(k.startswith(prefixes) for k in given):
        raise InvarianceError(
            f"{path}: clean/ and cluttered/ share no file name, so {root} is scored as two unpaired domains and "
            f"its labels.csv names each image by its path under the folder; write clean/NAME or cluttered/NAME "
            f"in the first column (found {_shown(min(given))})"
        )
    missing = [k for k in keys if k not in given]
    if missing:
        raise InvarianceError(
            f"{path} has no row for {len(missing)} images: {_listing(missing)}; give every image of clean/ and "
            f"cluttered/ one row, first column its path under {root} (clean/NAME or cluttered/NAME)"
        )
    return read_labels(path, keys), keys
