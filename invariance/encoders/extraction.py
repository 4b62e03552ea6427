"""Batched feature extraction: decode and preprocess pairs, one forward pass per batch, pool."""

from __future__ import annotations

import numbers

import numpy as np
import torch

from invariance.data import load_rgb
from invariance.errors import InvalidParameter, InvarianceError
from invariance.options import ExtractionOptions
from invariance.progress import as_reporter

from . import cache
from .encoder import Encoder
from .messages import _first_line, _on_images
from .preprocess import Preprocess
from .taps import _pool, _runner, _validate_layers

# Image-decoding worker processes when the caller does not say. Measured with
# tests/benchmarks/bench_extract.py on the 2-core development machine (resnet18, 224 px,
# batch 32): decoding and preprocessing cost 7.8% of the forward pass, so that is all a
# worker can hide; one worker beat the main process in both runs (0.89x vs 1.05x of the
# bare forward pass at 50 pairs, 0.70x vs 0.90x at 200 pairs, load average 5-11) and a
# second worker added nothing (0.89x). A single batch has nothing to overlap, so it is
# decoded in the main process (no worker start-up).
DEFAULT_NUM_WORKERS = 1


class _PairImages(torch.utils.data.Dataset):
    """Pair ``i`` as a (2, 3, H, W) tensor: clean first, cluttered second."""

    def __init__(self, pairs, preprocess: Preprocess):
        self.clean = list(pairs.clean)
        self.cluttered = list(pairs.cluttered)
        self.preprocess = preprocess

    def __len__(self):
        return len(self.clean)

    def __getitem__(self, i):
        try:
            views = [self.preprocess(load_rgb(path)) for path in (self.clean[i], self.cluttered[i])]
            return i, torch.stack(views)
        except InvarianceError as exc:
            return i, str(exc)  # re-raised in the main process with its one-line message


def _collate(items):
    """Interleave pairs: rows 2k and 2k+1 of the batch are pair k's clean and cluttered views."""
    for _, value in items:
        if isinstance(value, str):
            return None, value
    return [i for i, _ in items], torch.cat([value for _, value in items])


def _worker_init(_):
    torch.set_num_threads(1)  # the main process owns the cores for the forward pass


def extract_features(
    pairs,
    encoder: Encoder,
    layers=None,
    *,
    options: ExtractionOptions | None = None,
    progress=True,
    num_workers: int | None = None,
) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Features of every clean and cluttered image, paired row by row.

    Parameters
    ----------
    pairs : invariance.data.PairSet
    encoder : Encoder
    layers : list of str, optional
        Graph nodes to tap (see :func:`available_layers`); default ``["output"]``, the
        pooled feature before the head. All layers come from one forward pass. Spatial
        maps are globally average-pooled; token maps (N, T, C) give their class token.
    options : ExtractionOptions, optional
        ``batch_size``: images per forward pass (both views of ``batch_size // 2`` pairs,
        interleaved, so stopping early never leaves one domain over-represented);
        ``cache_dir``: feature cache folder, ``None`` disables caching (entries are
        written only after the whole extraction succeeded). Device and image size are
        the encoder's, set when it was loaded.
    progress : bool, callable or Reporter
        Progress bar on stderr (see :mod:`invariance.progress`).
    num_workers : int, optional
        Image-decoding worker processes; ``None`` uses ``DEFAULT_NUM_WORKERS`` (measured
        in tests/benchmarks/bench_extract.py) when there is more than one batch, else 0.

    Returns
    -------
    dict
        ``{layer: (clean, cluttered)}``, float32 arrays of shape (len(pairs), D) in the
        order of ``pairs``.
    """
    options = _check_arguments(pairs, encoder, options, num_workers)
    cache_dir, pairs_per_batch = options.cache_dir, options.batch_size // 2
    wanted, nodes = _validate_layers(encoder, layers)
    keys = cache.layer_keys(pairs, encoder, wanted) if cache_dir is not None else {}
    found = {}
    for layer, key in keys.items():
        hit = cache.load(cache_dir, key, rows=len(pairs), content_hash=pairs.content_hash())
        if hit is not None:
            found[layer] = hit
    missing = [layer for layer in wanted if layer not in found]
    if missing:
        workers = _default_workers(len(pairs), pairs_per_batch) if num_workers is None else int(num_workers)
        fresh = _extract(pairs, encoder, _runner(encoder, missing, nodes), missing, pairs_per_batch, progress, workers)
        for layer in missing:  # only after the whole extraction succeeded
            if cache_dir is not None:
                cache.store(cache_dir, keys[layer], *fresh[layer], cache.layer_header(pairs, encoder, layer))
        found.update(fresh)
    return {layer: found[layer] for layer in wanted}


def _check_arguments(pairs, encoder, options, num_workers) -> ExtractionOptions:
    """The options to use, after refusing what :func:`extract_features` cannot work with."""
    if not isinstance(encoder, Encoder):
        raise InvalidParameter(
            "encoder", f"extract_features needs an Encoder from load_encoder, got {type(encoder).__name__}"
        )
    if len(pairs) == 0:
        raise InvarianceError("no image pairs to extract features from; check the data folder")
    options = options or ExtractionOptions()
    if not isinstance(options, ExtractionOptions):
        raise InvalidParameter("options", f"options={options!r} is not valid; pass an ExtractionOptions")
    valid_workers = isinstance(num_workers, numbers.Integral) and not isinstance(num_workers, bool) and num_workers >= 0
    if num_workers is not None and not valid_workers:
        raise InvalidParameter("num_workers", f"num_workers must be an integer >= 0, got {num_workers!r}")
    return options


def _default_workers(n_pairs: int, pairs_per_batch: int) -> int:
    return DEFAULT_NUM_WORKERS if n_pairs > pairs_per_batch else 0


def _extract(pairs, encoder: Encoder, run, layers: list[str], pairs_per_batch: int, progress, workers: int):
    loader = torch.utils.data.DataLoader(
        _PairImages(pairs, encoder.preprocess), batch_size=pairs_per_batch, shuffle=False,
        num_workers=workers, collate_fn=_collate, worker_init_fn=_worker_init if workers else None,
        generator=torch.Generator(),  # DataLoader draws a seed; keep the caller's RNG untouched
    )
    out: dict[str, np.ndarray] = {}
    with as_reporter(progress).bar(len(pairs), f"features {encoder.spec}") as bar, torch.inference_mode():
        for indices, batch in loader:
            if indices is None:
                raise InvarianceError(batch)
            names = [f"{view}/{pairs.names[i]}" for i in indices for view in ("clean", "cluttered")]
            feats = _forward(run, encoder, batch.to(encoder.device), layers, names)
            for layer, value in feats.items():
                if layer not in out:
                    out[layer] = np.empty((2, len(pairs), value.shape[1]), dtype=np.float32)
                out[layer][0, indices] = value[0::2]
                out[layer][1, indices] = value[1::2]
            bar.update(len(indices))
    return {layer: (arr[0], arr[1]) for layer, arr in out.items()}


def _forward(run, encoder: Encoder, batch: torch.Tensor, layers: list[str], names: list[str]) -> dict:
    """``{layer: (rows, D) float32 array}`` of one batch, refusing non-finite features."""
    try:
        raw = run(batch)
    except InvarianceError:
        raise
    except (RuntimeError, ValueError, AssertionError, IndexError) as exc:
        size = batch.shape[-1]
        raise InvarianceError(
            f"encoder {encoder.spec} failed on {size} px inputs{_on_images(names)} ({_first_line(exc)}); "
            f"if the images are too small for this network pass a larger image_size (e.g. image_size=224)"
        ) from None
    except (Exception, SystemExit) as exc:  # noqa: BLE001 - user code may raise anything, exit too
        raise InvarianceError(
            f"encoder {encoder.spec} raised {type(exc).__name__} in its forward pass{_on_images(names)} "
            f"({_first_line(exc)}); fix the model's code"
        ) from None
    feats = {}
    for layer in layers:
        value = _pool(raw[layer], encoder.layout, layer, encoder.spec, names).float()
        finite = torch.isfinite(value).all(dim=1)
        if not bool(finite.all()):
            bad = [names[r] for r in torch.nonzero(~finite).flatten().tolist()]
            raise InvarianceError(
                f"encoder {encoder.spec} layer {layer!r} gave NaN or infinite features{_on_images(bad)}; "
                "check the model's weights and its input normalisation"
            )
        feats[layer] = value.cpu().numpy()
    return feats


def _frame_tensor(preprocess: Preprocess, frame) -> torch.Tensor:
    from PIL import Image

    return preprocess(Image.fromarray(frame.image, mode="RGB"))


def extract_frame_features(frames, encoder: Encoder, layers=None, *, options: ExtractionOptions | None = None,
                           progress=True, total: int | None = None, label: str = "frames") -> dict:
    """Features of a stream of frames (:class:`invariance.sources.Frame`), read lazily.

    Frames are pulled from the iterator one batch at a time, preprocessed and passed
    through the encoder, so memory holds one batch of images plus the feature rows,
    whatever the size of the episode files. No feature cache: a frame has no file of its
    own to key on (the source spec and frame index would do; left for the cache module).

    Parameters
    ----------
    frames : iterable of Frame
    encoder : Encoder
    layers : list of str, optional
        As :func:`extract_features`.
    options : ExtractionOptions, optional
        ``batch_size`` frames per forward pass.
    progress : bool, callable or Reporter
    total : int, optional
        Frames expected, for the progress bar.
    label : str
        Name on the progress bar.

    Returns
    -------
    dict
        ``features`` ({layer: float32 (n, D)}), ``keys`` ([(episode, index)]) and
        ``labels`` ({name: list of values, one per frame}).
    """
    options = options or ExtractionOptions()
    if not isinstance(options, ExtractionOptions):
        raise InvalidParameter("options", f"options={options!r} is not valid; pass an ExtractionOptions")
    wanted, nodes = _validate_layers(encoder, layers)
    run = _runner(encoder, wanted, nodes)
    chunks = {layer: [] for layer in wanted}
    keys, labels = [], {}
    batches = _prepared_batches(iter(frames), encoder.preprocess, options.batch_size)
    with as_reporter(progress).bar(total or 0, f"{label} {encoder.spec}") as bar, torch.inference_mode():
        for batch in batches:
            _frame_batch(batch, run, encoder, wanted, chunks, keys, labels)
            bar.update(len(batch))
    if not keys:
        raise InvarianceError(f"no frames to extract features from in {label}; check the source and the stride")
    return {"features": {layer: np.concatenate(chunks[layer]) for layer in wanted}, "keys": keys, "labels": labels}


def _read_batch(frames, preprocess, size):
    batch = []
    for frame in frames:
        batch.append((frame, _frame_tensor(preprocess, frame)))
        if len(batch) == size:
            break
    return batch


def _prepared_batches(frames, preprocess, size):
    """Batches of (frame, tensor), the next one read and preprocessed on a helper thread
    while the forward pass of the current one runs (file reads, JPEG/PIL and torch ops
    release the GIL). At most two batches of images are held."""
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(max_workers=1) as pool:
        pending = pool.submit(_read_batch, frames, preprocess, size)
        while True:
            batch = pending.result()  # re-raises a reader's error here, in order
            if not batch:
                return
            pending = pool.submit(_read_batch, frames, preprocess, size)
            yield batch


def _frame_batch(batch, run, encoder, layers, chunks, keys, labels):
    names = [f"{f.episode}#{f.index}" for f, _ in batch]
    feats = _forward(run, encoder, torch.stack([t for _, t in batch]).to(encoder.device), layers, names)
    for layer, value in feats.items():
        chunks[layer].append(value)
    start = len(keys)
    for k, (frame, _) in enumerate(batch):
        keys.append((frame.episode, frame.index))
        for name, value in frame.labels.items():
            # a label missing from earlier frames stays missing (NaN) for them
            labels.setdefault(name, [float("nan")] * (start + k)).append(value)
        for name, values in labels.items():
            if len(values) < start + k + 1:
                values.append(float("nan"))
