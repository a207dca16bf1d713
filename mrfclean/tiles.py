r"""Tiled cleaning: images larger than memory; binary results identical to an untiled run.

Greyscale images are tiled differently (:func:`clean_grey_tiled`): their image
update is one global linear solve, so each tile is sampled with a margin of
the image around it and the results agree with an untiled run within
Monte-Carlo error rather than bit for bit.

How a tiled sweep stays an exact Gibbs sweep
--------------------------------------------
A sweep updates every colour-0 site (given the colour-1 sites), then every
colour-1 site (given the new colour-0 sites).  A tile swept on its own with a
halo of *old* spins gets its colour-0 sites right everywhere, but a colour-1
site next to the halo would read an old colour-0 neighbour.  So each tile is
swept inside a margin: the tile extended by one row and two columns on every
side that has a neighbour (two columns keep the extension on the packed
layout's even column grid), with the true old spins around that.  After one
full sweep of the extended block every site at depth >= 1 from its edge —
in particular the whole tile — holds exactly what a whole-image sweep gives,
because the random number of each site is a hash of its *global* index
(:mod:`mrfclean.kernels`) and the colours follow global coordinates.

The tiles of a band of rows read old spins from the state and write into a
band buffer; a band is committed when the band below it has been swept (the
band below reads the band above's last two rows, which must still be old).
The energy of a band is computed once both of its neighbour bands hold the
new spins.  Zero-temperature (ICM) passes and the random start of odd chains
use the same schedule, so annealed MAP, MPM and the quench are all tiled and
all **bit-identical** to :class:`mrfclean.models.binary.BinaryModel` on the
whole image (tested).  Energies agree to rounding (summed in another order).

Memory: the spins (1 byte per pixel, packed), the MPM counts (2 bytes per
pixel), and per band the local fields of at most three bands of rows
(4 bytes per pixel of a band) unless the whole field fits
``field_cache_bytes``; the input is read one band at a time (memory-mapped
TIFF regions, see :func:`mrfclean.io.open_image`).  Tiles span every plane
of a stack (the kernels have no halo along z).

Parallelism: every kernel call runs its rows on all numba threads; tiles
run one after another.

References
----------
.. [1] S. Geman and D. Geman, "Stochastic relaxation, Gibbs distributions, and
   the Bayesian restoration of images", IEEE TPAMI 6 (1984) 721-741.
.. [2] G. L. Steele, D. Lea and C. H. Flood, "Fast splittable pseudorandom
   number generators", OOPSLA 2014 (the counter-based streams).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass

import numpy as np

from . import kernels
from . import levels as lv
from .estimates import (CleanResult, Diagnostics, anneal, combine_diagnostics,
                        record_posterior, sample_posterior)
from .binary import FIT_SALT, POSTERIOR_SALT
from .lattice import Grid
from .models.binary import bernoulli_std, on_fraction
from .pool import InProcess
from .sampler import START_SWEEP, ChainModel, Tally, to_seed

#: Smallest tile side accepted.
MIN_TILE = 8
#: Default tile side (pixels).
DEFAULT_TILE = 1024
#: Keep every band's local fields when they take at most this many bytes.
DEFAULT_FIELD_CACHE_BYTES = 256 * 2**20
#: Side of the central window on which unknown parameters are estimated.
DEFAULT_FIT_WINDOW = 512
#: At most this many pixels (all planes) in the fitting window.
FIT_MAX_PIXELS = 2**22


# ---------------------------------------------------------------------------
# the source image, read a band of rows at a time
# ---------------------------------------------------------------------------
class VolumeRows:
    """View any 2-D or 3-D array-like (ndarray, memmap, :class:`~mrfclean.io.TiffRegions`) as
    ``(Z, H, W)`` and read whole rows of it."""

    def __init__(self, source):
        self.source = source
        shape = tuple(int(s) for s in source.shape)
        if len(shape) not in (2, 3) or min(shape) < 1:
            raise ValueError(f"expected a non-empty 2-D image or 3-D stack, got shape {shape}")
        self.flat = len(shape) == 2
        self.shape = (1, *shape) if self.flat else shape
        self.dtype = np.dtype(source.dtype)

    def rows(self, r0, r1):
        """Rows ``[r0, r1)`` of every plane, as a new ``(Z, r1 - r0, W)`` array."""
        if self.flat:
            return np.asarray(self.source[r0:r1])[None]
        return np.asarray(self.source[:, r0:r1])

    def window(self, i0, i1, j0, j1):
        if self.flat:
            return np.asarray(self.source[i0:i1, j0:j1])[None]
        return np.asarray(self.source[:, i0:i1, j0:j1])


def band_bounds(height, size):
    """Bands of about ``size`` rows covering ``[0, height)``; none shorter than 2 rows.

    Examples
    --------
    >>> band_bounds(10, 4)
    [(0, 4), (4, 8), (8, 10)]
    >>> band_bounds(9, 4)  # no one-row band at the end
    [(0, 4), (4, 9)]
    """
    size = max(int(size), 2)
    cuts = list(range(0, height, size)) + [height]
    bands = list(zip(cuts[:-1], cuts[1:]))
    if len(bands) > 1 and bands[-1][1] - bands[-1][0] < 2:
        (a, _), (_, b) = bands[-2], bands[-1]
        bands[-2:] = [(a, b)]
    return bands


def column_bounds(width, size):
    """Tiles of an even number of columns (the last may be odd) covering ``[0, width)``."""
    size = max(2, int(size) + (int(size) & 1))
    cuts = list(range(0, width, size)) + [width]
    return list(zip(cuts[:-1], cuts[1:]))


def scan_levels(rows: VolumeRows, band=256):
    """Distinct values of the image if at most two, else ``None``; checks for NaN band by band.

    Raises
    ------
    ValueError
        When a float image holds NaN or infinite values.
    """
    found = None
    many = False
    for r0, r1 in band_bounds(rows.shape[1], band):
        a = rows.rows(r0, r1)
        lv.check_dtype(a.dtype)
        if a.dtype.kind == "f" and not np.all(np.isfinite(a)):
            raise ValueError("image contains NaN or infinite values")
        if many:
            continue
        d = lv.distinct_levels(a)
        if d is None:
            many = True
            continue
        found = d if found is None else np.unique(np.concatenate([found, d]))
        if found.size > 2:
            many = True
    return None if many else found


# ---------------------------------------------------------------------------
# the data term as a function of raw pixels
# ---------------------------------------------------------------------------
class RawField:
    """Local fields and starting spins of the binary model from raw pixel values.

    Gives exactly the float32 values :class:`~mrfclean.models.binary.BinaryModel`
    stores for the whole image (elementwise, so region by region is the same);
    for 8/16-bit unsigned and bool pixels through a lookup table.
    """

    def __init__(self, noise_term, kind, high, dtype):
        self.noise = noise_term
        self.kind = kind  # "flip" or "gaussian"
        self.high = high
        self.dtype = np.dtype(dtype)
        self.lut = None
        if noise_term is not None and self.dtype.kind in "bu" and self.dtype.itemsize <= 2:
            n = 2 if self.dtype.kind == "b" else 1 << (8 * self.dtype.itemsize)
            values = np.arange(n).astype(self.dtype)
            self.lut = self._direct(values)

    def observed(self, raw):
        """What the model observes: spins (flip) or float32 intensities (Gaussian)."""
        if self.kind == "flip":
            return lv.spins_from_levels(raw, self.high)
        return lv.to_work(raw)

    def _direct(self, raw):
        return np.asarray(self.noise.field(self.observed(raw)), dtype=np.float32)

    def field(self, raw):
        if self.lut is not None:
            idx = raw.view(np.uint8) if raw.dtype.kind == "b" else raw
            return np.take(self.lut, idx)
        return self._direct(raw)

    def start(self, raw):
        """BinaryModel's default start: the observed spins (flip) or ``sign(h)`` (Gaussian)."""
        if self.kind == "flip":
            return lv.spins_from_levels(raw, self.high)
        return np.where(self.field(raw) >= 0, 1, -1).astype(np.int8)


# ---------------------------------------------------------------------------
# the tiled model
# ---------------------------------------------------------------------------
class SharedSpinTally(Tally):
    """Counts of "on" per site, in one count array shared by every tally of a model.

    The driver tallies every chain of a run into one tally, so one array is
    enough; :meth:`merge` (tallies sharing the store) adds the number of kept
    sweeps only.  Counts are uint16 (uint32 beyond 65535 sweeps).
    """

    def __init__(self, store):
        self.store = store  # {"counts": array or None, "n": int, "dtype": ...}
        self.n = 0

    @property
    def counts(self):
        return self.store["counts"]

    def add(self, state):
        if self.store["counts"] is None:
            self.store["counts"] = np.zeros(state.shape, dtype=self.store["dtype"])
        kernels.count_on(state, self.store["counts"], self.store["width"], 0)
        self.n += 1

    def merge(self, other):
        if other.store is not self.store:
            raise ValueError("tallies of different tiled models cannot be merged")
        self.n += other.n

    def mean_rows(self, grid, r0, r1):
        """P(on) of rows ``[r0, r1)``, float32 ``(Z, r1 - r0, W)``."""
        Z, H, W = grid.shape
        band = Grid((Z, r1 - r0, W), origin=(0, r0, 0), full_shape=grid.shape)
        packed = np.ascontiguousarray(self.counts[:, :, r0:r1 + 2, :])
        return on_fraction(band.unpack(packed, np.float32), self.n)

    def mean(self):  # pragma: no cover - whole-image use goes through mean_rows
        raise NotImplementedError("use mean_rows on a tiled tally")

    def std(self):  # pragma: no cover
        raise NotImplementedError("use mean_rows on a tiled tally")


class TiledBinaryModel(ChainModel):
    """The binary posterior of :class:`~mrfclean.models.binary.BinaryModel`, swept tile by tile.

    Parameters
    ----------
    source : array-like, shape (H, W) or (Z, H, W)
        Raw pixels (read one band of rows at a time).
    raw_field : RawField
        Local fields and starting spins from raw pixels.
    coupling, coupling_z : float
    tile : int or (int, int)
        Tile height and width in pixels.
    field_cache_bytes : int
        Keep all local fields when they fit in this many bytes; otherwise
        recompute each band's fields at every pass.

    Notes
    -----
    A state is the whole packed spin array (1 byte per pixel), laid out
    exactly as :class:`~mrfclean.models.binary.BinaryModel`'s.  The energy
    of the state left by :meth:`sweep` or :meth:`quench` is computed during
    that pass; :meth:`energy` returns it when asked for the same array.
    """

    def __init__(self, source, raw_field: RawField, *, coupling, coupling_z=None, tile=DEFAULT_TILE,
                 field_cache_bytes=DEFAULT_FIELD_CACHE_BYTES):
        self.rows = source if isinstance(source, VolumeRows) else VolumeRows(source)
        self.grid = Grid(self.rows.shape)
        self.raw = raw_field
        self.coupling = float(coupling)
        self.coupling_z = self.coupling if coupling_z is None else float(coupling_z)
        for name, v in (("coupling", self.coupling), ("coupling_z", self.coupling_z)):
            if not math.isfinite(v):
                raise ValueError(f"{name} must be finite, got {v}")
        th, tw = (tile, tile) if np.isscalar(tile) else tile
        if min(th, tw) < 2:
            raise ValueError(f"tiles must be at least 2 pixels on a side, got {tile!r}")
        Z, H, W = self.grid.shape
        self.bands = band_bounds(H, th)
        self.columns = column_bounds(W, tw)
        self.tile = (int(th), int(tw))
        self.cache_all = 4 * self.grid.packed_shape[0] * Z * (H + 2 * len(self.bands) + 2) \
            * self.grid.packed_shape[3] <= field_cache_bytes
        self._fields = {}
        self._last = None  # (state, energy) of the last pass
        self._tally_store = {"counts": None, "dtype": np.uint16, "width": W}
        self.peak_band_bytes = 0  # bookkeeping: largest working set of one band
        self.peak_fields = 0  # bookkeeping: most bands' fields held at once

    # --- geometry -----------------------------------------------------------------
    def _rows_slice(self, r0, r1):
        """Packed rows of global rows [r0, r1) with their halo rows: ``[r0, r1 + 2)``."""
        return slice(r0, r1 + 2)

    def _pack_rows(self, values, r0, dtype):
        """Pack image rows starting at global row ``r0`` into a new packed band."""
        Z, n, W = values.shape
        out = np.zeros((2, Z, n + 2, self.grid.packed_shape[3]), dtype=dtype)
        kernels.pack(np.ascontiguousarray(values, dtype=dtype), out, r0 & 1)
        return out

    def _extended(self, b):
        b0, b1 = self.bands[b]
        return max(b0 - 1, 0), min(b1 + 1, self.grid.shape[1])

    def _band_field(self, b):
        """Packed local fields of band ``b`` extended by a row each side (rows [e0, e1))."""
        if b in self._fields:
            return self._fields[b]
        e0, e1 = self._extended(b)
        f = self._pack_rows(self.raw.field(self.rows.rows(e0, e1)), e0, np.float32)
        self._fields[b] = f
        self.peak_fields = max(self.peak_fields, len(self._fields))
        return f

    def _forget_fields(self, keep_from):
        if not self.cache_all:
            for k in [k for k in self._fields if k < keep_from]:
                del self._fields[k]

    # --- one pass over all tiles ------------------------------------------------------
    def _pass(self, state, update):
        """Apply ``update`` to every tile's extended block; commit bands; return (energy, changes).

        ``update(block, field, width, geometry) -> None`` changes ``block`` in place.
        """
        Z, H, W = self.grid.shape
        energy = 0.0
        changes = 0
        pending = []  # (band index, buffer of its rows)

        def commit(b, buf):
            b0, b1 = self.bands[b]
            state[:, :, b0 + 1:b1 + 1, :] = buf

        def band_energy(b):
            b0, b1 = self.bands[b]
            e0, _ = self._extended(b)
            f = self._band_field(b)
            h = np.ascontiguousarray(f[:, :, b0 - e0:b0 - e0 + (b1 - b0) + 2, :])
            p = np.ascontiguousarray(state[:, :, b0:b1 + 2, :])
            return float(kernels.ising_energy(p, h, W, self.coupling, self.coupling_z, b0 & 1))

        for b, (b0, b1) in enumerate(self.bands):
            e0, e1 = self._extended(b)
            field = self._band_field(b)
            buf = np.array(state[:, :, b0 + 1:b1 + 1, :])
            work = buf.nbytes + field.nbytes
            for j0, j1 in self.columns:
                c0, c1 = max(j0 - 2, 0), min(j1 + 2, W)
                t0, nw = c0 // 2, (c1 - c0 + 1) // 2
                block = np.ascontiguousarray(state[:, :, e0:e1 + 2, t0:t0 + nw + 2])
                hb = np.ascontiguousarray(field[:, :, :, t0:t0 + nw + 2])
                ti, tj, nt = b0 - e0 + 1, (j0 - c0) // 2 + 1, (j1 - j0 + 1) // 2
                before = block[:, :, ti:ti + (b1 - b0), tj:tj + nt].copy()
                update(block, hb, c1 - c0, (e0 & 1, 0, e0, c0, H, W))
                after = block[:, :, ti:ti + (b1 - b0), tj:tj + nt]
                changes += int(np.count_nonzero(before != after))
                buf[:, :, :, j0 // 2 + 1:j0 // 2 + 1 + nt] = after
                work = max(work, buf.nbytes + field.nbytes + 2 * block.nbytes + hb.nbytes)
            self.peak_band_bytes = max(self.peak_band_bytes, work)
            pending.append((b, buf))
            if len(pending) == 2:  # the band above may be committed now
                commit(*pending.pop(0))
                if b >= 2:
                    energy += band_energy(b - 2)
                    self._forget_fields(b - 1)
        for item in pending:
            commit(*item)
        for b in range(max(len(self.bands) - 2, 0), len(self.bands)):
            energy += band_energy(b)
        self._forget_fields(len(self.bands))
        self._last = (state, energy)
        return energy, changes

    # --- ChainModel -------------------------------------------------------------------
    def _fill(self, state, values_of):
        for b0, b1 in self.bands:
            v = self._pack_rows(values_of(b0, b1), b0, np.int8)
            state[:, :, b0 + 1:b1 + 1, :] = v[:, :, 1:-1, :]

    def start(self, chain, seed):
        self._last = None  # the previous chain's state is not held during this one
        state = np.zeros(self.grid.packed_shape, dtype=np.int8)
        if chain % 2 == 0:
            self._fill(state, lambda r0, r1: self.raw.start(self.rows.rows(r0, r1)))
            return state
        Z, _, W = self.grid.shape
        self._fill(state, lambda r0, r1: np.ones((Z, r1 - r0, W), np.int8))
        key = int(kernels.stream_key(seed, chain, START_SWEEP))
        self.sweep(state, math.inf, key)  # T = inf: every spin +1 or -1 with probability 1/2
        return state

    def sweep(self, state, temperature, key):
        k = np.uint64(key)
        beta, beta_z, t = self.coupling, self.coupling_z, float(temperature)

        def update(block, h, width, geometry):
            kernels.gibbs_sweep(block, h, width, beta, beta_z, t, k, *geometry, False)

        self._pass(state, update)

    def energy(self, state):
        if self._last is not None and self._last[0] is state:
            return self._last[1]
        _, H, W = self.grid.shape
        e = 0.0
        for b, (b0, b1) in enumerate(self.bands):
            e0, _ = self._extended(b)
            f = self._band_field(b)
            h = np.ascontiguousarray(f[:, :, b0 - e0:b0 - e0 + (b1 - b0) + 2, :])
            p = np.ascontiguousarray(state[:, :, b0:b1 + 2, :])
            e += float(kernels.ising_energy(p, h, W, self.coupling, self.coupling_z, b0 & 1))
            self._forget_fields(b + 1)
        return e

    def quench(self, state, max_passes=1000):
        beta, beta_z = self.coupling, self.coupling_z

        def update(block, h, width, geometry):
            kernels.icm_sweep(block, h, width, beta, beta_z, geometry[0], False)

        for k in range(1, max_passes + 1):
            if self._pass(state, update)[1] == 0:
                return k
        return max_passes

    def summary(self, state):
        return kernels.spin_sum(state, self.grid.shape[2], 0) / self.grid.size

    def tally(self):
        return SharedSpinTally(self._tally_store)

    def image_rows(self, state, r0, r1):
        """Spins of rows ``[r0, r1)``, int8 ``(Z, r1 - r0, W)``."""
        Z, _, W = self.grid.shape
        band = Grid((Z, r1 - r0, W), origin=(0, r0, 0), full_shape=self.grid.shape)
        return band.unpack(np.ascontiguousarray(state[:, :, r0:r1 + 2, :]), np.int8)

    def image(self, state):
        return self.grid.unpack(state, np.int8)

    def describe(self):
        return {"coupling": self.coupling, "coupling_z": self.coupling_z, "boundary": "free",
                "tile": list(self.tile)}


# ---------------------------------------------------------------------------
# the cleaner
# ---------------------------------------------------------------------------
def _fit_window(rows: VolumeRows, window):
    Z, H, W = rows.shape
    side = int(min(window, math.isqrt(max(FIT_MAX_PIXELS // Z, 1))))
    h, w = min(H, side), min(W, side)
    i0, j0 = (H - h) // 2, (W - w) // 2
    return (i0, i0 + h, j0, j0 + w)


def clean_binary_tiled(image, *, tile=DEFAULT_TILE, method="mpm", noise="auto", coupling="auto",
                       coupling_z="auto", flip_rate="auto", levels="auto", schedule=None,
                       sweeps=None, burn_in=None, samples=None, chains=None,
                       uncertainty=False, voxel_size=None, fit_window=DEFAULT_FIT_WINDOW,
                       field_cache_bytes=DEFAULT_FIELD_CACHE_BYTES, out=None, maps=None,
                       rng=None, progress=False) -> CleanResult:
    """Clean a bi-level image or stack tile by tile, with bounded memory.

    With the same parameters and ``rng`` the result is bit-identical to
    :func:`mrfclean.binary.clean_binary` on the whole image (free boundary).
    Parameters left ``"auto"`` are estimated on a central window of
    ``fit_window`` pixels a side (all planes), then held fixed.

    Parameters
    ----------
    image : array-like, shape (H, W) or (Z, H, W)
        Any array with ``shape``, ``dtype`` and slicing: an ndarray, a
        memmap, or a :class:`mrfclean.io.TiffRegions`.  Not modified.
    tile : int or (int, int)
        Tile side(s) in pixels.
    method, noise, coupling, flip_rate, levels, schedule, sweeps, burn_in, samples, chains, uncertainty
        As for :func:`mrfclean.binary.clean_binary`.
    coupling_z : float, "auto" or "fit"
        See :mod:`mrfclean.stacks` for the default rule.
    voxel_size : (dz, dy, dx), optional
    fit_window : int
    field_cache_bytes : int
        Keep all local fields in memory when they fit in this many bytes.
    out : array-like, optional
        Where the estimate goes, written one band of rows at a time (for
        example a :class:`mrfclean.io.TiffBandWriter`); default a new array.
    maps : dict, optional
        ``{"p_on": target, "std": target}`` for the posterior maps (written
        band by band); default: new arrays when the posterior is sampled.
    rng : int or numpy.random.Generator, optional
    progress : bool

    Returns
    -------
    CleanResult
        ``estimate`` is ``out`` (or the new array), ``mean``/``std`` the map
        targets; ``params["tile"]``, ``params["fit_window"]`` record the tiling.

    Examples
    --------
    >>> import numpy as np
    >>> img = np.zeros((40, 40), np.uint8); img[10:30, 10:30] = 255
    >>> noisy = img.copy(); noisy[5, 5] = 255; noisy[20, 20] = 0
    >>> out = clean_binary_tiled(noisy, tile=16, coupling=0.8, flip_rate=0.05, rng=1)
    >>> bool((out.estimate == img).all())
    True
    """
    from .binary import (DEFAULT_ANNEAL_SWEEPS, DEFAULT_BURN_IN, DEFAULT_CHAINS,
                         DEFAULT_SAMPLES, METHODS, NOISES)
    from .fit.binary import fit_binary
    from .schedules import Geometric
    from .stacks import z_coupling_ratio

    if method not in METHODS:
        raise ValueError(f"method must be one of {METHODS}, got {method!r}")
    if noise not in NOISES:
        raise ValueError(f"noise must be one of {NOISES}, got {noise!r}")
    if isinstance(coupling_z, str) and coupling_z not in ("auto", "fit"):
        raise ValueError(f"coupling_z must be a number, 'auto' or 'fit', got {coupling_z!r}")
    t_start = time.perf_counter()
    chains = DEFAULT_CHAINS if chains is None else int(chains)
    rows = image if isinstance(image, VolumeRows) else VolumeRows(image)
    lv.check_dtype(rows.dtype)
    Z, H, W = rows.shape
    found = scan_levels(rows)
    noise = ("flip" if found is not None else "gaussian") if noise == "auto" else noise
    seed = to_seed(rng)
    if noise == "flip":
        if found is None:
            raise ValueError("flip noise needs a bi-level image; this one has more than two levels")
        low, high = found[0], found[-1]
    else:
        low, high = lv.mask_levels(rows.dtype)
    i0, i1, j0, j1 = _fit_window(rows, fit_window)
    window = RawField(None, noise, high, rows.dtype).observed(rows.window(i0, i1, j0, j1))
    ratio = z_coupling_ratio(voxel_size) if Z > 1 else None
    fix_z = None if isinstance(coupling_z, str) else float(coupling_z)
    if fix_z is None and coupling_z == "auto" and coupling != "auto" and Z > 1:
        fix_z = float(coupling) * (ratio if ratio is not None else 1.0)
    fit = fit_binary(window, noise=noise, coupling=coupling,
                     coupling_z="auto" if fix_z is None else fix_z, flip_rate=flip_rate,
                     levels=levels, boundary="free", seed=seed ^ FIT_SALT)
    beta, beta_z = fit.coupling, fit.coupling_z
    if Z == 1:
        rule = "single plane"
    elif not isinstance(coupling_z, str):
        rule = "given"
    elif coupling_z == "fit" or (ratio is None and coupling == "auto"):
        rule = "estimated jointly by pseudo-likelihood"
    elif ratio is None:
        rule = "equal to coupling (voxel size unknown)"
    else:
        beta_z = beta * ratio
        rule = f"coupling * d_xy / d_z = coupling * {ratio:.6g} (voxel size {tuple(voxel_size)})"
    raw = RawField(fit.noise, noise, high, rows.dtype)
    model = TiledBinaryModel(rows, raw, coupling=beta, coupling_z=beta_z, tile=tile,
                             field_cache_bytes=field_cache_bytes)
    diag = Diagnostics()
    params = {"method": method, "chains": chains, "boundary": "free", "seed": seed,
              "levels_out": [float(low), float(high)], **fit.describe(), "coupling_z": beta_z,
              "coupling_z_rule": rule,
              "estimated": [k for k, v in (("coupling", coupling), ("flip_rate", flip_rate),
                                           ("levels", levels)) if v == "auto"],
              "tile": list(model.tile), "fit_window": [i0, i1, j0, j1]}
    if params["estimated"]:
        diag.notes.append(f"parameters estimated on the window rows {i0}:{i1}, columns {j0}:{j1}")
    sampled = method == "mpm" or uncertainty
    total = samples_n = 0
    if sampled:
        burn_in = int(DEFAULT_BURN_IN if burn_in is None else burn_in)
        samples = int(samples or DEFAULT_SAMPLES)
        samples_n = samples * chains
        if samples_n > 65535:
            model._tally_store["dtype"] = np.uint32
    best = None
    if method == "map":
        schedule = schedule or Geometric(3.0, 0.05)
        sweeps = int(sweeps or DEFAULT_ANNEAL_SWEEPS)
        res = anneal(model, schedule=schedule, sweeps=sweeps, chains=chains, seed=seed,
                     progress=progress)
        best = res.state
        diag.final_energy = res.energy
        diag.quench_passes = int(res.run.quench_passes[res.chain])
        energy, temps = res.run.energies, res.run.temperatures
        params.update(schedule.describe(), sweeps=sweeps)
        del res
    post = None
    if sampled:
        post = sample_posterior(model, burn_in=burn_in, samples=samples, chains=chains,
                                seed=seed ^ POSTERIOR_SALT, progress=progress)
        record_posterior(diag, post)
        params.update(burn_in=burn_in, samples=samples)
        total = post.tally
        if method == "mpm":
            energy, temps = post.run.energies, post.run.temperatures
    shape_out = rows.shape[1:] if rows.flat else rows.shape
    if out is None:
        out = np.empty(shape_out, dtype=rows.dtype)
    if sampled and maps is None:
        maps = {"p_on": np.empty(shape_out, np.float32), "std": np.empty(shape_out, np.float32)}
    maps = maps if sampled else {}
    mpm_energy, above = 0.0, None
    for b0, b1 in model.bands:
        if sampled:
            p = total.mean_rows(model.grid, b0, b1)
        if method == "map":
            spins = model.image_rows(best, b0, b1)
        else:
            spins = np.where(p > 0.5, np.int8(1), np.int8(-1))
        est = lv.levels_from_spins(spins, low, high, rows.dtype)
        _put(out, rows.flat, b0, b1, est)
        if sampled:
            if "p_on" in maps:
                _put(maps["p_on"], rows.flat, b0, b1, p)
            if "std" in maps:
                _put(maps["std"], rows.flat, b0, b1, bernoulli_std(p))
        if method == "mpm":
            e, above = _band_energy_of(model, spins, b0, b1, above)
            mpm_energy += e
    if method == "mpm":
        diag.final_energy = mpm_energy
    params["seconds"] = time.perf_counter() - t_start
    return CleanResult(estimate=out, mean=maps.get("p_on"), std=maps.get("std"), energy=energy,
                       temperatures=temps, params=params, diagnostics=diag, kind="binary",
                       method=method)


def _put(target, flat, r0, r1, values):
    if flat:
        target[r0:r1] = values[0]
    else:
        target[:, r0:r1] = values


def _band_energy_of(model, spins, b0, b1, above):
    """Energy terms of rows ``[b0, b1)`` given as image-layout spins: pairs inside the band,
    pairs with the row ``above`` (the last row of the band before), and the fields.

    Over all bands every pair is counted once.  Returns the energy and this
    band's last row (for the next band).
    """
    s = spins.astype(np.float64)
    h = model.raw.field(model.rows.rows(b0, b1)).astype(np.float64)
    pair = np.sum(s[:, 1:, :] * s[:, :-1, :]) + np.sum(s[:, :, 1:] * s[:, :, :-1])
    if above is not None:
        pair += np.sum(above * s[:, 0, :])
    zpair = np.sum(s[1:] * s[:-1])
    e = -model.coupling * pair - model.coupling_z * zpair - np.sum(h * s)
    return float(e), s[:, -1, :].copy()


#: Overlap (pixels) read around each greyscale tile.  The posterior of a
#: pixel depends on the far image only through chains of neighbours whose
#: influence the data term damps within a few pixels; at 24 pixels the tiled
#: posterior mean differed from the whole-image one by less than the
#: Monte-Carlo difference between two whole-image runs (measured and tested
#: in tests/test_tiles.py, seams included).
DEFAULT_GREY_HALO = 24


@dataclass
class GreyTile:
    """One greyscale tile as a task: its pixels with their margin, and all it needs to be sampled."""

    raw: np.ndarray  # (Z, h, w) in the input's dtype
    keep: tuple  # (r0, r1, c0, c1) of the tile inside ``raw``
    setup: object  # mrfclean.grey.GreySetup
    options: dict  # method, schedule, sweeps, burn_in, samples, chains
    seed: int
    label: str


def sample_grey_tile(task: GreyTile):
    """Sample one tile (runs in this process or in a worker); the tile's part of the result.

    Returns ``(estimate_u, mean_u, std_u, energy, temperatures, diagnostics, params)``
    with the three images cut to the tile (margin dropped), in the prior's units.
    """
    from .grey import sample_block

    y = lv.to_work(task.raw).astype(np.float64)
    blk = sample_block(y, task.setup, seed=task.seed, **task.options)
    r0, r1, c0, c1 = task.keep
    cut = (slice(None), slice(r0, r1), slice(c0, c1))
    return (blk.est_u[cut].copy(), blk.mean_u[cut].copy(), blk.std_u[cut].copy(), blk.energy,
            blk.temperatures, blk.diagnostics, blk.params)


def clean_grey_tiled(image, *, tile=DEFAULT_TILE, halo=DEFAULT_GREY_HALO, method="mean",
                     noise="auto", sigma="auto", gain="auto", read_variance="auto",
                     strength="auto", curvature="auto", prior=None, schedule=None, sweeps=None,
                     burn_in=None, samples=None, chains=None, fit_window=DEFAULT_FIT_WINDOW, out=None,
                     maps=None, executor=None, rng=None, progress=False) -> CleanResult:
    """Clean a greyscale image or stack tile by tile, with memory bounded by a band of tiles.

    Unknown parameters (noise model, intensity frame, prior strength and curvature by SURE)
    are estimated once on a central window of ``fit_window`` pixels a side and
    then held fixed, so every tile has the same posterior model.  Each tile is
    sampled together with a margin of ``halo`` pixels of the image around it
    (free boundary at the margin's edge) and only its own pixels are kept.
    Unlike the binary tiles this is not bit-identical to an untiled run: the
    conditional-mean solve is global.  The margin makes the difference smaller
    than the Monte-Carlo error of the posterior mean (see
    :data:`DEFAULT_GREY_HALO`).  Each tile has its own random streams, drawn
    from ``rng`` and the tile's position, so the result does not depend on the
    order in which tiles are done.

    Parameters
    ----------
    image : array-like, shape (H, W) or (Z, H, W)
        An ndarray, memmap or :class:`mrfclean.io.TiffRegions`.  Not modified.
    tile : int
        Tile side in pixels (tiles span every plane of a stack).
    halo : int
        Margin read around each tile.
    method, noise, sigma, gain, read_variance, strength, curvature, prior, schedule, sweeps, burn_in, samples, chains
        As for :func:`mrfclean.grey.clean_grey`.
    fit_window : int
        Side of the central window on which parameters left ``"auto"`` are estimated.
    out : array-like, optional
        Where the estimate goes, one band of rows at a time; default a new array.
    maps : dict, optional
        ``{"std": target}`` (and optionally ``"mean"``) written band by band;
        default: new float32 arrays.
    executor : optional
        Where the tiles of a band run (:mod:`mrfclean.pool`: a local pool, or
        :class:`mrfclean.cluster.DaskExecutor`); default here, one after
        another.  The result is the same bit for bit wherever they run.
    rng : int or numpy.random.Generator, optional
    progress : bool
        One bar over the tiles.

    Returns
    -------
    CleanResult
        ``energy`` is the sum over tiles of each tile's energy trace (margins
        included; a trend, not the energy of the image), and
        ``diagnostics.final_energy`` is NaN for the same reason; ``params``
        records ``tile``, ``halo``, ``tiles`` and ``fit_window`` (the central
        window ``[i0, i1, j0, j1]`` the parameters were estimated on).

    Examples
    --------
    >>> import numpy as np
    >>> clean = np.zeros((64, 64)); clean[:, 32:] = 100.0
    >>> noisy = (clean + np.random.default_rng(0).normal(0, 10, clean.shape)).astype(np.float32)
    >>> res = clean_grey_tiled(noisy, tile=32, chains=1, rng=1)
    >>> bool(np.abs(res.estimate - clean).mean() < np.abs(noisy - clean).mean() / 2)
    True
    """
    from .grey import DEFAULT_LEVEL, DEFAULT_TOL, check_options, check_prior, grey_setup
    from .progress import progress_bar

    if int(tile) < MIN_TILE:
        raise ValueError(f"tile must be a whole number of at least {MIN_TILE} pixels, got {tile!r}")
    if maps is not None and not set(maps) <= {"std", "mean"}:
        raise ValueError(f"maps may hold 'std' and 'mean' only, got {sorted(maps)}")
    if int(halo) < 0:
        raise ValueError(f"halo must be a whole number of at least 0, got {halo!r}")
    halo = int(halo)
    chains = None if chains is None else int(chains)  # None: the greyscale defaults
    t_start = time.perf_counter()
    rows = image if isinstance(image, VolumeRows) else VolumeRows(image)
    dtype = lv.check_dtype(rows.dtype)
    Z, H, W = rows.shape
    check_options(rows.shape, method=method, chains=chains)
    check_prior(prior)
    scan_levels(rows)  # NaN / infinity check, band by band
    seed = to_seed(rng)
    fw = _fit_window(rows, fit_window)
    y_fit = lv.to_work(rows.window(*fw)).astype(np.float64)
    setup = grey_setup(y_fit, noise=noise, sigma=sigma, gain=gain, read_variance=read_variance,
                       strength=strength, curvature=curvature, prior=prior, seed=seed,
                       tol=DEFAULT_TOL)
    del y_fit
    shape = (H, W) if rows.flat else (Z, H, W)
    est = out if out is not None else np.empty(shape, dtype)
    maps = dict(maps) if maps is not None else {"std": np.empty(shape, np.float32),
                                                 "mean": np.empty(shape, np.float32)}
    bands = band_bounds(H, tile)
    cols = column_bounds(W, tile)
    parts, labels = [], []
    energy = temps = None
    first = None
    iterations = []
    options = dict(method=method, schedule=schedule, sweeps=sweeps, burn_in=burn_in,
                   samples=samples, chains=chains)
    executor = executor or InProcess()
    with progress_bar(total=len(bands) * len(cols), enabled=progress, desc="tiles") as bar:
        for r0, r1 in bands:
            band = {"est": np.empty((Z, r1 - r0, W), dtype)}
            band.update({k: np.empty((Z, r1 - r0, W), np.float32) for k in maps})
            e0, e1 = max(0, r0 - halo), min(H, r1 + halo)
            tasks = []
            for c0, c1 in cols:
                f0, f1 = max(0, c0 - halo), min(W, c1 + halo)
                tasks.append(GreyTile(rows.window(e0, e1, f0, f1),
                                      (r0 - e0, r1 - e0, c0 - f0, c1 - f0), setup, options,
                                      to_seed(np.random.default_rng([seed, r0, c0])),
                                      f"tile at row {r0}, column {c0}"))
            done = {}
            for k, value in executor.run(sample_grey_tile, tasks):
                if isinstance(value, BaseException):
                    raise value  # as it was raised: an input error, out of memory, a lost worker
                done[k] = value
                bar.update()
            for k, (c0, c1) in enumerate(cols):  # in column order: sums do not depend on timing
                est_u, mean_u, std_u, e, t, d, prm = done[k]
                band["est"][:, :, c0:c1] = lv.from_work(setup.low + setup.span * est_u, dtype)
                if "std" in band:
                    band["std"][:, :, c0:c1] = setup.span * std_u
                if "mean" in band:
                    band["mean"][:, :, c0:c1] = setup.low + setup.span * mean_u
                parts.append(d)
                labels.append(tasks[k].label)
                energy = e.copy() if energy is None else energy + e
                temps = t if temps is None else temps
                first = first or prm
                iterations.append(prm["cg_iterations_per_solve"])
            _put(est, rows.flat, r0, r1, band["est"])
            for k, target in maps.items():
                _put(target, rows.flat, r0, r1, band[k])
    diag = combine_diagnostics(parts, labels)
    diag.final_energy = float("nan")  # tiles overlap: their energies do not add up to the image's
    params = {"method": method, "seed": seed, **setup.describe(), **first,  # first: chains run
              "cg_iterations_per_solve": round(float(np.mean(iterations)), 2),
              "tile": [int(tile), int(tile)], "halo": halo, "tiles": len(bands) * len(cols),
              "fit_window": list(fw), "level": DEFAULT_LEVEL, "seconds": time.perf_counter() - t_start}
    return CleanResult(estimate=est, mean=maps.get("mean"), std=maps.get("std"), energy=energy,
                       temperatures=temps, params=params, diagnostics=diag, kind="grey",
                       method=method)


def clean_tiled(image, *, settings, voxel_size=None, rng=None, progress=False, out=None,
                maps=None, executor=None) -> CleanResult:
    """:func:`clean_binary_tiled` or :func:`clean_grey_tiled` driven by a :class:`mrfclean.clean.Settings`."""
    from .schedules import make_schedule

    s = settings
    if s.kind == "grey":
        return clean_grey_tiled(
            image, tile=s.tile, method="mean" if s.method in ("auto", "mpm") else s.method,
            noise=s.noise, sigma=s.sigma, gain=s.gain, read_variance=s.read_variance,
            strength=s.strength, curvature=s.curvature, prior=s.prior,
            schedule=make_schedule(s.schedule, start=s.t_start, end=s.t_end),
            sweeps=s.sweeps, burn_in=s.burn_in, samples=s.samples, chains=s.chains, out=out,
            maps=maps, executor=executor, rng=rng, progress=progress)
    if s.boundary != "free":
        raise ValueError("tiled cleaning needs a free boundary")
    if s.certify:
        raise ValueError("the exact-MAP certificate needs the whole image; run without tiles")
    method = "mpm" if s.method in ("auto", "mean") else s.method
    return clean_binary_tiled(
        image, tile=s.tile, method=method,
        noise=s.noise if s.noise in ("auto", "flip", "gaussian") else "auto",
        coupling=s.coupling, coupling_z=s.coupling_z, flip_rate=s.flip_rate, levels=s.levels,
        schedule=make_schedule(s.schedule, start=s.t_start, end=s.t_end), sweeps=s.sweeps,
        burn_in=s.burn_in, samples=s.samples, chains=s.chains, uncertainty=s.uncertainty,
        voxel_size=voxel_size, out=out, maps=maps, rng=rng, progress=progress)


class _Plane:
    """Plane ``z`` of a 3-D array-like, read or written lazily."""

    def __init__(self, source, z):
        self.source, self.z = source, z
        self.shape = tuple(source.shape[1:])
        self.dtype = source.dtype

    def __getitem__(self, index):
        index = index if isinstance(index, tuple) else (index,)
        return np.asarray(self.source[(slice(self.z, self.z + 1), *index)])[0]

    def __setitem__(self, index, values):
        index = index if isinstance(index, tuple) else (index,)
        self.source[(slice(self.z, self.z + 1), *index)] = np.asarray(values)[None]


def clean_file_tiled(path, outdir, *, settings, rng=None, maps=None, colour=None,
                     overwrite=False, max_pixels=None, progress=False, output=None,
                     tile_executor=None):
    """:func:`mrfclean.clean.clean_file` for ``settings.tile``: bounded memory from file to file.

    An uncompressed TIFF is read one band of rows at a time and the result
    (and the P(on)/std maps) are written the same way into uncompressed TIFFs
    with the input's metadata; other inputs are read whole (the cleaning is
    still tiled).  Binary and greyscale images (see :func:`clean_grey_tiled`).

    Raises
    ------
    InputError
        Anything wrong with the input, its kind, or where its outputs would go.
    """
    import contextlib
    from pathlib import Path

    from . import io
    from .clean import FileOutcome, check_targets, output_paths
    from .stacks import combine_planes

    t0 = time.perf_counter()
    loaded = io.open_image(path, colour=colour,
                           max_pixels=io.DEFAULT_MAX_PIXELS if max_pixels is None else max_pixels)
    src = loaded.array
    rows = VolumeRows(src)
    try:
        found = scan_levels(rows)
    except ValueError as exc:
        raise io.InputError(path, str(exc)) from None
    kind = settings.kind if settings.kind != "auto" else ("binary" if found is not None else "grey")
    out, map_paths = output_paths(path, outdir, kind=kind)
    if output is not None:
        out = Path(output)
    check_targets(path, (out, *map_paths.values()), overwrite=overwrite)
    want_maps = (kind == "grey") if maps is None else bool(maps)
    s = settings.replace(kind=kind, uncertainty=settings.uncertainty or want_maps)
    if str(loaded.metadata.get("axes", ""))[:1] == "C" and len(src.shape) == 3:
        s = s.replace(stack="planes")  # channels are not neighbours in space: never couple them
    voxel = io.voxel_size(loaded.metadata)
    shape = tuple(src.shape)
    written = {}
    try:
        with contextlib.ExitStack() as stack:
            if loaded.format == "tiff":
                est = stack.enter_context(io.tiff_band_writer(
                    out, shape, src.dtype, metadata=loaded.metadata, overwrite=overwrite))
            else:
                est = np.empty(shape, src.dtype)
            targets = {}
            if want_maps:
                for name, target in map_paths.items():
                    targets[name] = stack.enter_context(io.tiff_band_writer(
                        target, shape, np.float32, overwrite=overwrite))
                    written[name] = target
            planes = len(shape) == 3 and shape[0] > 1 and s.stack == "planes"
            if planes:
                gen = np.random.default_rng(rng)
                results = [clean_tiled(_Plane(src, z), settings=s, rng=gen, progress=progress,
                                       out=_Plane(est, z),
                                       maps={k: _Plane(v, z) for k, v in targets.items()},
                                       executor=tile_executor)
                           for z in range(shape[0])]
                result = combine_planes(results, est, targets.get("p_on"), targets.get("std"))
            else:
                result = clean_tiled(src, settings=s, voxel_size=voxel, rng=rng, progress=progress,
                                     out=est, maps=targets, executor=tile_executor)
            if loaded.format != "tiff":
                io.write_image(out, est, fmt=loaded.format, metadata=loaded.metadata,
                               overwrite=overwrite)
    except ValueError as exc:
        raise io.InputError(path, str(exc)) from None
    return FileOutcome(Path(path), out, written, result, time.perf_counter() - t0)
