"""Shared test fixtures and synthetic data."""

import numpy as np
import pytest


@pytest.fixture(scope="module")
def one_torch_thread():
    """One intra-op thread: the test machine is shared and oversubscription stalls it."""
    import torch

    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)


def paired_gaussians(n, d, seed, shift=0.0, noise=1.0):
    """Paired sample: scene z_i seen twice with independent noise, the second view shifted.

    Without a shift, x_i and y_i are exchangeable within each pair (the paired null).
    """
    rng = np.random.default_rng(seed)
    z = rng.standard_normal((n, d))
    x = z + noise * rng.standard_normal((n, d))
    y = z + noise * rng.standard_normal((n, d)) + shift
    return x, y


def random_image_pairs(root, n, *, side=36, seed=0):
    """A PairSet of ``n`` pairs of random ``side`` px RGB images under ``root/data``."""
    import numpy as np
    from PIL import Image

    from invariance.data import PairSet

    rng = np.random.default_rng(seed)
    paths = {}
    for view in ("clean", "cluttered"):
        (root / "data" / view).mkdir(parents=True)
        paths[view] = []
        for i in range(n):
            path = root / "data" / view / f"s{i}.png"
            Image.fromarray(rng.integers(0, 256, (side, side, 3), dtype=np.uint8)).save(path)
            paths[view].append(path)
    return PairSet.from_paths(paths["clean"], paths["cluttered"])
