"""Extract features into a features directory, in this process or on a Ray cluster.

``engine="local"`` runs :func:`invariance.encoders.extract_features` shard by shard and
needs nothing beyond torch. ``engine="ray"`` runs the same function inside Ray Data actors
(``Dataset.map_batches`` with a class: each actor loads the encoder once, on a CPU or a
GPU, and takes batches of pairs), and the driver writes the same shards. Ray Data is an
existing engine for batch inference on clusters (Moritz et al., "Ray: a distributed
framework for emerging AI applications", OSDI 2018); nothing here schedules work itself.

Either engine writes a shard only when all its pairs came back, so a failure loses at most
the shards in flight; a rerun (or the automatic retry, ``retries``) extracts only the
missing shards, and the shard writer keeps each pair exactly once.
"""

from __future__ import annotations

import logging
import re
import socket
import time
from pathlib import Path

import numpy as np

from .errors import InvalidParameter, InvarianceError
from .features_dir import ShardWriter, encoder_identity
from .validation import check_choice, check_int

ENGINES = ("local", "ray")
# Pairs per shard by default: 4,096 pairs of 512-d float32 are 16 MiB per layer, small
# enough to lose little on a failure and to hold a few shards per worker in memory, large
# enough that a million pairs make ~250 files (common practice for dataset shards).
DEFAULT_SHARD_SIZE = 4096
# Seconds allowed for the TCP connection to a Ray head before the address is called
# unreachable; a reachable head answers in well under a second on a LAN (common practice).
CONNECT_TIMEOUT_S = 5.0


def _as_pairs(data, skip_unpaired=False):
    from .data import PairSet, discover_pairs, load_manifest

    if isinstance(data, PairSet):
        return data
    path = Path(data)
    return load_manifest(path) if path.is_file() else discover_pairs(path, skip_unpaired=skip_unpaired)


def _plan(pairs, shard_size: int) -> list[list[int]]:
    """Pair indices of each shard: consecutive runs of ``shard_size`` pairs in pair order."""
    return [list(range(s, min(s + shard_size, len(pairs)))) for s in range(0, len(pairs), shard_size)]


def extract_to_directory(data, spec, out, *, engine="local", address=None, layers=None, weights=None,
                         batch_size=32, shard_size=DEFAULT_SHARD_SIZE, device="auto", image_size=None,
                         workers=None, gpus_per_worker=None, retries=1, episodes=None, trusted_code=(),
                         progress=True) -> dict:
    """Extract features of every pair into the features directory ``out``.

    Parameters
    ----------
    data : path or invariance.data.PairSet
        A paired folder, a manifest CSV or a pair set.
    spec : str
        Encoder spec (see :mod:`invariance.encoders`).
    out : path
        The features directory; an unfinished one of the same encoder, layers and pairs
        is resumed (only missing or corrupt shards are extracted).
    engine : {"local", "ray"}, default="local"
    address : str, optional
        Ray cluster address (``HOST:PORT`` or ``ray://HOST:PORT``); default a Ray already
        initialised in this process, else a local Ray instance.
    layers : list of str, optional
        Graph nodes to tap; default ``["output"]``.
    weights : path, optional
        Local state dict for a ``torchvision:`` spec.
    batch_size : int, default=32
        Images per forward pass (two per pair).
    shard_size : int, default=4096
        Pairs per shard file.
    device : {"auto", "cpu", "cuda"}
        Local engine: where the encoder runs. Ray engine: ``cuda`` gives each actor a GPU,
        ``auto`` does when the cluster has GPUs.
    image_size : int, optional
    workers : int, optional
        Ray actors (default: one per GPU, else one per two CPUs of the cluster).
    gpus_per_worker : float, optional
        GPUs per Ray actor (fractions share a GPU); default 1 when GPUs are used.
    retries : int, default=1
        Ray engine: after a failed actor, resume the missing shards this many times.
    episodes : sequence of str, optional
        Episode key per pair, stored with the shards; default the pair set's
        ``episodes`` attribute when it has one.
    trusted_code : sequence of str
    progress : bool or callable

    Returns
    -------
    dict
        ``out``, ``pairs``, ``shards``, ``shards_written`` (this run), ``shards_kept``
        (already there), ``seconds``, ``engine``, ``workers``.
    """
    engine = check_choice("engine", engine, ENGINES)
    from .options import ExtractionOptions

    checked = ExtractionOptions(image_size=image_size, device=device, batch_size=batch_size, cache_dir=None,
                                trusted_code=trusted_code)  # the one set of checks and messages
    batch_size, image_size, trusted_code = checked.batch_size, checked.image_size, checked.trusted_code
    shard_size = check_int("shard_size", shard_size, low=1, high=10_000_000)
    retries = check_int("retries", retries, low=0, high=100)
    pairs = _as_pairs(data)
    if len(pairs) == 0:
        raise InvarianceError("no image pairs to extract features from; check the data folder")
    episodes = _episodes(pairs, episodes)
    from .encoders import load_encoder

    ray_ctx = _connect_ray(address) if engine == "ray" else None
    encoder = load_encoder(spec, weights=weights, device="cpu" if engine == "ray" else device,
                           image_size=image_size, trusted_code=tuple(trusted_code))
    layers = _checked_layers(encoder, layers)
    identity = encoder_identity(encoder, layers)
    plan = _plan(pairs, shard_size)
    start = time.perf_counter()
    with ShardWriter(out) as writer:
        todo = writer.begin(identity, [[pairs.names[i] for i in idx] for idx in plan])
        kept = len(plan) - len(todo)
        job = dict(pairs=pairs, plan=plan, todo=todo, writer=writer, layers=layers, batch_size=batch_size,
                   episodes=episodes, progress=progress)
        if engine == "local":
            _run_local(encoder, **job)
            used = 1
        else:
            used = _run_ray(ray_ctx, dict(spec=spec, weights=None if weights is None else str(weights),
                                          image_size=image_size, trusted_code=tuple(trusted_code),
                                          state_sha256=identity["state_sha256"]),
                            device, workers, gpus_per_worker, retries, **job)
        writer.finish({"engine": engine, "batch_size": batch_size, "shard_size": shard_size})
    return {"out": str(out), "pairs": len(pairs), "shards": len(plan), "shards_written": len(todo),
            "shards_kept": kept, "seconds": time.perf_counter() - start, "engine": engine, "workers": used}


def _checked_layers(encoder, layers) -> list[str]:
    """The layers to tap; unknown ones are refused here, before any actor starts."""
    from .encoders import OUTPUT_KEY, available_layers

    layers = [str(x) for x in layers] if layers else [OUTPUT_KEY]
    if layers != [OUTPUT_KEY]:
        known = set(available_layers(encoder))
        unknown = [x for x in layers if x not in known]
        if unknown:
            raise InvalidParameter("layers", f"layers={unknown} are not nodes of {encoder.spec}; list them with "
                                             f"`invariance layers --encoder {encoder.spec}`")
    return layers


def _episodes(pairs, episodes):
    episodes = getattr(pairs, "episodes", None) if episodes is None else episodes
    if episodes is None:
        return None
    episodes = [str(e) for e in episodes]
    if len(episodes) != len(pairs):
        raise InvalidParameter("episodes", f"episodes has {len(episodes)} keys for {len(pairs)} pairs; give one per pair")
    return episodes


def _shard_episodes(episodes, idx):
    return None if episodes is None else [episodes[i] for i in idx]


def _run_local(encoder, *, pairs, plan, todo, writer, layers, batch_size, episodes, progress):
    from .encoders import extract_features
    from .options import ExtractionOptions
    from .progress import as_reporter

    options = ExtractionOptions(batch_size=batch_size, cache_dir=None)
    with as_reporter(progress).bar(sum(len(plan[i]) for i in todo), f"features {encoder.spec}") as bar:
        for index in todo:
            subset = pairs.subset(plan[index])
            feats = extract_features(subset, encoder, layers, options=options, progress=False)
            writer.write(index, feats, _shard_episodes(episodes, plan[index]))
            bar.update(len(plan[index]))


# --- Ray ---------------------------------------------------------------------------------


def _import_ray():
    try:
        import ray
        import ray.data  # noqa: F401
    except ImportError:
        raise InvarianceError("engine='ray' needs Ray Data: pip install 'invariance[ray]' (or use engine='local')") from None
    return ray


def _check_reachable(address: str) -> None:
    """Refuse an address whose host does not accept a TCP connection within seconds.

    ``ray.init`` waits a long time for a head that is not there; a plain connection attempt
    with a timeout says the same in ``CONNECT_TIMEOUT_S`` seconds.
    """
    hostport = address.split("://", 1)[-1].rstrip("/")
    host, sep, port = hostport.rpartition(":")
    if not sep or not port.isdigit() or not host:
        raise InvalidParameter("address", f"address={address!r} is not valid; pass HOST:PORT or ray://HOST:PORT "
                                          "(e.g. 10.0.0.5:6379)")
    try:
        socket.create_connection((host.strip("[]"), int(port)), timeout=CONNECT_TIMEOUT_S).close()
    except OSError as exc:
        raise InvarianceError(f"Ray cluster at {address} cannot be reached ({exc.strerror or type(exc).__name__}); "
                              "check the address and that the head node is running (`ray status` on it), "
                              "or use --engine local") from None


def _connect_ray(address):
    ray = _import_ray()
    if address is None and ray.is_initialized():
        return ray
    if address is not None:
        if not isinstance(address, str) or address == "auto":
            raise InvalidParameter("address", f"address={address!r} is not valid; pass HOST:PORT or ray://HOST:PORT")
        _check_reachable(address)
    try:
        ray.init(address=address, include_dashboard=False, log_to_driver=False, ignore_reinit_error=True,
                 logging_level="error")
    except (ConnectionError, RuntimeError, ValueError) as exc:
        raise InvarianceError(f"Ray cannot start or connect ({str(exc).splitlines()[0]}); check --address, "
                              "or use --engine local") from None
    return ray


class _EncoderActor:
    """A Ray Data actor: loads the encoder once, then extracts batches of pairs."""

    def __init__(self, spec, weights, image_size, trusted_code, state_sha256, device, layers, batch_size):
        import torch

        from .encoders import load_encoder

        if device == "cpu":
            torch.set_num_threads(1)  # one core per CPU actor: the actors share the host's cores
        self.encoder = load_encoder(spec, weights=weights, device=device, image_size=image_size,
                                    trusted_code=trusted_code)
        held = encoder_identity(self.encoder, layers)["state_sha256"]
        if held != state_sha256:
            raise InvarianceError(f"encoder {spec} loads other weights on this Ray worker than on the driver; "
                                  "install the same files and package versions on every node")
        self.layers, self.batch_size = list(layers), batch_size

    def __call__(self, batch: dict) -> dict:
        from .data import PairSet
        from .encoders import extract_features
        from .options import ExtractionOptions

        pairs = PairSet.from_paths(list(batch["clean"]), list(batch["cluttered"]), [str(n) for n in batch["name"]])
        feats = extract_features(pairs, self.encoder, self.layers, progress=False, num_workers=0,
                                 options=ExtractionOptions(batch_size=self.batch_size, cache_dir=None))
        out = {"row": np.asarray(batch["row"], dtype=np.int64)}
        for li, layer in enumerate(self.layers):
            out[f"L{li}"] = np.stack(feats[layer], axis=1)  # (rows, 2, D): clean, cluttered
        return out


def _ray_resources(ray, device, workers, gpus_per_worker):
    total = ray.cluster_resources()
    gpus = float(total.get("GPU", 0))
    use_gpu = device == "cuda" or (device == "auto" and gpus > 0)
    if device == "cuda" and gpus == 0:
        raise InvarianceError("device='cuda' but the Ray cluster has no GPUs; pass device='cpu' or 'auto'")
    if use_gpu:
        per = 1.0 if gpus_per_worker is None else float(gpus_per_worker)
        default = max(1, int(gpus // per))
        return check_int("workers", workers or default, low=1), {"num_gpus": per, "num_cpus": 1}, "cuda"
    default = max(1, int(total.get("CPU", 1)) // 2)
    return check_int("workers", workers or default, low=1), {"num_cpus": 1}, "cpu"


def _run_ray(ray, load, device, workers, gpus_per_worker, retries, *, pairs, plan, todo, writer, layers,
             batch_size, episodes, progress):
    workers, resources, actor_device = _ray_resources(ray, device, workers, gpus_per_worker)
    ray.data.DataContext.get_current().enable_progress_bars = bool(progress)
    if not progress:  # quiet: Ray Data's own INFO lines (plans, timings) would go to stderr too
        logging.getLogger("ray.data").setLevel(logging.WARNING)
    for attempt in range(retries + 1):
        todo = [i for i in todo if i not in writer.records]
        if not todo:
            break
        try:
            _ray_pass(ray, load, actor_device, workers, resources, pairs, plan, todo, writer, layers, batch_size,
                      episodes)
        except InvarianceError:
            raise
        except Exception as exc:  # noqa: BLE001 - any failure inside an actor arrives wrapped by Ray
            left = sum(i not in writer.records for i in todo)
            if attempt == retries:
                raise InvarianceError(f"Ray extraction failed ({_cause(exc)}); {len(plan) - left} of {len(plan)} "
                                      f"shards are written in {writer.path}; rerun the same command to resume") from None
    return workers


def _cause(exc) -> str:
    """The user-facing line inside a Ray error: the innermost ``SomethingError: message``
    line of the exception chain that is not Ray's own wrapper."""
    lines, seen = [], set()
    while exc is not None and id(exc) not in seen:
        seen.add(id(exc))
        lines += [f"{type(exc).__name__}: {exc}".strip()] + [line.strip() for line in str(exc).splitlines()]
        exc = exc.__cause__ or exc.__context__
    found = [line for line in lines if re.match(r"^[\w.]*(Error|Exception): ", line) and not line.startswith("ray.")
             and "UDF failed" not in line]
    line = (found[-1] if found else lines[0]).splitlines()[0]
    return re.sub(r"^[\w.]*InvarianceError: ", "", line)[:800]


def _ray_pass(ray, load, actor_device, workers, resources, pairs, plan, todo, writer, layers, batch_size,
              episodes):
    rows = [i for index in todo for i in plan[index]]
    items = [{"row": i, "clean": str(pairs.clean[i]), "cluttered": str(pairs.cluttered[i]), "name": pairs.names[i]}
             for i in rows]
    ds = ray.data.from_items(items, override_num_blocks=max(1, min(len(items), workers * 4)))
    ds = ds.map_batches(_EncoderActor, batch_size=max(1, batch_size // 2), batch_format="numpy",
                        compute=ray.data.ActorPoolStrategy(size=workers), fn_constructor_kwargs={**load, "device": actor_device, "layers": layers,
                                                                    "batch_size": batch_size}, **resources)
    shard_of = {i: index for index in todo for i in plan[index]}
    buffers: dict[int, dict[int, list]] = {}
    for batch in ds.iter_batches(batch_size=None, batch_format="numpy"):
        for k, row in enumerate(batch["row"].tolist()):
            index = shard_of[row]
            if index in writer.records:
                continue  # a retried block returned a shard already written: kept once
            buffers.setdefault(index, {})[row] = [batch[f"L{li}"][k] for li in range(len(layers))]
            if len(buffers[index]) == len(plan[index]):
                _write_from_buffer(writer, index, plan[index], buffers.pop(index), layers, episodes)


def _write_from_buffer(writer, index, idx, buffer, layers, episodes):
    feats = {}
    for li, layer in enumerate(layers):
        stacked = np.stack([buffer[i][li] for i in idx])  # (rows, 2, D), in pair order
        feats[layer] = (stacked[:, 0], stacked[:, 1])
    writer.write(index, feats, _shard_episodes(episodes, idx))
