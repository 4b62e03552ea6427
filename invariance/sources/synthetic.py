"""Workbench episodes for examples, tests and benchmarks, drawn by :mod:`invariance.scenes`.

An episode is one workbench scene (one target part on the bench) filmed for a few frames:
each frame is the scene shifted by up to one pixel of camera jitter plus sensor noise, so
the frames of an episode are strongly correlated, as in a real recording. The clean
domain films the clean view, the cluttered domain the cluttered view of the same scene
(clutter level 3 by default: all active factors at full severity).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from invariance.scenes import pair_rng, render_pair

# Sensor noise of a frame, in grey levels (sd): a few levels, as a camera at normal light
# (common practice for a plausible value).
NOISE_SD = 3.0


def workbench_episode(episode: int, frames: int, *, clutter: bool = False, size: int = 32, seed: int = 0,
                      level: int = 3, take: int = 0):
    """Frames (frames, size, size, 3) uint8 of one scene, and its per-frame end-effector track.

    Parameters
    ----------
    episode : int
        The scene: pair ``episode`` of ``seed`` in :func:`invariance.scenes.generate_scenes`.
    frames : int
    clutter : bool
        Film the cluttered view instead of the clean one.
    size : int
        Frame side in pixels (32..1024).
    seed : int
    level : int
        Clutter level of the cluttered view, 1..3.
    take : int
        Another recording of the same scene: other jitter and noise, same scene.

    Returns
    -------
    images : ndarray of uint8
    ee_pos : ndarray of shape (frames, 3)
        A made-up end-effector track moving towards the target (x, y in 0..1, height).
    """
    clean, cluttered, labels = render_pair(pair_rng(seed, episode), size=size, level=level)
    view = (cluttered if clutter else clean).astype(np.float64)
    out = np.empty((frames, size, size, 3), dtype=np.uint8)
    for t in range(frames):
        rng = np.random.default_rng([seed, episode, t, int(clutter), take])
        dx, dy = rng.integers(-1, 2, size=2)
        img = np.roll(view, (int(dy), int(dx)), axis=(0, 1)) + rng.normal(0, NOISE_SD, view.shape)
        out[t] = np.clip(img, 0, 255).astype(np.uint8)
    share = np.linspace(0.0, 1.0, frames)[:, None]
    ee = np.hstack([0.5 + share * (np.array([[labels["x"], labels["y"]]]) - 0.5), 0.3 * (1 - share)])
    return out, ee


def write_hdf5_episodes(path, episodes: int = 20, frames: int = 30, *, clutter: bool = False, size: int = 32,
                        seed: int = 0, first: int = 0, labels: bool = True, take: int = 0) -> Path:
    """An HDF5 file with ``data/demo_K/obs/front_image`` (and ``ee_pos``) per episode."""
    import h5py

    with h5py.File(path, "w") as f:
        for e in range(first, first + episodes):
            images, ee = workbench_episode(e, frames, clutter=clutter, size=size, seed=seed, take=take)
            obs = f.create_group(f"data/demo_{e}/obs")
            obs["front_image"] = images
            if labels:
                obs["ee_pos"] = ee
    return Path(path)
