"""End-to-end on an open data set: digits clean vs digits blended over photo patches.

Clean: scikit-learn's bundled digits (UCI optical recognition of handwritten digits,
8x8), upsampled to 28x28 RGB. Cluttered: the same digits blended over random patches of
scikit-image's bundled colour photos with out = |patch - digit| per pixel and channel,
the blended-digits domain of Ganin & Lempitsky, ICML 2015 (Ganin et al., JMLR 17, 2016,
section 5.2.4). A fixed random-feature encoder must see a large, significant gap.
"""

import numpy as np
import pytest
import skimage.data
from sklearn.datasets import load_digits
from skimage.transform import resize

from invariance.options import ScoringOptions
from invariance.readings import describe_metrics
from invariance.scoring import score_features

N_PAIRS = 300
SIZE = 28


def _clean_digits():
    data = load_digits()
    images = data.images[:N_PAIRS] / 16.0
    upsampled = np.stack(
        [resize(img, (SIZE, SIZE), order=1, anti_aliasing=False) for img in images]
    )
    labels = data.target[:N_PAIRS].astype(str).astype(object)
    return np.repeat(upsampled[..., None], 3, axis=-1), labels


def _blended(clean, seed=0):
    # Photos without people: a coffee cup, a cat, a rocket.
    photos = [skimage.data.coffee(), skimage.data.chelsea(), skimage.data.rocket()]
    photos = [p.astype(np.float64) / 255.0 for p in photos]
    rng = np.random.default_rng(seed)
    out = np.empty_like(clean)
    for i, digit in enumerate(clean):
        photo = photos[rng.integers(len(photos))]
        top = rng.integers(photo.shape[0] - SIZE)
        left = rng.integers(photo.shape[1] - SIZE)
        patch = photo[top : top + SIZE, left : left + SIZE]
        out[i] = np.abs(patch - digit)  # Ganin et al., JMLR 2016, sec. 5.2.4
    return out


def _encoder(images, seed=0, width=256):
    """Fixed random features: seeded Gaussian projection of the pixels, then ReLU."""
    flat = images.reshape(len(images), -1)
    rng = np.random.default_rng(seed)
    W = rng.standard_normal((flat.shape[1], width)) / np.sqrt(flat.shape[1])
    b = rng.standard_normal(width) * 0.1
    return np.maximum(flat @ W + b, 0.0)


@pytest.fixture(scope="module")
def digits_pairs():
    clean_images, labels = _clean_digits()
    cluttered_images = _blended(clean_images)
    return _encoder(clean_images), _encoder(cluttered_images), labels


def test_blended_digits_show_a_large_significant_gap(digits_pairs):
    clean, cluttered, labels = digits_pairs
    result = score_features(clean, cluttered, tasks={"digit": labels}, options=ScoringOptions(seed=0, permutations=200, folds=5))
    m = result["metrics"]
    assert m["domain_classifier"]["accuracy"] > 0.95
    assert m["domain_classifier"]["ci"][0] > 0.9
    # a permutation test with B = 200 reaches at most 1 / (B + 1) (Phipson & Smyth 2010)
    assert m["domain_classifier"]["p_value"] == pytest.approx(1 / 201)
    assert m["mmd"]["p_value"] == pytest.approx(1 / 201)  # no swap beats the observed
    probe = m["probe"]["digit"]
    assert probe["clean"] > 0.8  # digits stay linearly readable through random features
    assert probe["gap"] > 0.2
    assert m["paired_drift"]["relative_drift"] > 0.3
    assert "so the encoder separates the domains" in describe_metrics(m)[0][3]


def test_identical_sets_show_no_gap(digits_pairs):
    clean, _, labels = digits_pairs
    m = score_features(clean, clean.copy(), tasks={"digit": labels}, options=ScoringOptions(seed=0, permutations=200, folds=5))["metrics"]
    # identical rows get identical decision values: one of each pair is right
    assert m["domain_classifier"]["accuracy"] == pytest.approx(0.5)
    assert m["domain_classifier"]["p_value"] > 0.4
    assert m["mmd"]["p_value"] == 1.0
    assert m["probe"]["digit"]["gap"] == 0.0
    assert m["paired_drift"]["relative_drift"] == 0.0
    assert m["cka"] == pytest.approx(1.0)
