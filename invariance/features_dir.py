"""A features directory: extracted features as checksummed shards, readable on another machine.

Layout::

    FEATURES_DIR/
      manifest.json               written last: format, encoder identity, layers, shards
      .lock                       held (flock) while an extraction writes here
      shards/00000.json           one record per shard: its pairs, rows, checksums
      shards/00000.L0.npy         layer 0 of shard 0: array (2, rows, D); [0] clean, [1] cluttered

Shards are ``.npy`` files rather than Parquet: a dense (rows, D) float matrix is what every
statistic reads, ``.npy`` memory-maps straight into numpy (bounded memory, no copy), needs
no optional dependency to read (the statistics machine may lack pyarrow), and is read with
``allow_pickle=False``, so a hostile file can hold numbers only. A shard and its record are
written together, atomically (:func:`invariance._io.write_outputs_together`), so a shard is
either whole or absent; the manifest is written after every shard, so a directory without
one is an extraction that has not finished (rerun it to resume).

The encoder identity is the key parts of the feature cache (:mod:`invariance.encoders.cache`):
spec, weights file SHA-256, module state SHA-256, code SHA-256 and preprocessing, plus the
layers. A reader asked for another encoder or layer than the directory holds refuses it.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import re
from pathlib import Path
from typing import Iterator

import numpy as np

from ._io import atomic_write_json, dumps_json, file_sha256, write_outputs_together
from .errors import InvalidParameter, InvarianceError

FORMAT = "invariance.features-dir/1"
MANIFEST = "manifest.json"
LOCK = ".lock"
SHARDS = "shards"
# Largest manifest or shard record read (bytes): a million pair names of ~40 characters
# are ~50 MB of JSON; 1 GiB bounds what a hostile file can make the reader allocate.
MAX_JSON_BYTES = 2**30
# Feature dtypes a shard may hold: what extraction writes (float32) and the compact forms.
DTYPES = ("float16", "float32", "float64")
# Bytes hashed per read when checking a shard (bounded memory whatever the shard size).
_IDENTITY_KEYS = ("spec", "weights_sha256", "state_sha256", "code_sha256", "preprocess", "layers")


def identity_sha256(identity: dict) -> str:
    """SHA-256 of an encoder identity written as canonical JSON (sorted keys)."""
    text = json.dumps({k: identity.get(k) for k in _IDENTITY_KEYS}, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def encoder_identity(encoder, layers) -> dict:
    """What makes features of ``encoder`` at ``layers`` what they are (the cache key's parts).

    Parameters
    ----------
    encoder : invariance.encoders.Encoder
    layers : list of str

    Returns
    -------
    dict
        ``spec``, ``weights_sha256``, ``state_sha256``, ``code_sha256``, ``preprocess``,
        ``layers`` and ``identity_sha256`` over all of them.
    """
    from .encoders.weights import _state_sha256

    identity = {"spec": encoder.spec, "weights_sha256": encoder.weights_sha256,
                "state_sha256": _state_sha256(encoder.module), "code_sha256": encoder.code_sha256,
                "preprocess": json.loads(dumps_json(encoder.preprocess.describe())), "layers": list(layers)}
    identity["identity_sha256"] = identity_sha256(identity)
    return identity


def shard_stem(index: int) -> str:
    return f"{index:05d}"


def _read_json(path: Path, what: str) -> dict:
    try:
        size = path.stat().st_size
        if size > MAX_JSON_BYTES:
            raise ValueError(f"{size:,} bytes, above the {MAX_JSON_BYTES:,} read")
        data = json.loads(path.read_bytes().decode("utf-8"))
    except (OSError, ValueError, UnicodeDecodeError, RecursionError) as exc:  # RecursionError: deeply nested JSON
        raise InvarianceError(f"{path}: the {what} cannot be read ({str(exc).splitlines()[0] if str(exc) else type(exc).__name__}); "
                              "extract the features again into a new folder") from None
    if not isinstance(data, dict) or data.get("format") != FORMAT:
        raise InvarianceError(f"{path}: not a {what} of {FORMAT} (format {data.get('format') if isinstance(data, dict) else None!r}); "
                              "point at a folder written by `invariance extract`")
    return data


def _check_record(path: Path, rec: dict, n_layers: int) -> dict:
    """A shard record's fields, type-checked (every file is hostile)."""
    names, episodes = rec.get("names"), rec.get("episodes")
    files, sums = rec.get("files"), rec.get("sha256")
    ok = (isinstance(rec.get("index"), int) and isinstance(rec.get("rows"), int) and rec["rows"] >= 1
          and isinstance(names, list) and len(names) == rec["rows"] and all(isinstance(s, str) for s in names)
          and (episodes is None or (isinstance(episodes, list) and len(episodes) == rec["rows"]
                                    and all(isinstance(s, str) for s in episodes)))
          and isinstance(files, list) and isinstance(sums, list) and len(files) == len(sums) == n_layers
          and all(isinstance(f, str) and re.fullmatch(r"\d{5,}\.L\d+\.npy", f) for f in files)
          and all(isinstance(s, str) and re.fullmatch(r"[0-9a-f]{64}", s) for s in sums))
    if not ok:
        raise InvarianceError(f"{path}: shard record is malformed (index, rows, names, files, sha256); "
                              "delete it and rerun `invariance extract` to write the shard again")
    return rec


class FeaturesDirectory:
    """Read a features directory, checking everything before a number is used.

    Parameters
    ----------
    path : path
        The folder written by :func:`invariance.extract.extract_to_directory`.
    spec : str, optional
        Refuse the folder unless it holds features of this encoder spec.
    layer : str, optional
        Refuse the folder unless it holds this layer.
    identity_sha256 : str, optional
        Refuse the folder unless its encoder identity (spec, weights, state, code,
        preprocessing, layers) has this hash (from :func:`encoder_identity`).

    Raises
    ------
    InvarianceError
        No manifest (an unfinished extraction), a malformed manifest, another encoder or
        layer than the one named, or a shard file missing from the folder.
    """

    def __init__(self, path, *, spec=None, layer=None, identity_sha256=None):
        self.path = Path(path)
        self._checked = set()
        if not self.path.is_dir():
            raise InvarianceError(f"{self.path}: no such features folder; run `invariance extract` first")
        manifest = self.path / MANIFEST
        if not manifest.is_file():
            raise InvarianceError(f"{self.path}: no {MANIFEST}, so its extraction has not finished; rerun "
                                  "`invariance extract` with the same --out to resume it")
        self.manifest = _read_json(manifest, "features manifest")
        self._check_manifest()
        self._check_wanted(spec, layer, identity_sha256)

    def _check_manifest(self):
        m, where = self.manifest, self.path / MANIFEST
        ident, shards = m.get("encoder"), m.get("shards")
        layers = ident.get("layers") if isinstance(ident, dict) else None
        dims = m.get("dims")
        if (not isinstance(ident, dict) or not isinstance(layers, list) or not layers
                or not all(isinstance(x, str) for x in layers) or not isinstance(shards, list) or not shards
                or m.get("dtype") not in DTYPES or not isinstance(dims, list) or len(dims) != len(layers)
                or not all(isinstance(d, int) and d >= 1 for d in dims)):
            raise InvarianceError(f"{where}: manifest is malformed; extract the features again into a new folder")
        self.shard_records = [_check_record(where, rec, len(layers)) if isinstance(rec, dict) else
                              _check_record(where, {}, len(layers)) for rec in shards]
        if [r["index"] for r in self.shard_records] != list(range(len(shards))):
            raise InvarianceError(f"{where}: shards are not numbered 0..{len(shards) - 1}; extract again")
        self.identity, self.layers, self.dtype = ident, list(layers), np.dtype(m["dtype"])
        self.dims = dict(zip(layers, dims))
        self.n_pairs = sum(r["rows"] for r in self.shard_records)
        if m.get("pairs") != self.n_pairs:
            raise InvarianceError(f"{where}: manifest says {m.get('pairs')} pairs but its shards hold {self.n_pairs}; "
                                  "extract again")

    def _check_wanted(self, spec, layer, identity_hash):
        held = f"encoder {self.identity.get('spec')!r}, layers {self.layers}"
        if spec is not None and self.identity.get("spec") != spec:
            raise InvarianceError(f"{self.path}: holds features of {held}, not of encoder {spec!r}; extract "
                                  f"{spec} into its own folder or name the encoder it was made with")
        if layer is not None and layer not in self.layers:
            raise InvarianceError(f"{self.path}: holds features of {held}, not layer {layer!r}; pass one of "
                                  f"{self.layers} or extract that layer into its own folder")
        if identity_hash is not None and self.identity.get("identity_sha256") != identity_hash:
            raise InvarianceError(f"{self.path}: holds features of {held} with other weights, code or "
                                  "preprocessing than the encoder given; extract again into a new folder")

    # -- reading ---------------------------------------------------------------------
    @property
    def names(self) -> list[str]:
        """Pair names in row order (all shards)."""
        return [n for r in self.shard_records for n in r["names"]]

    @property
    def episodes(self) -> list[str] | None:
        """Episode key per pair in row order, or ``None`` when the source had none."""
        if any(r.get("episodes") is None for r in self.shard_records):
            return None
        return [e for r in self.shard_records for e in r["episodes"]]

    def _layer_index(self, layer):
        layer = self.layers[-1] if layer is None else layer
        if layer not in self.layers:
            raise InvalidParameter("layer", f"layer={layer!r} is not in {self.path}; pass one of {self.layers}")
        return self.layers.index(layer)

    def shard(self, index: int, layer=None, *, verify: bool = True) -> np.ndarray:
        """Shard ``index`` of ``layer`` as a read-only memory map of shape (2, rows, D).

        With ``verify`` the file's SHA-256 is checked first (one bounded-memory pass).
        """
        rec, li = self.shard_records[index], self._layer_index(layer)
        path = self.path / SHARDS / rec["files"][li]
        expected = rec["sha256"][li]
        if not path.is_file():
            raise InvarianceError(f"{path}: shard {index} is missing (expected SHA-256 {expected}); rerun "
                                  "`invariance extract` with the same --out to write it again")
        if verify and not self._verified(path, index, li) and file_sha256(path) != expected:
            raise InvarianceError(f"{path}: shard {index} is corrupt (SHA-256 differs from the expected {expected}); "
                                  "delete it and rerun `invariance extract` with the same --out")
        if verify:
            self._checked.add(self._stamp(path, index, li))
        return _open_shard(path, rec["rows"], self.dims[self.layers[li]], self.dtype)

    @staticmethod
    def _stamp(path: Path, index: int, li: int):
        st = path.stat()
        return index, li, st.st_size, st.st_mtime_ns, st.st_ino

    def _verified(self, path: Path, index: int, li: int) -> bool:
        """Checked earlier by this reader and unchanged since (size, modification time, inode):
        a streaming statistic reads each shard several times and hashes it once."""
        return self._stamp(path, index, li) in self._checked

    def iter_shards(self, layer=None, *, verify: bool = True) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """``(clean, cluttered)`` memory maps, one shard at a time, in row order."""
        for index in range(len(self.shard_records)):
            arr = self.shard(index, layer, verify=verify)
            yield arr[0], arr[1]

    def verify(self) -> None:
        """Check every shard of every layer against its SHA-256 (raises on the first bad one)."""
        for layer in self.layers:
            for index in range(len(self.shard_records)):
                self.shard(index, layer)

    def arrays(self, layer=None, *, dtype=np.float32) -> tuple[np.ndarray, np.ndarray]:
        """The whole layer in memory: ``(clean, cluttered)`` of shape (n_pairs, D) in ``dtype``."""
        d = self.dims[self.layers[self._layer_index(layer)]]
        clean = np.empty((self.n_pairs, d), dtype=dtype)
        cluttered = np.empty((self.n_pairs, d), dtype=dtype)
        start = 0
        for a, b in self.iter_shards(layer):
            clean[start:start + len(a)] = a
            cluttered[start:start + len(b)] = b
            start += len(a)
        return clean, cluttered

    def rows(self, indices, layer=None, *, dtype=np.float64) -> tuple[np.ndarray, np.ndarray]:
        """``(clean, cluttered)`` of the pairs at sorted ``indices``, read shard by shard."""
        idx = np.asarray(indices, dtype=np.int64)
        bounds = np.cumsum([0] + [r["rows"] for r in self.shard_records])
        d = self.dims[self.layers[self._layer_index(layer)]]
        clean, cluttered = np.empty((idx.size, d), dtype=dtype), np.empty((idx.size, d), dtype=dtype)
        shard_of = np.searchsorted(bounds, idx, side="right") - 1
        for s in np.unique(shard_of):
            where = np.nonzero(shard_of == s)[0]
            arr = self.shard(int(s), layer)
            clean[where] = arr[0][idx[where] - bounds[s]]
            cluttered[where] = arr[1][idx[where] - bounds[s]]
        return clean, cluttered


def _open_shard(path: Path, rows: int, dim: int, dtype: np.dtype) -> np.ndarray:
    try:
        arr = np.load(path, mmap_mode="r", allow_pickle=False)
    except (ValueError, OSError, EOFError) as exc:
        raise InvarianceError(f"{path}: not a readable .npy shard ({str(exc).splitlines()[0] if str(exc) else type(exc).__name__}); "
                              "delete it and rerun `invariance extract`") from None
    if arr.shape != (2, rows, dim) or arr.dtype != dtype:
        raise InvarianceError(f"{path}: shard has shape {arr.shape} and dtype {arr.dtype}, the manifest says "
                              f"{(2, rows, dim)} {dtype}; delete it and rerun `invariance extract`")
    return arr


def load_features(path, *, spec=None, layer=None) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """``(clean, cluttered, names)`` of a features directory, checked, for ``score``.

    Parameters
    ----------
    path : path
        A features directory.
    spec : str, optional
        Refuse the folder unless it holds this encoder's features.
    layer : str, optional
        The layer to read; default the last layer extracted.

    Returns
    -------
    clean, cluttered : ndarray of shape (n_pairs, D), float32
    names : list of str
    """
    features = FeaturesDirectory(path, spec=spec, layer=layer)
    clean, cluttered = features.arrays(layer)
    return clean, cluttered, features.names


class ShardWriter:
    """Writes shards into a features directory under an exclusive lock; resumable.

    Use as a context manager: entering takes the lock (a second extraction into the same
    folder is refused at once), leaving releases it. ``begin`` checks that any shards
    already there belong to the same encoder, layers and pairs and returns the indices
    still to write; ``write`` writes one shard and its record together; ``finish``
    writes the manifest once every shard is there.

    Parameters
    ----------
    path : path
        The features directory (created when absent).
    """

    def __init__(self, path):
        self.path = Path(path)
        self._lock = None

    def __enter__(self):
        if self.path.exists() and not self.path.is_dir():
            raise InvarianceError(f"{self.path}: is a file, not a folder; choose a folder for --out")
        try:
            (self.path / SHARDS).mkdir(parents=True, exist_ok=True)
            self._lock = open(self.path / LOCK, "a+")
        except OSError as exc:
            raise InvarianceError(f"cannot write {self.path} ({exc.strerror}); choose a writable folder for --out") from None
        _try_lock(self._lock, self.path)
        return self

    def __exit__(self, *exc):
        if self._lock is not None:
            _unlock(self._lock)
            self._lock.close()
            self._lock = None

    def begin(self, identity: dict, plan: list[list[str]], dtype="float32") -> list[int]:
        """Check what the folder holds against this run; return the shard indices to write.

        ``plan`` holds the pair names of each shard. A folder of another encoder, layers or
        pair partition is refused; a shard whose file is missing or fails its checksum is
        written again.
        """
        self.identity, self.plan, self.dtype = identity, plan, np.dtype(dtype).name
        self.records = {}
        manifest = self.path / MANIFEST
        if manifest.is_file():
            held = _read_json(manifest, "features manifest").get("encoder")
            self._refuse_other(manifest, held)
        todo = []
        for index, names in enumerate(plan):
            rec = self._existing(index, names)
            if rec is None:
                todo.append(index)
            else:
                self.records[index] = rec
        if todo and manifest.is_file():
            manifest.unlink()  # readers must not see a manifest while shards are being rewritten
        return todo

    def _refuse_other(self, where: Path, held) -> None:
        if not isinstance(held, dict) or held.get("identity_sha256") != self.identity["identity_sha256"]:
            spec = held.get("spec") if isinstance(held, dict) else None
            layers = held.get("layers") if isinstance(held, dict) else None
            raise InvarianceError(
                f"{where}: {self.path} holds features of encoder {spec!r}, layers {layers}, not of "
                f"{self.identity['spec']!r} layers {self.identity['layers']} with these weights; choose a new folder for --out")

    def _existing(self, index: int, names: list[str]):
        rec_path = self.path / SHARDS / f"{shard_stem(index)}.json"
        if not rec_path.is_file():
            return None
        rec = _read_json(rec_path, "shard record")
        self._refuse_other(rec_path, rec.get("encoder"))
        rec = _check_record(rec_path, rec, len(self.identity["layers"]))
        if rec["names"] != names or rec.get("dtype") != self.dtype:
            raise InvarianceError(f"{rec_path}: shard {index} holds other pairs than this data set's shard {index} "
                                  "(the data or --shard-size changed); choose a new folder for --out")
        for file, expected in zip(rec["files"], rec["sha256"]):
            shard = self.path / SHARDS / file
            if not shard.is_file() or file_sha256(shard) != expected:
                return None  # written again
        return rec

    def write(self, index: int, features: dict, episodes=None) -> None:
        """Write shard ``index``: ``features`` maps each layer to ``(clean, cluttered)``."""
        names = self.plan[index]
        stem, outputs, files, sums, dims = shard_stem(index), [], [], [], []
        for li, layer in enumerate(self.identity["layers"]):
            clean, cluttered = features[layer]
            arr = np.ascontiguousarray(np.stack([clean, cluttered]), dtype=self.dtype)
            if arr.shape[:2] != (2, len(names)) or arr.ndim != 3:
                raise InvarianceError(f"shard {index}: layer {layer!r} gave {arr.shape[1:]} features for "
                                      f"{len(names)} pairs; this is a bug, please report it")
            data = _npy_bytes(arr)
            files.append(f"{stem}.L{li}.npy")
            sums.append(hashlib.sha256(data).hexdigest())
            dims.append(int(arr.shape[2]))
            outputs.append((self.path / SHARDS / files[-1], data))
        rec = {"format": FORMAT, "index": index, "rows": len(names), "names": list(names),
               "episodes": None if episodes is None else [str(e) for e in episodes], "files": files,
               "sha256": sums, "dims": dims, "dtype": self.dtype, "encoder": self.identity}
        outputs.append((self.path / SHARDS / f"{stem}.json", dumps_json(rec)))
        write_outputs_together(outputs)  # the record is renamed last: a shard is whole or absent
        self.records[index] = rec

    def finish(self, extra: dict | None = None) -> Path:
        """Write the manifest (after every shard); returns its path."""
        missing = [i for i in range(len(self.plan)) if i not in self.records]
        if missing:
            raise InvarianceError(f"{self.path}: shards {missing[:10]} are not written; rerun to resume")
        records = [self.records[i] for i in range(len(self.plan))]
        dims = records[0]["dims"]
        shards = [{k: r[k] for k in ("index", "rows", "names", "episodes", "files", "sha256")} for r in records]
        manifest = {"format": FORMAT, "encoder": self.identity, "dtype": self.dtype, "dims": dims,
                    "pairs": sum(r["rows"] for r in records), "shard_count": len(records), "shards": shards,
                    **(extra or {})}
        return atomic_write_json(self.path / MANIFEST, manifest)


def _npy_bytes(arr: np.ndarray) -> bytes:
    import io

    buf = io.BytesIO()
    np.save(buf, arr, allow_pickle=False)
    return buf.getvalue()


def _try_lock(fh, path: Path) -> None:
    """Exclusive, non-blocking lock on the open lock file; released by the OS if the process dies."""
    try:
        import fcntl
    except ImportError:  # not POSIX: fall back to the lock file's existence being advisory only
        return
    try:
        fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:
        fh.close()
        raise InvarianceError(f"{path}: another extraction is writing into this folder now; wait for it to "
                              "finish or choose another folder for --out") from None
    with contextlib.suppress(OSError):
        fh.seek(0)
        fh.truncate()
        fh.write(f"{os.getpid()}\n")
        fh.flush()


def _unlock(fh) -> None:
    with contextlib.suppress(ImportError, OSError):
        import fcntl

        fcntl.flock(fh.fileno(), fcntl.LOCK_UN)
