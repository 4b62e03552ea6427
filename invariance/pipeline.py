"""The jobs behind the commands, callable from Python: score, compare, align.

Each function returns a result dict in the ``invariance.result/1`` schema (see
``docs/design.md``); the command line only parses options, prints and writes files.
Options arrive as the frozen objects of :mod:`invariance.options`, validated once.
"""

from __future__ import annotations

import os
import platform
import sys
import time
from pathlib import Path
from typing import Sequence

import numpy as np

from . import __version__
from .errors import InvalidParameter, InvarianceError
from .data import label_columns
from .options import AlignmentOptions, EncoderEntry, ExtractionOptions, ScoringOptions, options_or_default
from .progress import as_reporter
from .results import RESULT_SCHEMA, add_caution

DEFAULT_LAYER = "output"


def default_cache_dir() -> Path:
    """Feature cache folder: ``$INVARIANCE_CACHE`` or ``~/.cache/invariance/features``."""
    env = os.environ.get("INVARIANCE_CACHE")
    if env:
        return Path(env)
    return Path(os.environ.get("XDG_CACHE_HOME", Path.home() / ".cache")) / "invariance" / "features"


def environment_info(*, seed: int, device: str | None = None, command: str | None = None, timings=None) -> dict:
    """Versions, device, seed and timings, so a colleague can reproduce a result."""
    import scipy
    import sklearn

    info = {
        "invariance": __version__,
        "python": platform.python_version(),
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "scikit-learn": sklearn.__version__,
        "platform": platform.platform(),
        "seed": int(seed),
        "device": device or "cpu",
        "command": command if command is not None else " ".join(["invariance", *sys.argv[1:]]),
        "timings_s": {k: round(float(v), 3) for k, v in (timings or {}).items()},
    }
    # Installed versions from the package metadata: importing torch only to read its version
    # would cost a warm re-score, which never runs the encoder, seconds.
    from importlib import metadata

    for package in ("torch", "torchvision"):
        try:
            info[package] = metadata.version(package)
        except metadata.PackageNotFoundError:  # the --features path needs no torch
            pass
    return info


def _dataset_info(pairs) -> dict:
    return {**pairs.describe(), "content_hash": pairs.content_hash(), "image_size": _image_size(pairs)}


def _image_size(pairs):
    from PIL import Image

    try:
        with Image.open(pairs.clean[0]) as im:
            return list(im.size)
    except OSError:
        return None


def _discover(data, extraction: ExtractionOptions):
    from .data import discover_pairs

    return discover_pairs(data, skip_unpaired=extraction.skip_unpaired)


def _load(spec: str, weights, extraction: ExtractionOptions, image_size=None):
    from .encoders import load_encoder

    return load_encoder(spec, weights=weights, device=extraction.device,
                        image_size=image_size if image_size is not None else extraction.image_size,
                        trusted_code=extraction.trusted_code)


def score_dataset(data, spec: str, *, weights=None, layers: Sequence[str] | None = None, name: str | None = None,
                  extraction: ExtractionOptions | None = None, scoring: ScoringOptions | None = None,
                  progress=True, pairs=None, encoder=None, output_tolerance=None, explain_worst: int = 0) -> dict:
    """Extract features of every pair with one encoder and score them.

    Parameters
    ----------
    data : str or Path
        Data set folder (``clean/``, ``cluttered/``, optional ``labels.csv``) or manifest CSV.
    spec : str
        Encoder spec (see :func:`invariance.encoders.load_encoder`).
    weights : path, optional
        A local state_dict for a ``torchvision:`` spec.
    layers : list of str, optional
        Graph nodes to tap; the result's ``metrics`` are those of the last one given and
        ``layers`` holds every layer's metrics when more than one is given.
    name : str, optional
        Display name of the encoder; default the spec.
    extraction, scoring : ExtractionOptions, ScoringOptions, optional
        How images become features and features become statistics.
    progress : bool, callable or Reporter
        See :mod:`invariance.progress`.
    pairs, encoder : optional
        An already discovered PairSet or loaded Encoder (``compare_encoders`` shares them).
    output_tolerance : sequence of float or str, optional
        The spec is a whole policy: also report its output drift per output dimension in
        the output's own units (``output_drift``), with the share of pairs whose change
        exceeds this tolerance (see :func:`invariance.metrics.output_drift.output_drift`).
    explain_worst : int, default=0
        Also store occlusion drift maps (per-patch drops on a 16 x 16 grid) of the pairs that
        drift most, under ``drift_maps``; the report overlays them on the thumbnails.

    Returns
    -------
    dict
        A result in the ``invariance.result/1`` schema, with the safety ``caution``.

    Notes
    -----
    When every layer of this exact request is in the feature cache (same spec, files,
    options and images; see :mod:`invariance.feature_index`), the encoder is not loaded at
    all: a repeated score costs the statistics only.
    """
    extraction = options_or_default(extraction, ExtractionOptions, "extraction")
    scoring = options_or_default(scoring, ScoringOptions, "scoring")
    if pairs is None and data is not None and _unpaired_folder(data):
        # clean/ and cluttered/ share no name: two unpaired domains, announced, never fake-paired
        as_reporter(progress).note(f"{data}: clean/ and cluttered/ share no file name; scoring them as unpaired domains")
        return score_sources(f"images:{Path(data) / 'clean'}", f"images:{Path(data) / 'cluttered'}", spec,
                             weights=weights, layers=layers, name=name, extraction=extraction, scoring=scoring,
                             progress=progress, encoder=encoder)
    if pairs is None:
        pairs = _discover(data, extraction)
    layer_list = list(layers) if layers else [DEFAULT_LAYER]
    start = time.perf_counter()
    features, description, encoder = _features_of(spec, weights, pairs, layer_list, extraction, progress, encoder,
                                                  need_encoder=output_tolerance is not None or explain_worst > 0)
    timings = {"extract": time.perf_counter() - start}
    start = time.perf_counter()
    result = _score_layers(features, layer_list, pairs, scoring, cache_dir=extraction.cache_dir)
    timings["score"] = time.perf_counter() - start
    if output_tolerance is not None:
        from .explain import policy_output_drift

        result["output_drift"] = policy_output_drift(pairs, encoder, output_tolerance,
                                                     batch_size=extraction.batch_size, progress=progress)
    if explain_worst:
        result["drift_maps"] = _drift_maps(pairs, encoder, result.get("pairs") or [], explain_worst, layer_list[-1],
                                           progress)
    result["encoder"] = {**description, "name": name or spec, "layer": layer_list[-1]}
    result["dataset"] = _dataset_info(pairs)
    result["environment"] = environment_info(seed=scoring.seed, device=description.get("device"), timings=timings)
    return add_caution(result)


def _drift_maps(pairs, encoder, per_pair: list, worst: int, layer: str, progress) -> dict:
    """Occlusion maps of the ``worst`` pairs, kept as per-patch drops (small enough for the JSON).

    The pairs are ranked by the relative drift the scoring just measured (``per_pair``, the
    result's ``pairs``), so no feature is extracted a second time to rank them.
    """
    from PIL import Image

    from .explain import explain_pairs

    ranked = sorted((p for p in per_pair if p.get("drift") is not None), key=lambda p: -p["drift"])[:worst]
    drift_of = {p["name"]: p["drift"] for p in ranked}
    explained = explain_pairs(pairs, encoder, names=[p["name"] for p in ranked], method="occlusion",
                              layer=None if layer == DEFAULT_LAYER else layer,
                              progress=progress)
    out = []
    for entry in explained["pairs"]:
        with Image.open(pairs.cluttered[entry["index"]]) as image:
            width, height = image.size
        out.append({"name": entry["name"], "relative_drift": drift_of.get(entry["name"]),
                    "drift": entry.get("drift"), "height": height, "width": width, "patch": entry.get("patch"),
                    "drops": [[float(v) for v in row] for row in entry["drops"]]})
    return {"method": "occlusion", "patch": explained.get("patch"), "layer": layer, "pairs": out}


def _features_of(spec, weights, pairs, layer_list, extraction, progress, encoder, *, need_encoder=False):
    """``(features, encoder description, encoder or None)``: from the request index when it can, else extracted."""
    from . import feature_index

    identity = None
    if encoder is None:
        identity = feature_index.request_identity(spec, weights=weights, image_size=extraction.image_size,
                                                  trusted_code=extraction.trusted_code)
        hit = None if need_encoder else feature_index.recall(extraction.cache_dir, identity, pairs, layer_list)
        if hit is not None:
            as_reporter(progress).note(f"{spec}: every layer found in the feature cache; the encoder was not loaded")
            return hit[0], hit[1], None
    from .encoders import extract_features  # after the data checks: bad data fails fast

    if encoder is None:
        encoder = _load(spec, weights, extraction)
    features = extract_features(pairs, encoder, layers=layer_list, options=extraction, progress=progress)
    feature_index.remember(extraction.cache_dir, identity, pairs, encoder, layer_list)
    return features, encoder.describe(), encoder


def _score_layers(features: dict, layer_list, pairs, scoring: ScoringOptions, cache_dir=None) -> dict:
    from dataclasses import replace

    from . import score_cache
    from .data import pair_groups
    from .scoring import score_features

    tasks, factors = label_columns(pairs)
    groups, names = pair_groups(pairs), list(pairs.names)
    key = score_cache.score_key(features, layer_list, tasks=tasks, factors=factors, names=names, groups=groups,
                                options=scoring) if cache_dir is not None else None
    per_layer = score_cache.load(cache_dir, key) if key else None
    if per_layer is None:
        per_layer = {}
        for layer in layer_list:
            clean, cluttered = features[layer]
            # t-SNE only for the layer whose projection the report draws
            options = replace(scoring, tsne=scoring.tsne and layer == layer_list[-1])
            per_layer[layer] = score_features(clean, cluttered, tasks=tasks, factors=factors, names=names,
                                              options=options, groups=groups)
        if key:
            score_cache.store(cache_dir, key, per_layer)
    result = {"schema": RESULT_SCHEMA, **per_layer[layer_list[-1]]}
    if len(layer_list) > 1:
        result["layers"] = {layer: s["metrics"] for layer, s in per_layer.items()}
    return result


def score_feature_arrays(clean: np.ndarray, cluttered: np.ndarray, *, tasks=None, factors=None, names=None,
                         scoring: ScoringOptions | None = None, source: dict | None = None, groups=None) -> dict:
    """Score features computed anywhere (rows paired) into a result dict.

    Parameters
    ----------
    clean, cluttered : ndarray of shape (n_pairs, d)
        Paired features; row i of each is the same scene.
    tasks, factors : dict of str to ndarray, optional
        Probe labels and clutter descriptions per pair.
    names : sequence of str, optional
        A name per pair.
    scoring : ScoringOptions, optional
    source : dict, optional
        ``spec``, ``name`` and ``path`` recorded as the result's encoder and data set.
    groups : array-like of shape (n_pairs,), optional
        Group (episode) of each pair: the unit of every split and resample.

    Returns
    -------
    dict
        A result in the ``invariance.result/1`` schema.
    """
    from .scoring import score_features

    scoring = options_or_default(scoring, ScoringOptions, "scoring")
    start = time.perf_counter()
    scored = score_features(clean, cluttered, tasks=tasks, factors=factors, names=names, options=scoring,
                            groups=groups)
    elapsed = time.perf_counter() - start
    source = source or {}
    return add_caution({
        "schema": RESULT_SCHEMA,
        **scored,
        "encoder": {"spec": source.get("spec", "features"), "name": source.get("name", "features"),
                    "layer": DEFAULT_LAYER},
        "dataset": {"path": source.get("path"), "pairs": int(np.asarray(clean).shape[0])},
        "environment": environment_info(seed=scoring.seed, timings={"score": elapsed}),
    })


def _entry(item) -> EncoderEntry:
    if isinstance(item, EncoderEntry):
        return item
    if isinstance(item, str):
        return EncoderEntry(item)
    if isinstance(item, dict):
        unknown = set(item) - {"spec", "weights", "layers", "name", "image_size"}
        if unknown or "spec" not in item:
            raise InvalidParameter("encoders", f"encoders entry {item!r} is not valid; pass an EncoderEntry or a "
                                               "dict with spec and optional weights, layers, name, image_size")
        return EncoderEntry(**item)
    raise InvalidParameter("encoders", f"encoders entry {item!r} is not valid; pass an EncoderEntry")


def _domain_runner(data, data_b, extraction, scoring, sources, reporter):
    """``(description, run(entry))`` scoring one encoder on the data."""
    unpaired = sources is not None and sources.unpaired
    if data_b is not None or unpaired or _unpaired_folder(data):
        a, b = (data, data_b) if data_b is not None else (f"images:{Path(data) / 'clean'}",
                                                          f"images:{Path(data) / 'cluttered'}")
        return "two domains", lambda entry: score_sources(
            str(a), str(b), entry.spec, weights=entry.weights, layers=entry.layers, name=entry.name,
            extraction=extraction, scoring=scoring, sources=sources, progress=reporter,
            encoder=_load(entry.spec, entry.weights, extraction, entry.image_size))
    from dataclasses import replace

    pairs = _discover(data, extraction)
    # No encoder passed: score_dataset loads it only when the feature cache cannot serve it.
    return f"{len(pairs)} pairs", lambda entry: score_dataset(
        data, entry.spec, weights=entry.weights, layers=entry.layers, name=entry.name,
        extraction=replace(extraction, image_size=entry.image_size or extraction.image_size),
        scoring=scoring, progress=reporter, pairs=pairs)


def compare_encoders(data, encoders: Sequence, *, extraction: ExtractionOptions | None = None,
                     scoring: ScoringOptions | None = None, progress=True, data_b=None, sources=None) -> dict:
    """Score several encoders on the same pairs (or domains), folds and permutations.

    Parameters
    ----------
    data : str or Path
        Data set folder or manifest CSV; with ``data_b``, the source spec of domain A.
    encoders : sequence of EncoderEntry (or spec strings, or dicts with EncoderEntry's fields)
    extraction, scoring : options, optional
    progress : bool, callable or Reporter
    data_b : str, optional
        Source spec of domain B (see :func:`score_sources` and docs/sources.md).
    sources : SourceOptions, optional
        Stride, frame cap, labels, skip_unpaired, unpaired.

    Returns
    -------
    dict
        An ``invariance.comparison/1`` object. An encoder that fails is recorded under
        ``failures`` with its message and the others are still scored.
    """
    from .results import make_comparison

    extraction = options_or_default(extraction, ExtractionOptions, "extraction")
    scoring = options_or_default(scoring, ScoringOptions, "scoring")
    entries = [_entry(item) for item in encoders]
    if not entries:
        raise InvalidParameter("encoders", "encoders=[] is not valid; pass at least one encoder")
    reporter = as_reporter(progress)
    described, run = _domain_runner(data, data_b, extraction, scoring, sources, reporter)
    results, failures = [], []
    for entry in entries:
        reporter.note(f"scoring {entry.label} on {described}")
        try:
            results.append(run(entry))
        except InvarianceError as exc:
            failures.append({"spec": entry.spec, "name": entry.label, "error": str(exc)})
            reporter.note(f"  failed: {exc}")
    if not results:
        raise InvarianceError("every encoder failed: " + " | ".join(f"{f['name']}: {f['error']}" for f in failures))
    return add_caution(make_comparison(results, failures=failures))


def align_dataset(data, spec: str, *, out, weights=None, alignment: AlignmentOptions | None = None,
                  scoring: ScoringOptions | None = None, extraction: ExtractionOptions | None = None,
                  progress=True, pairs=None) -> dict:
    """Align an encoder on a data set (see :func:`invariance.align.align_encoder`).

    Returns
    -------
    dict
        A result whose ``metrics`` are the aligned encoder's on the held-out pairs, with
        ``alignment`` holding before/after, the settings and the training curves. When
        the alignment did not improve the encoder on the held-out pairs
        (``alignment.improved`` false), no checkpoint exists and the result describes the
        original encoder with its held-out metrics.
    """
    from .align import align_encoder

    alignment = options_or_default(alignment, AlignmentOptions, "alignment")
    scoring = options_or_default(scoring, ScoringOptions, "scoring")
    extraction = options_or_default(extraction, ExtractionOptions, "extraction")
    if pairs is None:
        pairs = _discover(data, extraction)
    encoder = _load(spec, weights, extraction)
    start = time.perf_counter()
    outcome = align_encoder(pairs, encoder, out=out, options=alignment, scoring=scoring, extraction=extraction,
                            progress=progress)
    elapsed = time.perf_counter() - start
    from .align.outcome import settle

    return settle(add_caution({
        "schema": RESULT_SCHEMA,
        "encoder": {**encoder.describe(), "name": f"{spec} aligned", "spec": f"checkpoint:{out}", "source_spec": spec,
                    "layer": DEFAULT_LAYER},
        "dataset": _dataset_info(pairs),
        "metrics": outcome["after"],
        "alignment": outcome,
        "environment": environment_info(seed=scoring.seed, device=str(encoder.device), timings={"align": elapsed}),
    }))


def _unpaired_folder(data) -> bool:
    from .data import unpaired_folder

    path = Path(data)
    return path.is_dir() and unpaired_folder(path) is not None


def _label_arrays(labels: dict, rows) -> dict:
    """Per-frame label lists as probe columns on ``rows``: numbers as float64, else classes."""
    out = {}
    for name, values in labels.items():
        picked = [values[i] for i in rows]
        if all(isinstance(v, (int, float, np.floating, np.integer)) for v in picked):
            out[name] = np.asarray(picked, dtype=np.float64)
        else:
            out[name] = np.array([str(v) for v in picked])
    return out


def _source_side(source, encoder, layer_list, extraction, sources, progress, label):
    from .encoders.extraction import extract_frame_features
    from .sources import expected_frames, iter_frames

    out = extract_frame_features(iter_frames(source, sources), encoder, layer_list, options=extraction,
                                 progress=progress, total=expected_frames(source, sources), label=label)
    group_of = {e.name: e.group for e in source.episodes}
    out["groups"] = np.array([group_of[ep] for ep, _ in out["keys"]])
    out["factors"] = _source_factors(source, out["keys"])
    return out


def _source_factors(source, keys):
    """Clutter factor columns of an image folder's labels, one value per extracted row (else None)."""
    table = getattr(source, "table", None)
    if table is None or not table.factors:
        return None
    row_of = {e.name: e.ref for e in source.episodes}
    rows = [row_of[episode] for episode, _ in keys]
    return {column: values[rows] for column, values in table.factors.items()}


def _score_source_layers(domains, side_a, side_b, layer_list, scoring):
    """Per-layer scores of two extracted domains, paired or unpaired."""
    from dataclasses import replace

    from .scoring import score_features, score_unpaired_features
    from .sources import join_rows

    per_layer, extra = {}, {}
    if domains.mode == "paired":
        idx_a, idx_b, unmatched = join_rows(side_a["keys"], side_b["keys"])
        extra["frames_without_partner"] = unmatched
    for layer in layer_list:
        options = replace(scoring, tsne=scoring.tsne and layer == layer_list[-1])
        fa, fb = side_a["features"][layer], side_b["features"][layer]
        if domains.mode == "paired":
            names = [f"{side_a['keys'][i][0]}#{side_a['keys'][i][1]}" for i in idx_a]
            per_layer[layer] = score_features(fa[idx_a], fb[idx_b], tasks=_label_arrays(side_a["labels"], idx_a) or None,
                                              names=names, options=options, groups=side_a["groups"][idx_a])
        else:
            rows_a, rows_b = range(len(side_a["keys"])), range(len(side_b["keys"]))
            per_layer[layer] = score_unpaired_features(
                fa, fb, groups_a=side_a["groups"], groups_b=side_b["groups"],
                tasks_a=_label_arrays(side_a["labels"], rows_a) or None,
                tasks_b=_label_arrays(side_b["labels"], rows_b) or None, factors_a=side_a["factors"],
                factors_b=side_b["factors"], options=options)
    return per_layer, extra


def score_sources(source_a, source_b, spec: str, *, weights=None, layers: Sequence[str] | None = None,
                  name: str | None = None, extraction: ExtractionOptions | None = None,
                  scoring: ScoringOptions | None = None, sources=None, progress=True, encoder=None) -> dict:
    """Score an encoder on two domains given as source specs (HDF5, zarr, video, images).

    Domains holding the same episodes are paired by (episode, frame index) and scored
    by :func:`invariance.scoring.score_features` with the episode as the group of every
    split; domains with no episode in common (or ``sources.unpaired``) are scored by
    :func:`invariance.scoring.score_unpaired_features`. Frames are read lazily.

    Parameters
    ----------
    source_a, source_b : str
        Source specs (docs/sources.md); A is the reference (clean) domain.
    spec, weights, layers, name, extraction, scoring, progress, encoder
        As :func:`score_dataset`.
    sources : SourceOptions, optional
        Stride, frame cap, labels from the files, skip_unpaired, unpaired.

    Returns
    -------
    dict
        A result in the ``invariance.result/1`` schema; ``dataset`` adds ``domains``,
        ``pairing``, ``episodes`` and ``frames``; an unpaired result has ``not_computed``.
    """
    from .sources import SourceOptions, match_domains, open_source

    extraction = options_or_default(extraction, ExtractionOptions, "extraction")
    scoring = options_or_default(scoring, ScoringOptions, "scoring")
    sources = options_or_default(sources, SourceOptions, "sources")
    if sources.skip_unpaired is False and extraction.skip_unpaired:
        from dataclasses import replace

        sources = replace(sources, skip_unpaired=True)
    domains = match_domains(open_source(source_a, sources), open_source(source_b, sources), sources)
    reporter = as_reporter(progress)
    for note in domains.notes:
        reporter.note(note)
    if encoder is None:
        encoder = _load(spec, weights, extraction)
    layer_list = list(layers) if layers else [DEFAULT_LAYER]
    start = time.perf_counter()
    side_a = _source_side(domains.a, encoder, layer_list, extraction, sources, reporter, "domain A")
    side_b = _source_side(domains.b, encoder, layer_list, extraction, sources, reporter, "domain B")
    timings = {"extract": time.perf_counter() - start}
    start = time.perf_counter()
    per_layer, extra = _score_source_layers(domains, side_a, side_b, layer_list, scoring)
    timings["score"] = time.perf_counter() - start
    result = {"schema": RESULT_SCHEMA, **per_layer[layer_list[-1]]}
    if len(layer_list) > 1:
        result["layers"] = {layer: s["metrics"] for layer, s in per_layer.items()}
    result["warnings"] = domains.notes + domains.a.warnings + domains.b.warnings + result["warnings"]
    if extra.get("frames_without_partner"):
        result["warnings"].append(f"{extra['frames_without_partner']} frames had no partner at the same (episode, "
                                  f"frame index) in the other domain and were left out")
    result["encoder"] = {**encoder.describe(), "name": name or spec, "layer": layer_list[-1]}
    result["dataset"] = {
        "path": str(source_a), "domains": {"a": domains.a.spec, "b": domains.b.spec}, "pairing": domains.mode,
        "pairs": len(result["pairs"]), "frames": [len(side_a["keys"]), len(side_b["keys"])],
        "episodes": [len(domains.a.episodes), len(domains.b.episodes)],
        "sampling": {"stride": sources.stride, "max_frames_per_episode": sources.max_frames_per_episode},
        "tasks": {k: ("regression" if np.asarray(v).dtype.kind == "f" else "classification")
                  for k, v in _label_arrays(side_a["labels"], [0]).items()},
    }
    factors = sorted({*(side_a["factors"] or {}), *(side_b["factors"] or {})})
    if factors and domains.mode == "unpaired":  # paired domains do not break down by factor yet
        result["dataset"]["factors"] = factors
    if domains.skipped:
        result["dataset"]["skipped_unpaired"] = len(domains.skipped)
    result["environment"] = environment_info(seed=scoring.seed, device=str(encoder.device), timings=timings)
    return add_caution(result)


def score_unpaired_feature_arrays(a: np.ndarray, b: np.ndarray, *, groups_a=None, groups_b=None,
                                  scoring: ScoringOptions | None = None, source: dict | None = None) -> dict:
    """Score features of two unpaired domains computed anywhere into a result dict.

    Parameters
    ----------
    a, b : ndarray of shape (n_a, d), (n_b, d)
        Features of domain A (the reference) and domain B; rows need not correspond.
    groups_a, groups_b : array-like, optional
        Group (episode) per row.
    scoring : ScoringOptions, optional
    source : dict, optional
        ``spec``, ``name`` and ``path`` recorded as the result's encoder and data set.

    Returns
    -------
    dict
        A result in the ``invariance.result/1`` schema with ``pairing`` "unpaired" and
        ``not_computed`` (see :func:`invariance.scoring.score_unpaired_features`).
    """
    from .scoring import score_unpaired_features

    scoring = options_or_default(scoring, ScoringOptions, "scoring")
    start = time.perf_counter()
    scored = score_unpaired_features(a, b, groups_a=groups_a, groups_b=groups_b, options=scoring)
    elapsed = time.perf_counter() - start
    source = source or {}
    return add_caution({
        "schema": RESULT_SCHEMA, **scored,
        "encoder": {"spec": source.get("spec", "features"), "name": source.get("name", "features"),
                    "layer": DEFAULT_LAYER},
        "dataset": {"path": source.get("path"), "pairs": 0, "pairing": "unpaired",
                    "frames": [int(np.asarray(a).shape[0]), int(np.asarray(b).shape[0])]},
        "environment": environment_info(seed=scoring.seed, timings={"score": elapsed}),
    })
