"""Make the demo images in sample_images/ (an invented scenario, fixed seed).

The scenario: scans of a synthetic yeast-like colony (round and budding cells)
and of a synthetic fungal mat (branching hyphae), each as a clean reference and
a noisy scan:

* ``colony_clean.png`` / ``colony_noisy.png`` — bi-level 0/255, 15% of pixels flipped.
* ``hyphae_clean.png`` / ``hyphae_noisy.png`` — bi-level 0/255, 10% flipped.
* ``colony_scan.tif`` — uint16 greyscale scan of the colony: two intensity
  levels plus Gaussian noise (clean it with ``--kind binary``).
* ``tissue_clean.png`` / ``tissue_noisy.png`` — uint8 greyscale specimen
  (shaded cells with bright granules) with Gaussian noise, sigma = 20 grey levels.

Run ``python scripts/make_samples.py [OUTDIR]`` (default: sample_images/).
The images are invented for the demo only; tests use outside references.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
from scipy import ndimage as ndi

SEED = 20261201
SIZE = 256


def colony(rng, n=SIZE):
    """Bi-level colony: ellipses (cells), some with a smaller bud attached."""
    yy, xx = np.mgrid[0:n, 0:n]
    img = np.zeros((n, n), bool)
    for _ in range(34):
        cy, cx = rng.uniform(10, n - 10, 2)
        a, b = rng.uniform(7, 16), rng.uniform(6, 13)
        th = rng.uniform(0, np.pi)
        c, s = np.cos(th), np.sin(th)
        u, v = (xx - cx) * c + (yy - cy) * s, -(xx - cx) * s + (yy - cy) * c
        img |= (u / a) ** 2 + (v / b) ** 2 <= 1
        if rng.random() < 0.4:  # a bud on the long axis
            bx, by = cx + 1.1 * a * c, cy + 1.1 * a * s
            img |= (xx - bx) ** 2 + (yy - by) ** 2 <= (0.45 * b) ** 2
    return img


def hyphae(rng, n=SIZE):
    """Bi-level mat of branching filaments, 3-5 pixels wide."""
    img = np.zeros((n, n), bool)
    tips = [(rng.uniform(0, n), rng.uniform(0, n), rng.uniform(0, 2 * np.pi)) for _ in range(7)]
    while tips:
        y, x, a = tips.pop()
        for _ in range(int(rng.uniform(80, 220))):
            a += rng.normal(0, 0.07)
            y, x = y + np.sin(a), x + np.cos(a)
            if not (0 <= y < n and 0 <= x < n):
                break
            img[int(y), int(x)] = True
            if rng.random() < 0.012 and len(tips) < 30:
                tips.append((y, x, a + rng.choice([-1, 1]) * rng.uniform(0.5, 1.1)))
    return ndi.binary_dilation(img, iterations=2)


def tissue(rng, n=SIZE):
    """Greyscale specimen in [0, 255]: shaded cells with nuclei and granules."""
    yy, xx = np.mgrid[0:n, 0:n]
    img = np.full((n, n), 30.0)
    for _ in range(22):
        cy, cx = rng.uniform(0, n, 2)
        r = rng.uniform(14, 30)
        d = np.hypot(yy - cy, xx - cx)
        cell = d <= r
        img[cell] = 90 + 50 * (1 - d[cell] / r) + rng.uniform(-10, 10)
        nuc = d <= 0.35 * r
        img[nuc] = 190 + rng.uniform(-15, 15)
    granules = ndi.gaussian_filter((rng.random((n, n)) < 0.004).astype(float), 1.2) * 900
    img = ndi.gaussian_filter(img, 0.8) + granules
    return np.clip(img, 0, 255)


def main(argv=None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    out = Path(argv[0]) if argv else Path(__file__).resolve().parent.parent / "sample_images"
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(SEED)
    from PIL import Image
    import tifffile

    def png(name, a):
        Image.fromarray(a).save(out / name, optimize=True)

    col = colony(rng)
    png("colony_clean.png", col.astype(np.uint8) * 255)
    png("colony_noisy.png", (col ^ (rng.random(col.shape) < 0.15)).astype(np.uint8) * 255)
    hy = hyphae(rng)
    png("hyphae_clean.png", hy.astype(np.uint8) * 255)
    png("hyphae_noisy.png", (hy ^ (rng.random(hy.shape) < 0.10)).astype(np.uint8) * 255)
    scan = np.where(col, 21000.0, 9000.0) + rng.normal(0, 5000.0, col.shape)
    tifffile.imwrite(out / "colony_scan.tif", np.clip(scan, 0, 65535).astype(np.uint16),
                     photometric="minisblack", compression="zlib",
                     resolution=(1 / 0.65, 1 / 0.65), resolutionunit="MICROMETER")
    ti = tissue(rng)
    png("tissue_clean.png", np.rint(ti).astype(np.uint8))
    png("tissue_noisy.png", np.clip(np.rint(ti + rng.normal(0, 20.0, ti.shape)), 0, 255).astype(np.uint8))
    for p in sorted(out.iterdir()):
        print(f"{p}  {p.stat().st_size // 1024} KiB")
    return 0


if __name__ == "__main__":
    sys.exit(main())
