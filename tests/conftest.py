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
