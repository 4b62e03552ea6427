"""Paired feature generators for calibrating the statistics: nulls and a shifted alternative.

Every ``null(kind, n, d, rng)`` returns ``(clean, cluttered)``, two float64 arrays of
shape (n, d) whose rows are exchangeable within each pair: both views of scene i are
drawn by the same rule from the same scene, so swapping them leaves the joint
distribution unchanged (the null of a paired two-sample test).

Kinds (the 0.3 noise scale makes the shared scene component dominate, as for two
photographs of one scene; common practice, chosen to stress tests that ignore pairing):

``iid``
    Both views i.i.d. N(0, I), no shared component.
``paired_shared``
    scene ~ N(0, I), view = scene + 0.3 * noise, noise ~ N(0, I).
``heavy_tailed``
    As ``paired_shared`` with scene and noise Student t with 3 degrees of freedom
    (finite variance 3, infinite fourth moment).
``relu_sparse``
    view = ReLU(scene + 0.3 * noise - 1), scene and noise N(0, I): about 17% of the
    entries are non-zero (P(N(0, 1.09) > 1) = 0.169), like post-ReLU encoder features.

:func:`encoder_states` gives two encoder states' features of the same scenes, for the
paired test of a drift's change.

Import from tests as ``from nulls import KINDS, null, shifted`` (pytest puts ``tests/``
on ``sys.path``, as for ``conftest``).

The second half writes episode files (HDF5, zarr, video) of recordings under the null and
scores them through ``invariance score``'s own path: :func:`source_null_repetition` and
:func:`source_null_study` (used by tests/test_source_nulls.py and
tests/benchmarks/bench_source_nulls.py).
"""

from __future__ import annotations

import numpy as np

KINDS = ("iid", "paired_shared", "heavy_tailed", "relu_sparse")

# Scale of the per-view noise around the shared scene (see the module docstring).
NOISE = 0.3
# Degrees of freedom of the heavy-tailed kind: the smallest integer with finite variance.
T_DOF = 3
# ReLU threshold of the sparse kind; 1.0 leaves about 17% of entries non-zero.
RELU_OFFSET = 1.0


def _rng(rng):
    return rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)


def _latent(kind, n, d, rng):
    """Pre-nonlinearity views (clean, cluttered) and their marginal sd per coordinate."""
    if kind == "iid":
        return rng.standard_normal((n, d)), rng.standard_normal((n, d)), 1.0
    if kind in ("paired_shared", "relu_sparse"):
        scene = rng.standard_normal((n, d))
        a = scene + NOISE * rng.standard_normal((n, d))
        b = scene + NOISE * rng.standard_normal((n, d))
        return a, b, float(np.sqrt(1.0 + NOISE**2))
    if kind == "heavy_tailed":
        scene = rng.standard_t(T_DOF, (n, d))
        a = scene + NOISE * rng.standard_t(T_DOF, (n, d))
        b = scene + NOISE * rng.standard_t(T_DOF, (n, d))
        # Var t_nu = nu / (nu - 2)
        return a, b, float(np.sqrt(T_DOF / (T_DOF - 2) * (1.0 + NOISE**2)))
    raise ValueError(f"unknown kind {kind!r}; choose one of {KINDS}")


def _observe(kind, latent):
    if kind == "relu_sparse":
        return np.maximum(latent - RELU_OFFSET, 0.0)
    return latent


def null(kind, n, d, rng):
    """Paired features under the null: views exchangeable within each pair.

    Parameters
    ----------
    kind : {"iid", "paired_shared", "heavy_tailed", "relu_sparse"}
    n, d : int
        Pairs and features.
    rng : numpy.random.Generator or int
        Random source (an int seeds a new Generator).

    Returns
    -------
    clean, cluttered : ndarray of shape (n, d)
    """
    a, b, _ = _latent(kind, n, d, _rng(rng))
    return _observe(kind, a), _observe(kind, b)


def shifted(kind, n, d, rng, shift=0.35, fraction=0.25):
    """Paired features under a mean-shift alternative.

    The cluttered view's first ``max(1, round(fraction * d))`` coordinates are moved by
    ``shift`` marginal standard deviations. The shift is added before the kind's
    nonlinearity (only ``relu_sparse`` has one), so its zeros stay zeros; there the
    shift of the observed mean is smaller than ``shift`` sd.

    Parameters
    ----------
    kind, n, d, rng
        As for :func:`null`.
    shift : float, default=0.35
        Size of the shift in marginal sd of one coordinate.
    fraction : float, default=0.25
        Share of the coordinates that move.

    Returns
    -------
    clean, cluttered : ndarray of shape (n, d)
    """
    a, b, sd = _latent(kind, n, d, _rng(rng))
    k = max(1, int(round(fraction * d)))
    b[:, :k] += shift * sd
    return _observe(kind, a), _observe(kind, b)


def encoder_states(kind, n, d, rng, *, shared_clutter=0.8, scale_after=1.0):
    """Paired features of the same scenes from two encoder states (before and after).

    Both states see the same scene content and part of the same clutter (share
    ``shared_clutter`` of its variance), so their per-pair drifts are correlated, as an
    encoder's before and after alignment are. With ``scale_after`` 1 the two states are
    exchangeable: the true change of any drift statistic is 0 (the null of
    :func:`invariance.metrics.drift.paired_drift_change`); below 1 the second state's
    clutter is weaker (a real fall).

    Kinds, as :func:`null`'s: ``iid`` (Gaussian, every scene cluttered equally);
    ``paired_shared`` (a lognormal clutter strength per scene, exp(N(0, 0.5^2)), common
    to both states: some scenes are far more cluttered than others); ``heavy_tailed``
    (the same with Student t scene, clutter and noise); ``relu_sparse`` (the same, then a
    random ReLU layer of 4 d units, about 70% zeros).

    Returns
    -------
    list of two (clean, cluttered) tuples of ndarrays of shape (n, d) (4 d for relu_sparse)
    """
    rng = _rng(rng)
    if kind not in KINDS:
        raise ValueError(f"unknown kind {kind!r}; choose one of {KINDS}")
    if kind == "heavy_tailed":
        def noise(*shape):
            return rng.standard_t(T_DOF, size=shape)
    else:
        def noise(*shape):
            return rng.standard_normal(shape)
    scene, clutter = noise(n, d), noise(n, d)
    strength = np.ones((n, 1)) if kind == "iid" else np.exp(0.5 * rng.standard_normal((n, 1)))
    layer = rng.standard_normal((d, 4 * d)) / np.sqrt(d)
    states = []
    for scale in (1.0, scale_after):
        own = np.sqrt(shared_clutter) * clutter + np.sqrt(1.0 - shared_clutter) * noise(n, d)
        clean = scene + NOISE * noise(n, d)
        cluttered = scene + scale * strength * own + NOISE * noise(n, d)
        if kind == "relu_sparse":
            # a small constant keeps every row non-zero (a cosine needs a norm)
            clean, cluttered = (np.maximum(x @ layer - RELU_OFFSET, 0.0) + 1e-3 for x in (clean, cluttered))
        states.append((clean, cluttered))
    return states


# ---------------------------------------------------------------- episode files under the null
#
# Recordings of workbench scenes written as real HDF5 files, zarr stores and videos, for
# calibrating `invariance score` end to end (readers, pairing, extraction, grouped tests).
# A recording films one scene (invariance.scenes, clean view) with settings of its own,
# fixed for all its frames: exposure, colour cast and camera pose, as a new take under
# other light would have; each frame then adds camera jitter and sensor noise. Both
# domains are filmed by the same rule, so under the null the two recordings of an
# episode are exchangeable as wholes but not frame by frame: a test that counts frames
# as independent sees the recording, not the clutter. The sizes are chosen for that
# contrast, not measured from a camera (common practice for a stress test).

# Frame side in pixels: the smallest the scene generator draws.
EPISODE_SIDE = 32
# Exposure of a recording: its gain is exp(N(0, GAIN_SD)), about +-10%.
GAIN_SD = 0.1
# Colour cast of a recording, per channel, in grey levels (sd).
CAST_SD = 6.0
# Camera pose of a recording: a shift of up to POSE_PX pixels on each axis (uniform).
POSE_PX = 2
# Camera jitter of a frame around the recording's pose, in pixels (uniform).
JITTER_PX = 1
# Sensor noise of a frame in grey levels (sd), as invariance.sources.synthetic.NOISE_SD.
FRAME_NOISE_SD = 3.0

FILE_KINDS = ("hdf5", "zarr", "video")
HDF5_FRAMES = "data/*/obs/front_image"


def film(scene, frames, rng):
    """One recording of ``scene`` (H, W, 3): ``frames`` uint8 frames (frames, H, W, 3).

    The recording draws its gain, colour cast and camera pose once; every frame is the
    scene moved by that pose plus its own jitter (wrapping at the edges, as ``np.roll``),
    scaled by the gain, tinted by the cast, with sensor noise added.
    """
    rng = _rng(rng)
    h, w, _ = scene.shape
    gain = np.exp(GAIN_SD * rng.standard_normal())
    cast = CAST_SD * rng.standard_normal(3)
    moves = rng.integers(-POSE_PX, POSE_PX + 1, 2) + rng.integers(-JITTER_PX, JITTER_PX + 1, (frames, 2))
    rows = (np.arange(h)[None, :] - moves[:, :1]) % h
    cols = (np.arange(w)[None, :] - moves[:, 1:]) % w
    moved = scene.astype(np.float32)[rows[:, :, None], cols[:, None, :]]
    image = moved * np.float32(gain) + cast.astype(np.float32)
    image += np.float32(FRAME_NOISE_SD) * rng.standard_normal(moved.shape, dtype=np.float32)
    return np.clip(np.rint(image), 0, 255).astype(np.uint8)


def recorded_domains(episodes, frames, seed, *, size=EPISODE_SIDE, clutter=False, domains="abc"):
    """Three domains of recordings: A and B film the same scenes, C other scenes.

    Episode k of A and of B (named ``demo_k``) film scene k of ``seed`` (pair k of
    :func:`invariance.scenes.generate_scenes`), each with a recording of its own; C films
    scenes ``episodes`` .. ``2 episodes - 1`` (named after them), so A and B are paired
    domains and A and C unpaired ones. With ``clutter``, B films the cluttered view
    (level 3) of its scenes: a known clutter shift. ``domains`` names those drawn (each
    is drawn from its own seeds, so leaving one out changes none of the others).

    Returns
    -------
    dict
        ``{"a": [(name, frames)], "b": [...], "c": [...]}``.
    """
    from invariance.scenes import pair_rng, render_pair

    # level 0 draws the same clean view as level 3, and faster (no clutter to render)
    scenes = 2 * episodes if "c" in domains else episodes
    views = [render_pair(pair_rng(seed, k), size=size, level=3 if clutter else 0)[:2] for k in range(scenes)]
    out = {}
    for d, (domain, first, view) in enumerate((("a", 0, 0), ("b", 0, int(clutter)), ("c", episodes, 0))):
        if domain in domains:
            out[domain] = [(f"demo_{k}", film(views[k][view], frames, np.random.default_rng([seed, d, k])))
                           for k in range(first, first + episodes)]
    return out


def write_video(path, frames, fps=10):
    """Motion-JPEG in AVI (PyAV): every frame is coded alone, so the pixels stay near the
    written ones and a damaged file fails at a known frame. Returns ``path``."""
    import av

    with av.open(str(path), "w") as container:
        stream = container.add_stream("mjpeg", rate=fps)
        stream.width, stream.height, stream.pix_fmt = frames.shape[2], frames.shape[1], "yuvj420p"
        for image in frames:
            container.mux(stream.encode(av.VideoFrame.from_ndarray(image, format="rgb24")))
        container.mux(stream.encode())
    return path


def write_recordings(kind, path, recordings):
    """Write ``[(name, frames)]`` as a file of ``kind`` with the real library; return its source spec.

    ``hdf5``: ``PATH.h5`` with ``data/NAME/obs/front_image`` (h5py); ``zarr``: a ``PATH.zarr``
    group with ``data/img`` and ``meta/episode_ends`` (zarr; episodes are then named by
    position); ``video``: a folder ``PATH`` of ``NAME.avi`` (PyAV).
    """
    from pathlib import Path

    path = Path(path)
    if kind == "hdf5":
        import h5py

        with h5py.File(path.with_suffix(".h5"), "w") as f:
            for name, frames in recordings:
                f[f"data/{name}/obs/front_image"] = frames
        return f"hdf5:{path.with_suffix('.h5')}#frames={HDF5_FRAMES}"
    if kind == "zarr":
        import zarr

        images = np.concatenate([frames for _, frames in recordings])
        root = zarr.open_group(str(path.with_suffix(".zarr")), mode="w")
        root.create_array("data/img", data=images, chunks=(recordings[0][1].shape[0], *images.shape[1:]))
        ends = np.cumsum([frames.shape[0] for _, frames in recordings]).astype(np.int64)
        root.create_array("meta/episode_ends", data=ends)
        return f"zarr:{path.with_suffix('.zarr')}#frames=data/img"
    if kind == "video":
        path.mkdir(parents=True)
        for name, frames in recordings:
            write_video(path / f"{name}.avi", frames)
        return f"video:{path}"
    raise ValueError(f"unknown kind {kind!r}; choose one of {FILE_KINDS}")


class _ScoredInputs:
    """Records what ``invariance score`` hands the statistics (the real functions still run).

    While active, :func:`invariance.scoring.score_features` and
    :func:`~invariance.scoring.score_unpaired_features` are wrapped so that their
    arguments are kept in ``calls`` as ``(name, args, kwargs)``; on exit they are restored.
    """

    def __enter__(self):
        from invariance import scoring

        self.calls, self._saved = [], {}
        for name in ("score_features", "score_unpaired_features"):
            real = self._saved[name] = getattr(scoring, name)
            setattr(scoring, name, self._recording(name, real))
        return self

    def _recording(self, name, real):
        def wrapper(*args, **kwargs):
            self.calls.append((name, args, kwargs))
            return real(*args, **kwargs)
        return wrapper

    def __exit__(self, *exc):
        from invariance import scoring

        for name, real in self._saved.items():
            setattr(scoring, name, real)
        return False


def _frame_level(call):
    """The scoring call ``invariance score`` made, rerun with every frame as its own unit
    (no groups): the same features, folds, seed and permutations; only the unit differs."""
    from invariance import scoring

    name, args, kwargs = call
    ungrouped = {"groups": None} if name == "score_features" else {"groups_a": None, "groups_b": None}
    return getattr(scoring, name)(*args, **{**kwargs, **ungrouped})


def source_null_repetition(kind, folder, seed, encoder, *, episodes=20, frames=30, stride=5, permutations=199,
                           folds=5, unpaired=True, clutter=False):
    """One repetition: write the domains as ``kind`` files, score them as ``invariance score``
    does (:func:`invariance.pipeline.score_sources`), and test the same features frame by frame.

    Parameters
    ----------
    kind : {"hdf5", "zarr", "video"}
    folder : Path
        An empty folder for the files.
    seed : int
        Scenes, recordings and the scoring seed.
    encoder : invariance.encoders.Encoder
        A loaded encoder, shared by the repetitions.
    episodes, frames : int
        Episodes per domain and frames per recording.
    stride, permutations, folds : int
        As ``--stride``, ``--permutations`` and ``--folds``.
    unpaired : bool
        Also score A against C (unpaired domains; zarr names episodes by position, so its
        unpaired form is given ``--unpaired``).
    clutter : bool
        B films the cluttered views (the known shift) instead of the clean ones.

    Returns
    -------
    dict
        ``{form: {"grouped": {"domain": p, "mmd": p}, "frame": {...}, "result": result,
        "frame_result": scores, "scored": (name, args, kwargs)}}`` for ``form`` in
        ``"paired"`` (and ``"unpaired"``): ``result`` is what ``score`` returned,
        ``scored`` the call it made to :mod:`invariance.scoring`, ``frame_result`` that
        call's scores without groups.
    """
    from pathlib import Path

    from invariance.options import ExtractionOptions, ScoringOptions
    from invariance.pipeline import score_sources
    from invariance.sources import SourceOptions

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    domains = recorded_domains(episodes, frames, seed, size=EPISODE_SIDE, clutter=clutter,
                               domains="abc" if unpaired else "ab")
    specs = {d: write_recordings(kind, folder / d, recordings) for d, recordings in domains.items()}
    extraction = ExtractionOptions(image_size=EPISODE_SIDE, device="cpu")
    scoring = ScoringOptions(seed=seed, permutations=permutations, folds=folds)
    forms = {"paired": ("b", False)}
    if unpaired:
        forms["unpaired"] = ("c", kind == "zarr")
    out = {}
    for form, (other, flag) in forms.items():
        with _ScoredInputs() as seen:
            result = score_sources(specs["a"], specs[other], encoder.spec, encoder=encoder, extraction=extraction,
                                   scoring=scoring, sources=SourceOptions(stride=stride, unpaired=flag),
                                   progress=False)
        frame = _frame_level(seen.calls[-1])
        out[form] = {"grouped": _p_values(result), "frame": _p_values(frame), "result": result, "frame_result": frame,
                     "scored": seen.calls[-1]}
    return out


def _p_values(scored):
    metrics = scored["metrics"]
    return {"domain": metrics["domain_classifier"]["p_value"], "mmd": metrics["mmd"]["p_value"]}


def rejection_band(reps, alpha=0.05, level=0.99):
    """Rejection rates a level-``alpha`` test stays within in ``level`` of ``reps``-run studies.

    The central interval of Binomial(reps, alpha) from its exact quantiles
    (scipy.stats.binom.interval), as a share of ``reps``.
    """
    from scipy.stats import binom

    low, high = binom.interval(level, reps, alpha)
    return low / reps, high / reps


def source_null_study(kind, reps, encoder, folder, *, seed=0, alpha=0.05, **kwargs):
    """Rejection rates at ``alpha`` over ``reps`` repetitions of :func:`source_null_repetition`.

    Repetition r uses seed ``seed + r`` and its own subfolder, deleted once scored (the
    files of one repetition take about 6 MB at the defaults).

    Returns
    -------
    dict
        ``rates`` {(form, unit, test): share of repetitions with p <= alpha} for unit
        ``"grouped"`` (as ``invariance score``) and ``"frame"``; ``p_values`` {same key:
        list}; ``first`` (the first repetition's full record) and ``reps``.
    """
    import shutil
    from pathlib import Path

    p_values, first = {}, None
    for rep in range(reps):
        where = Path(folder) / f"rep_{seed + rep}"
        run = source_null_repetition(kind, where, seed + rep, encoder, **kwargs)
        shutil.rmtree(where)
        first = run if first is None else first
        for form, record in run.items():
            for unit in ("grouped", "frame"):
                for test, p in record[unit].items():
                    p_values.setdefault((form, unit, test), []).append(p)
    rates = {key: float(np.mean(np.asarray(ps) <= alpha)) for key, ps in p_values.items()}
    return {"rates": rates, "p_values": p_values, "first": first, "reps": reps}
