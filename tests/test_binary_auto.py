"""The automatic binary cleaner against the best exact MAP (Greig, Porteous & Seheult 1989).

With nothing set, the cleaner estimates the coupling and flip rate from the
noisy image.  Its error rate must be within 10% of the best error that the
exact MAP (minimum cut, computed here with scipy's maximum_flow through
mrfclean.exact) reaches over a range of couplings *with the true flip rate*.
Specimens are open images that scikit-image ships (binary_blobs, a seeded
generator, and the thresholded horse silhouette), not drawn from the model.
"""

from __future__ import annotations

import numpy as np
import pytest
from skimage.data import binary_blobs, horse

from mrfclean import clean_binary
from mrfclean.exact import exact_map
from mrfclean.models.binary import BinaryModel, FlipNoise

COUPLINGS = (0.3, 0.45, 0.6, 0.75, 0.9, 1.05, 1.2, 1.5)


def _specimens():
    yield "blobs", binary_blobs(192, blob_size_fraction=0.1, volume_fraction=0.4, rng=5)
    h = ~horse()  # 328 x 400, True on the horse
    yield "horse", h[::2, ::2]


@pytest.mark.slow
@pytest.mark.parametrize("name, clean", list(_specimens()))
def test_auto_within_ten_percent_of_best_exact_map(name, clean):
    p = 0.15
    noisy = clean ^ (np.random.default_rng(21).random(clean.shape) < p)
    t = np.where(noisy, 1, -1)
    best = min(
        np.mean((exact_map(BinaryModel(FlipNoise(p).field(t), coupling=b)).spins.reshape(clean.shape) > 0)
                != clean)
        for b in COUPLINGS)
    out = clean_binary(noisy, rng=0)
    err = np.mean(out.estimate != clean)
    assert err <= 1.10 * best, (name, err, best, out.params)
