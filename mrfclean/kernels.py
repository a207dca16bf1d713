"""Numba kernels: every hot loop of mrfclean lives here.

The functions in this module are compiled with numba and take plain arrays and
scalars.  They do no input checking; the wrappers in :mod:`mrfclean.lattice`,
:mod:`mrfclean.models` and :mod:`mrfclean.sampler` check shapes and dtypes and
convert before calling them.

Random numbers
--------------
Kernels never touch a global random state.  A uniform variate for a site is a
hash of ``(seed, chain, sweep, global site index)``: the SplitMix64 finaliser
applied to a Weyl sequence whose start is a per-sweep stream key (Steele, Lea &
Flood 2014).  The result of a sweep therefore depends only on the seed and the
site's global coordinates, never on the number of threads or on how the image
is cut into tiles.

Lattice layout
--------------
Spins (int8, +1/-1) and their fields (float32) are kept in a *packed
red-black* layout: ``P[c, z, i, t]`` holds the sites of colour ``c`` of plane
``z`` and row ``i`` side by side, with one halo row above and below and one
halo column left and right.  The colour of local site ``(z, i, j)`` is
``(z + i + j + q) & 1`` where ``q`` is the parity of the tile origin, so that
colours agree with the whole image.  For a row ``i`` of colour ``c`` the first
site is at column ``p = (c - z - i - q) & 1`` and packed column ``t`` (1-based)
holds image column ``j = 2 (t - 1) + p``; its in-plane neighbours are at packed
columns ``t - 1 + p`` and ``t + p`` of the same row and ``t`` of the rows above
and below, in the array of the other colour.  Its z neighbours sit at the same
``(i, t)`` of the other colour in planes ``z - 1`` and ``z + 1``.  All four
in-plane reads are contiguous, which lets the compiler vectorise the update.

A free boundary keeps zeros in the halo; a periodic boundary copies the
opposite edge into it after every half-sweep (even height and width only).

References
----------
.. [1] G. L. Steele, D. Lea and C. H. Flood, "Fast splittable pseudorandom
   number generators", OOPSLA 2014.
.. [2] S. Geman and D. Geman, "Stochastic relaxation, Gibbs distributions, and
   the Bayesian restoration of images", IEEE TPAMI 6 (1984) 721-741.
"""

from __future__ import annotations

import math

import numpy as np
from numba import float64, int64, njit, prange, uint64

# ---------------------------------------------------------------------------
# counter-based random numbers
# ---------------------------------------------------------------------------
_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)
_GAMMA = np.uint64(0x9E3779B97F4A7C15)
_S11 = np.uint64(11)
_S27 = np.uint64(27)
_S30 = np.uint64(30)
_S31 = np.uint64(31)
_S32 = np.uint64(32)
_TWO53_INV = 1.0 / 9007199254740992.0


@njit(inline="always", cache=True)
def mix64(z):
    """SplitMix64 finaliser: a bijective 64-bit mixing function."""
    z = (z ^ (z >> _S30)) * _M1
    z = (z ^ (z >> _S27)) * _M2
    return z ^ (z >> _S31)


@njit(cache=True)
def stream_key(seed, chain, sweep):
    """Key of the random stream used by ``chain`` at ``sweep``."""
    lo = (uint64(chain) << _S32) ^ uint64(sweep)
    return mix64(mix64(uint64(seed)) ^ mix64(lo + _GAMMA))


@njit(inline="always", cache=True)
def uniform(key, counter):
    """Uniform variate in [0, 1) with 53 random bits for ``counter`` of stream ``key``."""
    w = mix64(key + uint64(counter) * _GAMMA)
    return float64(w >> _S11) * _TWO53_INV


# ---------------------------------------------------------------------------
# exact heat-bath decision without a call to libm
# ---------------------------------------------------------------------------
_LOG2E = 1.4426950408889634
_LN2HI = 6.93147180369123816490e-01
_LN2LO = 1.90821492927058770002e-10


@njit(inline="always", cache=True)
def _exp_taylor(r):
    """``exp(r)`` for ``|r| <= ln2 / 2`` by its degree-13 Taylor polynomial (Horner form;
    the first omitted term is below 1e-16 relative there)."""
    p = 1.0 / 6227020800.0
    p = p * r + 1.0 / 479001600.0
    p = p * r + 1.0 / 39916800.0
    p = p * r + 1.0 / 3628800.0
    p = p * r + 1.0 / 362880.0
    p = p * r + 1.0 / 40320.0
    p = p * r + 1.0 / 5040.0
    p = p * r + 1.0 / 720.0
    p = p * r + 1.0 / 120.0
    p = p * r + 1.0 / 24.0
    p = p * r + 1.0 / 6.0
    p = p * r + 0.5
    p = p * r + 1.0
    return p * r + 1.0


#: ``exp(-y)`` for ``y`` above this is below the smallest normal double (2^-1022); the
#: row exponential returns 0 there.
_EXP_MAX_DECAY = 708.0


@njit(inline="always", cache=True)
def _exp_decay_row(g, d2, out, bits):
    """``out[t] = exp(g d2[t])`` for ``g d2[t] <= 0``, in two passes that vectorise.

    The Cody-Waite reduction ``y = m ln2 - r`` and :func:`_exp_taylor` give
    ``exp(-y) = exp(r) 2^-m``; the factor ``2^-m`` is built as the bits of a
    double in ``bits`` (an int64 row, any contents) and applied in a second
    pass.  Arguments below ``-708`` give 0 instead of a subnormal number.  A
    libm ``exp`` per clique does not vectorise (4.7 against 1.8 ns per value in
    rows of 512, measured).
    """
    n = d2.shape[0]
    for t in range(n):
        y = -g * d2[t]
        yc = min(y, _EXP_MAX_DECAY)
        m = np.floor(yc * _LOG2E + 0.5)
        r = (m * _LN2HI - yc) + m * _LN2LO
        out[t] = _exp_taylor(r) if y <= _EXP_MAX_DECAY else 0.0
        bits[t] = (int64(1023) - int64(m)) << 52
    scale = bits.view(np.float64)
    for t in range(n):
        out[t] *= scale[t]


@njit(cache=True)
def exp_decay_many(g, d2):
    """``exp(g d2)`` by :func:`_exp_decay_row`, for tests."""
    out = np.empty(d2.shape[0])
    _exp_decay_row(g, d2, out, np.empty(d2.shape[0], np.int64))
    return out


@njit(inline="always", cache=True)
def heat_bath_up(x, u):
    """Return ``u < 1 / (1 + exp(-x))`` for a uniform ``u`` in [0, 1).

    ``exp(-|x|) = 2**-m * exp(r)`` is evaluated with a Cody-Waite reduction and a
    degree-13 Taylor polynomial (relative error below 1e-16 on |r| <= ln2/2),
    and the comparison is rearranged so that no division is needed.  |x| is
    clamped at 40: for a 53-bit ``u`` the decision there is the same as for the
    exact logistic function (exp(-40) < 2**-53), so the clamp changes nothing.
    Written this way the update vectorises; a libm ``exp`` per site cost more
    than the rest of the sweep together when measured.
    """
    y = min(abs(x), 40.0)
    m = np.floor(y * _LOG2E + 0.5)
    r = (m * _LN2HI - y) + m * _LN2LO
    p = _exp_taylor(r)  # exp(-y) = p / 2**m
    two_m = float64(uint64(1) << uint64(int64(m)))
    v = 1.0 - u
    if x >= 0.0:
        return u * p < v * two_m  # u < 1/(1+e^-y)  <=>  u e^-y < 1-u
    return u * two_m < v * p  # u < e^-y/(1+e^-y)  <=>  u < (1-u) e^-y


@njit(cache=True)
def heat_bath_many(x, u):
    """Vector form of :func:`heat_bath_up`, for tests."""
    out = np.empty(x.size, np.bool_)
    for k in range(x.size):
        out[k] = heat_bath_up(x[k], u[k])
    return out


# ---------------------------------------------------------------------------
# packing between image layout and the packed red-black layout
# ---------------------------------------------------------------------------
@njit(cache=True)
def pack(a, out, q):
    """Copy ``a[z, i, j]`` into the interior of packed array ``out``."""
    Z, H, W = a.shape
    for z in range(Z):
        for i in range(H):
            for c in range(2):
                p = (c - z - i - q) & 1
                t = 1
                for j in range(p, W, 2):
                    out[c, z, i + 1, t] = a[z, i, j]
                    t += 1


@njit(cache=True)
def unpack(P, out, q):
    """Inverse of :func:`pack`: fill ``out[z, i, j]`` from packed ``P``."""
    Z, H, W = out.shape
    for z in range(Z):
        for i in range(H):
            for c in range(2):
                p = (c - z - i - q) & 1
                t = 1
                for j in range(p, W, 2):
                    out[z, i, j] = P[c, z, i + 1, t]
                    t += 1


@njit(cache=True)
def refresh_halo(A, H, Wh):
    """Periodic boundary: copy opposite edges of one colour array into its halo."""
    Z = A.shape[0]
    for z in range(Z):
        for t in range(Wh + 2):
            A[z, 0, t] = A[z, H, t]
            A[z, H + 1, t] = A[z, 1, t]
        for i in range(H + 2):
            A[z, i, 0] = A[z, i, Wh]
            A[z, i, Wh + 1] = A[z, i, 1]


# ---------------------------------------------------------------------------
# Ising sweeps on the packed layout
# ---------------------------------------------------------------------------
@njit(inline="always", cache=True)
def _row_geometry(c, r, H, W, q):
    z = r // H
    i = r - z * H
    p = (c - z - i - q) & 1
    nh = (W - p + 1) // 2
    return z, i + 1, p, nh


@njit(parallel=True, cache=True)
def gibbs_sweep(P, h, W, beta, beta_z, temperature, key, q, z0, i0, j0, GH, GW, periodic):
    """One heat-bath sweep (colour 0, then colour 1) of the Ising posterior.

    ``P(s_i = +1 | rest) = 1 / (1 + exp(-2 F_i / T))`` with
    ``F_i = beta * (in-plane neighbour sum) + beta_z * (z neighbour sum) + h_i``.
    ``(z0, i0, j0)`` is the origin of this lattice inside an image of global
    height ``GH`` and width ``GW``; it fixes the colour parity ``q`` and the
    random stream of every site.
    """
    _, Z, Hp, Whp = P.shape
    H = Hp - 2
    scale = 2.0 / temperature
    for c in range(2):
        A = P[c]
        B = P[1 - c]
        hc = h[c]
        for r in prange(Z * H):
            z, i, p, nh = _row_geometry(c, r, H, W, q)
            row = A[z, i]
            mid = B[z, i]
            up = B[z, i - 1]
            dn = B[z, i + 1]
            hr = hc[z, i]
            base = ((z + z0) * GH + (i - 1 + i0)) * GW + j0 + p
            if Z > 1:
                zlo = B[max(z - 1, 0), i]
                zhi = B[min(z + 1, Z - 1), i]
                wlo = beta_z if z > 0 else 0.0
                whi = beta_z if z < Z - 1 else 0.0
                for t in range(1, nh + 1):
                    n = mid[t - 1 + p] + mid[t + p] + up[t] + dn[t]
                    f = beta * n + wlo * zlo[t] + whi * zhi[t] + hr[t]
                    u = uniform(key, base + 2 * (t - 1))
                    row[t] = 1 if heat_bath_up(scale * f, u) else -1
            else:
                for t in range(1, nh + 1):
                    n = mid[t - 1 + p] + mid[t + p] + up[t] + dn[t]
                    f = beta * n + hr[t]
                    u = uniform(key, base + 2 * (t - 1))
                    row[t] = 1 if heat_bath_up(scale * f, u) else -1
        if periodic:
            refresh_halo(A, H, Whp - 2)


@njit(parallel=True, cache=True)
def icm_sweep(P, h, W, beta, beta_z, q, periodic):
    """One zero-temperature sweep: ``s_i = sign(F_i)``, unchanged where ``F_i = 0``.

    Returns the number of sites that changed (Besag 1986, iterated conditional
    modes, here in checkerboard order).
    """
    _, Z, Hp, Whp = P.shape
    H = Hp - 2
    changed = 0
    for c in range(2):
        A = P[c]
        B = P[1 - c]
        hc = h[c]
        for r in prange(Z * H):
            z, i, p, nh = _row_geometry(c, r, H, W, q)
            row = A[z, i]
            mid = B[z, i]
            up = B[z, i - 1]
            dn = B[z, i + 1]
            hr = hc[z, i]
            zlo = B[max(z - 1, 0), i]
            zhi = B[min(z + 1, Z - 1), i]
            wlo = beta_z if z > 0 else 0.0
            whi = beta_z if z < Z - 1 else 0.0
            k = 0
            for t in range(1, nh + 1):
                n = mid[t - 1 + p] + mid[t + p] + up[t] + dn[t]
                f = beta * n + wlo * zlo[t] + whi * zhi[t] + hr[t]
                old = row[t]
                new = old
                if f > 0.0:
                    new = 1
                elif f < 0.0:
                    new = -1
                k += old != new
                row[t] = new
            changed += k
        if periodic:
            refresh_halo(A, H, Whp - 2)
    return changed


@njit(cache=True, fastmath={"reassoc", "nsz", "contract"})
def _field_row(hrow, srow, n):
    """``sum_t h[t] s[t]`` over one packed row.  Reassociation lets the compiler
    vectorise the sum (3.5x faster when measured); the order is fixed by the code,
    so the value is the same for any number of threads."""
    acc = 0.0
    for t in range(1, n + 1):
        acc += float64(hrow[t]) * srow[t]
    return acc


@njit(parallel=True, cache=True)
def ising_energy(P, h, W, beta, beta_z, q):
    """Energy ``-beta sum s_i s_j - beta_z sum_z s_i s_j - sum h_i s_i``.

    Every neighbour pair has one site of each colour, so the pair sum runs over
    the colour-0 sites and their neighbours (halo included, which holds zeros
    for a free boundary and the wrapped edge for a periodic one).  Partial sums
    are kept per row and added in order, so the value does not depend on the
    number of threads.
    """
    _, Z, Hp, Whp = P.shape
    H = Hp - 2
    pair_rows = np.zeros(Z * H, np.int64)
    zpair_rows = np.zeros(Z * H, np.int64)
    field_rows = np.zeros(Z * H, np.float64)
    A = P[0]
    B = P[1]
    for r in prange(Z * H):
        z, i, p, nh = _row_geometry(0, r, H, W, q)
        row = A[z, i]
        mid = B[z, i]
        up = B[z, i - 1]
        dn = B[z, i + 1]
        pair = 0
        zpair = 0
        for t in range(1, nh + 1):
            pair += row[t] * (mid[t - 1 + p] + mid[t + p] + up[t] + dn[t])
        if z + 1 < Z:
            zhi = B[z + 1, i]
            for t in range(1, nh + 1):
                zpair += row[t] * zhi[t]
        if z > 0:
            zlo = B[z - 1, i]
            for t in range(1, nh + 1):
                zpair += row[t] * zlo[t]
        fs = 0.0
        for c in range(2):
            _, _, pc, nc = _row_geometry(c, r, H, W, q)
            fs += _field_row(h[c, z, i], P[c, z, i], nc)
        pair_rows[r] = pair
        zpair_rows[r] = zpair
        field_rows[r] = fs
    e = 0.0
    for r in range(Z * H):
        e -= beta * pair_rows[r] + beta_z * zpair_rows[r] + field_rows[r]
    return e


@njit(parallel=True, cache=True)
def count_on(P, counts, W, q):
    """Add 1 to ``counts`` (packed int32/int64 layout) wherever a spin is +1; return the spin sum."""
    _, Z, Hp, Whp = P.shape
    H = Hp - 2
    sums = np.zeros(Z * H, np.int64)
    for r in prange(Z * H):
        z = r // H
        i = r - z * H + 1
        acc = 0
        for c in range(2):
            _, _, pc, nc = _row_geometry(c, r, H, W, q)
            srow = P[c, z, i]
            crow = counts[c, z, i]
            for t in range(1, nc + 1):
                v = srow[t]
                crow[t] += v > 0
                acc += v
        sums[r] = acc
    return sums.sum()


@njit(parallel=True, cache=True)
def spin_sum(P, W, q):
    """Sum of the interior spins of a packed lattice."""
    _, Z, Hp, Whp = P.shape
    H = Hp - 2
    sums = np.zeros(Z * H, np.int64)
    for r in prange(Z * H):
        z = r // H
        i = r - z * H + 1
        acc = 0
        for c in range(2):
            _, _, pc, nc = _row_geometry(c, r, H, W, q)
            srow = P[c, z, i]
            for t in range(1, nc + 1):
                acc += srow[t]
        sums[r] = acc
    return sums.sum()



@njit(parallel=True, cache=True)
def coupling_counts(P, W, q, counts):
    """Add pseudo-likelihood statistics of a packed lattice to ``counts[9, 5]``.

    For every site, ``a = s_i * (in-plane neighbour sum) + 4`` and
    ``c = s_i * (z neighbour sum) + 2`` index ``counts[a, c]`` (halo included:
    zeros for a free boundary, the wrapped edge for a periodic one).
    """
    _, Z, Hp, Whp = P.shape
    H = Hp - 2
    part = np.zeros((Z * H, 9, 5), np.int64)
    for r in prange(Z * H):
        for c in range(2):
            z, i, p, nh = _row_geometry(c, r, H, W, q)
            B = P[1 - c]
            row = P[c, z, i]
            mid = B[z, i]
            up = B[z, i - 1]
            dn = B[z, i + 1]
            for t in range(1, nh + 1):
                s = row[t]
                n = mid[t - 1 + p] + mid[t + p] + up[t] + dn[t]
                m = 0
                if z > 0:
                    m += B[z - 1, i, t]
                if z < Z - 1:
                    m += B[z + 1, i, t]
                part[r, s * n + 4, s * m + 2] += 1
    for r in range(Z * H):
        counts += part[r]


@njit(parallel=True, cache=True)
def count_mismatch(P, T, W, q):
    """Number of interior sites where packed lattices ``P`` and ``T`` differ."""
    _, Z, Hp, Whp = P.shape
    H = Hp - 2
    part = np.zeros(Z * H, np.int64)
    for r in prange(Z * H):
        acc = 0
        for c in range(2):
            z, i, p, nh = _row_geometry(c, r, H, W, q)
            a = P[c, z, i]
            b = T[c, z, i]
            for t in range(1, nh + 1):
                acc += a[t] != b[t]
        part[r] = acc
    return part.sum()

# ===========================================================================
# greyscale: Gaussian-MRF operator and Gaussian-scale-mixture scale draws
# ===========================================================================
# Layout: images are C-contiguous ``(Z, H, W)`` arrays in image order.  A
# clique is a pair ``(p, p + o)`` for an offset ``o = (dz, di, dj)`` taken
# from one half of the neighbourhood (``offsets`` is an ``(n, 3)`` int64
# array); its weight lives at ``w[o, p]`` and is ignored when ``p + o`` falls
# outside the lattice (free boundary).  The difference of a clique is
# ``d = x[p + o] - x[p]``.  Every kernel works row by row (one row is a fixed
# ``(z, i)``) and writes only its own row, so rows run in parallel without
# races; reductions keep one partial sum per row and add them in order, so
# results do not depend on the number of threads.
#
# Random numbers: the categorical draw of clique ``(o, p)`` uses counter
# ``o * N + p`` of the sweep's key (``N = Z H W``); the perturbation normals use
# a second key derived from it, normal counter ``o * N + p`` for the clique
# normal (o = 0 .. n-1), ``n N + p`` for the data normal, and ``(n + 1) N + p``
# and ``(n + 2) N + p`` for the second-difference triples starting at ``p``
# along the row and down the column (see :func:`normal`).

_GREY_NOISE_SALT = np.uint64(0x6A09E667F3BCC909)
_GREY_START_SALT = np.uint64(0xBB67AE8584CAA73B)
_GREY_BLOCK_SALT = np.uint64(0xA54FF53A5F1D36F1)


@njit(cache=True)
def derive_key(key, salt):
    """A second independent stream key from ``key`` (for the Gaussian draws of a sweep)."""
    return mix64(uint64(key) ^ mix64(uint64(salt)))


def ziggurat_tables(layers=256):
    """Layer edges ``x[0..layers]`` and ratios ``x[i+1] / x[i]`` of the normal ziggurat.

    ``f(x) = exp(-x^2 / 2)``; layer ``i >= 1`` is the box ``[0, x[i]] x
    [f(x[i]), f(x[i+1])]``, the base layer is ``[0, r] x [0, f(r)]`` plus the
    tail beyond ``r = x[1]``, and all have the same area ``v``; ``x[0] = v / f(r)``
    and ``x[layers] = 0``.  ``r`` is found here by bisection so that the top
    layer closes at 0.

    Parameters
    ----------
    layers : int
        Number of layers (256 for :func:`normal`).

    Returns
    -------
    x : ndarray, shape (layers + 1,)
        Layer edges, decreasing from ``x[0]`` to 0.
    ratio : ndarray, shape (layers,)
        ``x[i + 1] / x[i]``: a uniform in layer ``i`` below it is accepted at once.

    References
    ----------
    .. [1] G. Marsaglia and W. W. Tsang, "The ziggurat method for generating
       random variables", J. Statistical Software 5(8), 2000.
    .. [2] J. A. Doornik, "An improved ziggurat method to generate normal
       random samples", University of Oxford, 2005.
    """
    def area(r):
        return r * math.exp(-0.5 * r * r) + math.sqrt(math.pi / 2) * math.erfc(r / math.sqrt(2))

    def top(r):
        """How far above f(0) = 1 the top layer ends (> 0: r too small)."""
        v = area(r)
        x = r
        for _ in range(layers - 2):
            a = math.exp(-0.5 * x * x) + v / x
            if a >= 1.0:
                return 1.0  # closed too early: r too small
            x = math.sqrt(-2.0 * math.log(a))
        return math.exp(-0.5 * x * x) + v / x - 1.0

    lo, hi = 2.0, 5.0
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        if top(mid) > 0.0:
            lo = mid
        else:
            hi = mid
    r = hi
    v = area(r)
    x = np.empty(layers + 1)
    x[0] = v / math.exp(-0.5 * r * r)
    x[1] = r
    for i in range(1, layers - 1):
        x[i + 1] = math.sqrt(-2.0 * math.log(math.exp(-0.5 * x[i] ** 2) + v / x[i]))
    x[layers] = 0.0
    return x, x[1:] / x[:-1]


_ZIG_X, _ZIG_RATIO = ziggurat_tables(256)
_ZIG_F = np.exp(-0.5 * _ZIG_X**2)
_ZIG_SALT = np.uint64(0x3C6EF372FE94F82B)
_U8 = np.uint64(0xFF)


@njit(inline="always", cache=True)
def _layer_and_uniform(h):
    """Layer (low 8 bits of hash ``h``) and a signed uniform in [-1, 1) (its top 53 bits)."""
    return int64(h & _U8), 2.0 * float64(h >> _S11) * _TWO53_INV - 1.0


@njit(cache=True)
def _ziggurat_slow(key, counter, i, u):
    """The rare rest of :func:`normal`: wedge and tail tests, then fresh tries.

    Its uniforms come from a SplitMix64 sequence of the counter's own
    (``state += gamma; mix64(state)``), seeded from ``key`` and ``counter``.
    """
    st = mix64((key ^ _ZIG_SALT) + uint64(counter) * _M2)
    r = _ZIG_X[1]
    while True:
        if i == 0:  # tail beyond r (Marsaglia 1964)
            while True:
                st += _GAMMA
                a = -np.log(1.0 - float64(mix64(st) >> _S11) * _TWO53_INV) / r
                st += _GAMMA
                b = -np.log(1.0 - float64(mix64(st) >> _S11) * _TWO53_INV)
                if 2.0 * b > a * a:
                    return r + a if u >= 0.0 else -(r + a)
        xx = u * _ZIG_X[i]
        st += _GAMMA
        t = float64(mix64(st) >> _S11) * _TWO53_INV
        fx = np.exp(-0.5 * xx * xx)
        if _ZIG_F[i] + t * (_ZIG_F[i + 1] - _ZIG_F[i]) < fx:
            return xx
        st += _GAMMA
        i, u = _layer_and_uniform(mix64(st))
        if abs(u) < _ZIG_RATIO[i]:
            return u * _ZIG_X[i]


@njit(inline="always", cache=True)
def normal(key, counter):
    """Standard normal variate for ``counter`` of stream ``key`` (256-layer ziggurat).

    One hash gives the layer (low 8 bits) and a signed uniform (top 53 bits);
    about 99% of variates are then one multiply.  The rest go through
    :func:`_ziggurat_slow`.  Method and references: :func:`ziggurat_tables`.
    """
    i, u = _layer_and_uniform(mix64(key + uint64(counter) * _GAMMA))
    if abs(u) < _ZIG_RATIO[i]:
        return u * _ZIG_X[i]
    return _ziggurat_slow(key, counter, i, u)


@njit(inline="always", cache=True)
def fill_normals(key, start, out, lo, hi):
    """``out[j] = normal(key, start + j)`` for ``lo <= j < hi``."""
    for j in range(lo, hi):
        out[j] = normal(key, start + j)


@njit(cache=True)
def normal_many(key, start, n):
    """``n`` normals at counters ``start .. start + n - 1``, for tests."""
    out = np.empty(n)
    fill_normals(key, start, out, 0, n)
    return out


@njit(inline="always", cache=True)
def _span(d, n):
    """Indices ``j`` in ``[0, n)`` with ``j + d`` also in ``[0, n)``: ``range(lo, hi)``."""
    return max(0, -d), min(n, n - d)


@njit(inline="always", cache=True)
def _clique_rows(out, wrow, xrow, nrow, lo, hi, sw, sn):
    """``out[j] += wrow[j + sw] * (xrow[j] - nrow[j + sn])`` for ``j`` in ``range(lo, hi)``.

    Written over slices so that the loop index starts at 0: numba then drops
    its negative-index wraparound and LLVM vectorises the loop (3x faster
    than indexing ``nrow[j + sn]`` directly, with the same arithmetic).
    """
    o = out[lo:hi]
    wv = wrow[lo + sw:hi + sw]
    xv = xrow[lo:hi]
    nv = nrow[lo + sn:hi + sn]
    for t in range(hi - lo):
        o[t] += wv[t] * (xv[t] - nv[t])


@njit(inline="always", cache=True)
def _shifted_add(out, src, lo, hi, s):
    """``out[j] += src[j + s]`` for ``j`` in ``range(lo, hi)`` (sliced, as :func:`_clique_rows`)."""
    o = out[lo:hi]
    v = src[lo + s:hi + s]
    for t in range(hi - lo):
        o[t] += v[t]


@njit(parallel=True, cache=True)
def gmrf_matvec(x, w, offsets, dw, curv, cs, out, rows):
    """``out = Q x`` with ``Q = diag(dw) + sum_o D_o^T diag(w_o) D_o + curv C^T S C``, for a batch of images.

    ``C`` stacks the in-plane second differences ``Dxx`` and ``Dyy`` (see
    :func:`_curv_row`; no term when ``curv = 0``); ``S`` weights each triple by
    ``cs`` at its middle pixel (:func:`_curv_row_scaled`), or is the identity when
    ``cs`` is empty.  ``x`` and ``out`` have shape
    ``(R, Z, H, W)`` (``R`` right-hand sides sharing the operator); ``rows[r, k]``
    receives the partial sum of ``x * out`` of row ``k`` of image ``r`` (for
    the conjugate-gradient step length).
    """
    R, Z, H, W = x.shape
    for k in prange(Z * H):
        z = k // H
        i = k - z * H
        for r in range(R):
            orow = out[r, z, i]
            _q_row(x[r], w, offsets, dw, curv, cs, z, i, orow)
            xrow = x[r, z, i]
            acc = 0.0
            for j in range(W):
                acc += xrow[j] * orow[j]
            rows[r, k] = acc


@njit(inline="always", cache=True)
def _triple_coef(c, i):
    """Coefficient of row (or column) ``i`` in the second difference of the triple
    ``c, c + 1, c + 2``: 1 at its ends, -2 in its middle."""
    return -2.0 if c == i - 1 else 1.0


@njit(parallel=True, cache=True)
def gmrf_diagonal(w, offsets, dw, curv, cs, out):
    """Diagonal of ``Q`` (data precision, the weights of every clique touching a pixel
    and ``curv`` times the squared coefficients of its second-difference triples, each
    also times ``cs`` at the triple's middle pixel when ``cs`` is not empty)."""
    Z, H, W = dw.shape
    n = offsets.shape[0]
    for k in prange(Z * H):
        z = k // H
        i = k - z * H
        orow = out[z, i]
        drow = dw[z, i]
        for j in range(W):
            orow[j] = drow[j]
        for o in range(n):
            dz = offsets[o, 0]
            di = offsets[o, 1]
            dj = offsets[o, 2]
            if 0 <= z + dz < Z and 0 <= i + di < H:
                wrow = w[o, z, i]
                lo, hi = _span(dj, W)
                _shifted_add(orow, wrow, lo, hi, 0)
            zb = z - dz
            ib = i - di
            if 0 <= zb < Z and 0 <= ib < H:
                wrow = w[o, zb, ib]
                lo, hi = _span(-dj, W)
                _shifted_add(orow, wrow, lo, hi, -dj)
        if curv > 0.0:  # triple weights curv (times cs at their middles, if given)
            scaled = cs.shape[0] > 0
            for j in range(W - 2):
                c = curv * cs[z, i, j + 1] if scaled else curv
                orow[j] += c
                orow[j + 1] += 4.0 * c
                orow[j + 2] += c
            for c in range(max(0, i - 2), min(i, H - 3) + 1):
                a = curv * _triple_coef(c, i) ** 2
                for j in range(W):
                    orow[j] += a * cs[z, c + 1, j] if scaled else a


#: ``comp`` value of a clique that leaves the lattice (no weight).
NO_CLIQUE = 255

_GSM_DRAW = 0
_GSM_MEAN = 1
_GSM_ENERGY = 2
#: Placeholders for the output array a mode of :func:`_gsm_rows` does not write.
_EMPTY4 = np.zeros((0, 0, 0, 0))
_EMPTY4U = np.zeros((0, 0, 0, 0), np.uint8)
_EMPTY2 = np.zeros((0, 0))
_EMPTY3 = np.zeros((0, 0, 0))
_EMPTY_OFFSETS = np.zeros((0, 3), np.int64)
#: The ladder path takes a clique's sum only above this (a smaller one, or a
#: running product leaving [_PROD_LO, _PROD_HI], goes the general way / is logged).
_LADDER_TINY = 1e-100
_PROD_LO = 1e-150
_PROD_HI = 1e150


@njit(inline="always", cache=True)
def _gsm_clique(la, pr, lam, d2, it, lp):
    """Tempered logits of one clique into ``lp`` as ``exp(logit - max)``; returns (max, sum, argmax)."""
    K = la.shape[0]
    m = -np.inf
    cm = 0
    for c in range(K):
        v = (la[c] - 0.5 * lam * pr[c] * d2) * it
        lp[c] = v
        if v > m:
            m = v
            cm = c
    tot = 0.0
    for c in range(K):
        v = lp[c] - m
        # exp(-40) = 4e-18 is below half an ulp of the sum (>= 1) and below the
        # 2**-53 resolution of the uniform that picks a component: skipping the
        # exp there changes no draw and no energy.  Most scales of a clique are
        # that far below its best one, so this saves most of the exps.
        e = np.exp(v) if v > -40.0 else 0.0
        lp[c] = e
        tot += e
    return m, tot, cm


#: Largest double below 1: ``t * _BELOW_ONE`` is the double just below a normal ``t``.
_BELOW_ONE = 1.0 - 2.0**-53


@njit(inline="always", cache=True)
def _mirror(point, tot):
    """``tot - point`` kept in ``[0, tot)``: rounding must not put it on ``tot``, where the pick
    would take the last component whatever its weight (even none)."""
    return min(max(tot - point, 0.0), tot * _BELOW_ONE)


@njit(inline="always", cache=True)
def _reflected(lp, c, u, tot):
    """A draw from weights ``lp`` (summed in order to ``tot``) reflected through their CDF.

    ``c`` is the current component and ``u`` a uniform in [0, 1): the point
    ``lower + u lp[c]`` (``lower`` the weights before ``c``) is uniform on
    ``[0, tot)`` when ``c`` is drawn from ``lp``, and so is its mirror image
    ``tot - point`` (kept in ``[0, tot)``), which is returned for :func:`_pick`.
    The move leaves the distribution ``lp / tot`` invariant and satisfies
    detailed balance (the mirror is its own inverse and keeps length); it
    anticorrelates successive draws.  It is the many-candidate limit of
    ordered over-relaxation (Neal 1998), with the point randomised within
    the current component's share as a discrete variable needs.
    """
    lower = 0.0
    for q in range(c):
        lower += lp[q]
    return _mirror(lower + u * lp[c], tot)


@njit(inline="always", cache=True)
def _pick(lp, u):
    """The component whose share of ``lp`` (weights, summed in order) holds ``u`` in [0, sum)."""
    K = lp.shape[0]
    c = 0
    a = lp[0]
    while a <= u and c < K - 1:
        c += 1
        a += lp[c]
    return c


@njit(inline="always", cache=True)
def _pair_d2(xrow, nrow, dj, lo, hi, grow, gnrow, scaled, d2v):
    """Squared differences ``(x[j + dj] - x[j])^2`` of the cliques ``j`` in ``range(lo, hi)``
    into ``d2v[:hi - lo]``; with ``scaled``, times the mean of the prior scales ``grow[j]``
    and ``gnrow[j + dj]`` of the clique's two pixels (see :func:`gsm_draw_components`)."""
    n = hi - lo
    xv = xrow[lo:hi]
    nv = nrow[lo + dj:hi + dj]
    for t in range(n):
        d = nv[t] - xv[t]
        d2v[t] = d * d
    if scaled:
        gv = grow[lo:hi]
        gnv = gnrow[lo + dj:hi + dj]
        for t in range(n):
            d2v[t] *= 0.5 * (gv[t] + gnv[t])


@njit(inline="always", cache=True)
def _ladder_draw(n, am, la, pr, lam, key, base, cv, lp, draw, buf, reflect):
    """Draw at T = 1 of ``n`` cliques of one row on the 4^c ladder.

    Their squared responses (differences, or filter responses) are in
    ``buf[0, :n]``; clique ``t`` draws with uniform counter ``base + t`` into
    ``cv[t]``.  Returns their prior energy (scales summed out); with ``draw``
    False only the energy (``cv`` is not touched).  The running sums over the
    scales are built for the whole row at once in ``buf`` (``K + 3`` rows of
    scratch), one scale at a time, so those loops vectorise; each clique's
    arithmetic is the same as one at a time.  With ``reflect``, each draw is
    the mirror image of the clique's current component in ``cv`` (see
    :func:`_reflected`), kept in ``buf``'s last row for the general path.  A
    clique whose sum is below :data:`_LADDER_TINY` (all scales far in the
    tail) takes the general path of :func:`_gsm_clique`.
    """
    K = am.shape[0]
    lmax = la[0]
    for c in range(K):
        lmax = max(lmax, la[c])
    g = -0.5 * lam * pr[0]
    d2v = buf[0, :n]
    ev = buf[K + 1, :n]
    _exp_decay_row(g, d2v, ev, buf[K, :n].view(np.int64))  # buf[K]: free until the sums
    for c in range(K):  # buf[1 + c] = sum of the first c + 1 terms am[c'] e^(4^c')
        cur = buf[1 + c, :n]
        ac = am[c]
        if c == 0:
            for t in range(n):
                cur[t] = ac * ev[t]
        else:
            prev = buf[c, :n]
            for t in range(n):
                cur[t] = prev[t] + ac * ev[t]
        for t in range(n):
            e2 = ev[t] * ev[t]
            ev[t] = e2 * e2
    tots = buf[K, :n]
    if draw:
        # the first c whose running sum exceeds u: the running sums do not decrease, so
        # it is the count of those at or below u (no branch to mispredict at a
        # data-dependent exit); uniforms and counts in passes of their own, which
        # vectorise (the row of e^(4^c) terms is free for the uniforms by now)
        uv = buf[K + 1, :n]
        if reflect:
            cold = buf[K + 2, :n]
            for t in range(n):
                c = cv[t]
                cold[t] = c
                u = uniform(key, base + t)
                if c < K:  # the mirror of the point drawn uniformly within c's share
                    below = buf[c, t] if c > 0 else 0.0
                    uv[t] = _mirror(below + u * (buf[1 + c, t] - below), tots[t])
                else:
                    uv[t] = u * tots[t]
        else:
            for t in range(n):
                uv[t] = uniform(key, base + t) * tots[t]
        for t in range(n):
            cv[t] = 0
        for q in range(K - 1):
            sq = buf[1 + q, :n]
            for t in range(n):
                cv[t] += sq[t] <= uv[t]
    prod = 1.0
    acc = 0.0
    nfast = 0
    for t in range(n):
        tot = tots[t]
        if tot > _LADDER_TINY:
            prod *= tot
            if not (_PROD_LO <= prod <= _PROD_HI):
                acc -= np.log(prod)
                prod = 1.0
            nfast += 1
        else:  # far in the tail: the general path (its draw replaces the count)
            m, tot, c = _gsm_clique(la, pr, lam, d2v[t], 1.0, lp)
            acc -= m + np.log(tot)
            if draw:
                u = uniform(key, base + t)
                c = int(buf[K + 2, t]) if reflect else K
                cv[t] = _pick(lp, _reflected(lp, c, u, tot) if c < K else u * tot)
    return acc - lmax * nfast - np.log(prod)


@njit(inline="always", cache=True)
def _one_clique(d2, ms, mode, la, pr, lam, it, temperature, key, ctr, crow, wrow, j, reflect, lp):
    """The general path of one clique of squared response ``d2`` (times its prior scale ``ms``).

    ``mode`` mean: its half-quadratic weight ``lam ms E[prec | d2]`` into ``wrow[j]``
    (returns 0).  Draw: its component (uniform counter ``ctr``; reflected through its
    conditional CDF from ``crow[j]`` with ``reflect``) into ``crow[j]``.  Draw and energy
    return its prior energy at T = 1, the scales summed out.
    """
    K = la.shape[0]
    if mode == _GSM_MEAN:
        m, tot, c = _gsm_clique(la, pr, lam, d2, 1.0, lp)
        num = 0.0
        for c in range(K):
            num += lp[c] * pr[c]
        wrow[j] = lam * ms * num / tot
        return 0.0
    draw = mode == _GSM_DRAW
    m, tot, c = _gsm_clique(la, pr, lam, d2, it if draw else 1.0, lp)
    if draw:
        if temperature > 0.0:
            u = uniform(key, ctr)
            c0 = crow[j]
            c = _pick(lp, _reflected(lp, c0, u, tot) if reflect and c0 < K else u * tot)
        crow[j] = c
        if it != 1.0:  # the energy is untempered: redo the sums at T = 1
            m, tot, c = _gsm_clique(la, pr, lam, d2, 1.0, lp)
    return -(m + np.log(tot))


@njit(parallel=True, cache=True)
def _gsm_rows(x, y, dw, offsets, logamp, prec, strength, temperature, key, mode, w, comp, rows,
              amp=_EMPTY2, gs=_EMPTY3, reflect=False):
    """Shared body of :func:`gsm_draw_components`, :func:`gsm_mean_weights` and the energy.

    Rows of the lattice are independent: row ``(z, i)`` owns the cliques whose
    tail it holds.  ``mode`` draw: each clique's component into ``comp`` and,
    in ``rows``, the row's energy (prior at T = 1 with the scales summed out,
    plus data term) of ``x``.  ``mode`` mean: posterior-mean weights into ``w``.
    ``mode`` energy: only the prior energy.

    ``amp`` (draw or energy at T = 1, empty otherwise): ``exp(logamp - max logamp)``
    per offset, given when the precisions form the ladder ``prec[c] = prec[0]
    4^c`` (see :func:`ladder4`).  Then ``exp(-lam prec[c] d^2 / 2)`` is
    ``e^(4^c)`` with ``e = exp(-lam prec[0] d^2 / 2)``: one exp and two
    squarings per scale instead of an exp per scale, and the logs of the
    clique sums are taken on their running product.

    ``gs`` (empty: none): per-pixel prior scales; clique ``(p, p + o)`` then
    has precisions ``strength[o] prec[o, c] (gs[p] + gs[p + o]) / 2``.

    ``reflect`` (draw at T > 0): over-relaxed draws, each the mirror image of
    the clique's current component in ``comp`` (see :func:`_reflected`).
    """
    Z, H, W = x.shape
    scaled = gs.shape[0] > 0
    n = offsets.shape[0]
    K = logamp.shape[1]
    N = Z * H * W
    it = 1.0 / temperature if temperature > 0.0 else 1.0
    draw = mode == _GSM_DRAW
    fast = mode != _GSM_MEAN and temperature == 1.0 and amp.shape[0] == n
    nocomp = np.zeros(0, np.uint8)
    noweight = w.reshape(-1)[:0]  # typed as w (float32 in the solver, float64 in tests)
    for k in prange(Z * H):
        z = k // H
        i = k - z * H
        lp = np.empty(K)
        scratch = np.empty((K + 3, W) if fast else (0, 0))
        xrow = x[z, i]
        acc = 0.0
        if draw:
            yrow = y[z, i]
            drow = dw[z, i]
            for j in range(W):
                r = xrow[j] - yrow[j]
                acc += 0.5 * drow[j] * r * r
        for o in range(n):
            zf = z + offsets[o, 0]
            i_f = i + offsets[o, 1]
            dj = offsets[o, 2]
            lam = strength[o]
            lo, hi = _span(dj, W)
            if not (0 <= zf < Z and 0 <= i_f < H):
                lo, hi = 0, 0
            wrow = w[o, z, i] if mode == _GSM_MEAN else noweight
            crow = comp[o, z, i] if draw else nocomp
            if mode == _GSM_MEAN:
                for j in range(0, lo):
                    wrow[j] = 0.0
                for j in range(hi, W):
                    wrow[j] = 0.0
            elif draw:
                for j in range(0, lo):
                    crow[j] = NO_CLIQUE
                for j in range(hi, W):
                    crow[j] = NO_CLIQUE
            if hi <= lo:
                continue
            nrow = x[zf, i_f]
            grow = gs[z, i] if scaled else xrow
            gnrow = gs[zf, i_f] if scaled else nrow
            la = logamp[o]
            pr = prec[o]
            base = o * N + (z * H + i) * W
            if fast:
                _pair_d2(xrow, nrow, dj, lo, hi, grow, gnrow, scaled, scratch[0])
                acc += _ladder_draw(hi - lo, amp[o], la, pr, lam, key, base + lo,
                                    crow[lo:hi] if draw else nocomp, lp, draw, scratch, reflect)
                continue
            for j in range(lo, hi):
                d = nrow[j + dj] - xrow[j]
                ms = 0.5 * (grow[j] + gnrow[j + dj]) if scaled else 1.0
                acc += _one_clique(d * d * ms, ms, mode, la, pr, lam, it, temperature, key,
                                   base + j, crow, wrow, j, reflect, lp)
        rows[k] = acc


def gsm_draw_components(x, y, dw, offsets, logamp, prec, strength, temperature, key, comp,
                        scale=None, reflect=False):
    """Draw every clique's scale given the image; return the energy of the image.

    Clique ``(o, p)`` with difference ``d`` takes component ``c`` with probability
    proportional to ``(exp(logamp[o, c]) exp(-strength[o] prec[o, c] d^2 / 2))^(1/T)``;
    ``comp[o, p]`` receives ``c`` (:data:`NO_CLIQUE` where the clique leaves the
    lattice), and :func:`gsm_expand` turns it into the weight
    ``strength[o] * prec[o, c]`` (the tempered image update then scales the
    whole precision by ``1/T`` itself).  At ``T = 0`` the most probable
    component is taken (the half-quadratic choice).  ``scale`` (optional,
    shape of ``x``): per-pixel prior scales ``g``; clique ``(p, p + o)`` then
    has precisions ``strength[o] prec[o, c] (g[p] + g[p + o]) / 2``, in the
    draw, the energy and (given the same ``scale``) :func:`gsm_expand`.
    With ``reflect`` (T > 0), ``comp`` holds every clique's current component
    on entry and each draw is its reflection through the clique's conditional
    CDF: the mirror image of a point drawn uniformly within the current
    component's share (the many-candidate limit of ordered over-relaxation,
    Neal 1998).  Like a plain draw it leaves the conditional distribution
    invariant, and it anticorrelates successive scales, which can make
    averages over a chain converge faster.

    Returns ``E(x)``: the prior energy with the scales summed out, at
    temperature 1, plus the data energy ``sum (x - y)^2 dw / 2`` -- computed
    from the same logits, so a sweep needs no separate energy pass.
    """
    rows = np.empty(x.shape[0] * x.shape[1])
    amp = _ladder_amplitudes(logamp, prec) if float(temperature) == 1.0 else _EMPTY2
    _gsm_rows(x, y, dw, offsets, logamp, prec, strength, float(temperature), np.uint64(key),
              _GSM_DRAW, _EMPTY4, comp, rows, amp, _EMPTY3 if scale is None else scale,
              bool(reflect) and float(temperature) > 0.0)
    return _ordered_sum(rows)


def _ladder_amplitudes(logamp, prec):
    """``exp(logamp - max logamp)`` per offset when ``prec`` is on the 4^c ladder, else empty."""
    if not ladder4(prec):
        return _EMPTY2
    return np.exp(logamp - logamp.max(axis=1, keepdims=True))


def ladder4(prec):
    """True when every row of ``prec`` is exactly ``prec[o, 0] * 4**c`` (``c = 0 .. K-1``).

    Parameters
    ----------
    prec : array_like, shape (..., K)
        Scale precisions per offset.

    Returns
    -------
    bool

    Multiplying by a power of 4 is exact in binary floating point, so the
    test is an equality; priors on this ladder get the one-exp draw of
    :func:`gsm_draw_components`.
    """
    prec = np.asarray(prec, dtype=np.float64)
    K = prec.shape[-1]
    return bool(np.all(prec == prec[..., :1] * 4.0 ** np.arange(K)))


@njit(parallel=True, cache=True)
def tally_moments(s1, s2, sv, mu, x):
    """``s1 += mu``, ``s2 += mu^2``, ``sv += (x - mu)^2`` elementwise, in one pass.

    The running sums of :class:`mrfclean.models.grey.GreyTally` (the same arithmetic
    as the numpy expressions, element by element, so the same results).
    """
    a1 = s1.reshape(-1)
    a2 = s2.reshape(-1)
    av = sv.reshape(-1)
    m = mu.reshape(-1)
    xs = x.reshape(-1)
    for i in prange(a1.shape[0]):
        mi = m[i]
        a1[i] += mi
        a2[i] += mi * mi
        e = xs[i] - mi
        av[i] += e * e


@njit(cache=True)
def _ordered_sum(rows):
    e = 0.0
    for k in range(rows.shape[0]):
        e += rows[k]
    return e


@njit(inline="always", cache=True)
def _plane_row(k, Z, H):
    """``(a, z, i)`` of flat row index ``k = (a Z + z) H + i`` over planes ``a`` of ``(Z, H)`` rows."""
    a = k // (Z * H)
    r = k - a * Z * H
    z = r // H
    return a, z, r - z * H


@njit(parallel=True, cache=True)
def _gsm_expand(comp, prec, strength, w, offsets, gs):
    n, Z, H, W = comp.shape
    scaled = gs.shape[0] > 0
    for k in prange(n * Z * H):
        o, z, i = _plane_row(k, Z, H)
        crow = comp[o, z, i]
        wrow = w[o, z, i]
        lam = strength[o]
        for j in range(W):
            c = crow[j]
            wrow[j] = 0.0 if c == NO_CLIQUE else lam * prec[o, c]
        if scaled:
            zf = z + offsets[o, 0]
            i_f = i + offsets[o, 1]
            if not (0 <= zf < Z and 0 <= i_f < H):
                continue
            dj = offsets[o, 2]
            lo, hi = _span(dj, W)
            grow = gs[z, i]
            gnrow = gs[zf, i_f]
            for j in range(lo, hi):
                wrow[j] *= 0.5 * (grow[j] + gnrow[j + dj])


def gsm_expand(comp, prec, strength, w, offsets=None, scale=None):
    """``w[o, p] = strength[o] * prec[o, comp[o, p]]`` (0 where ``comp`` is :data:`NO_CLIQUE`).

    With per-pixel prior scales ``scale`` (and the ``offsets`` they need) the
    weight of clique ``(p, p + o)`` is also multiplied by ``(scale[p] +
    scale[p + o]) / 2``, as in :func:`gsm_draw_components`.
    """
    if scale is None:
        _gsm_expand(comp, prec, strength, w, _EMPTY_OFFSETS, _EMPTY3)
    elif offsets is None:
        raise ValueError("per-pixel prior scales need the clique offsets")
    else:
        _gsm_expand(comp, prec, strength, w, offsets, scale)


def gsm_mean_weights(x, offsets, logamp, prec, strength, w, scale=None):
    """Posterior-mean precision of every clique given the image (half-quadratic weights).

    ``w[o, p] = strength[o] * E[prec | d]`` (with per-pixel prior scales ``scale``,
    ``strength[o] * m * E[prec | m d^2]``, ``m`` the mean of the clique's two scales),
    the weight of one iteratively reweighted least-squares step; for a Gaussian scale mixture this step never
    raises the energy (Geman & Reynolds 1992; Nikolova & Ng 2005).
    """
    rows = np.empty(x.shape[0] * x.shape[1])
    _gsm_rows(x, x, x, offsets, logamp, prec, strength, 1.0, np.uint64(0), _GSM_MEAN, w,
              _EMPTY4U, rows, _EMPTY2, _EMPTY3 if scale is None else scale)


def gsm_prior_energy(x, offsets, logamp, prec, strength, scale=None):
    """``-sum_cliques log sum_c exp(logamp[o, c] - strength[o] prec[o, c] m d^2 / 2)``.

    ``m`` is 1, or with per-pixel prior scales ``scale`` the mean of the
    clique's two scales (see :func:`gsm_draw_components`).
    """
    rows = np.empty(x.shape[0] * x.shape[1])
    _gsm_rows(x, x, x, offsets, logamp, prec, strength, 1.0, np.uint64(0), _GSM_ENERGY,
              _EMPTY4, _EMPTY4U, rows, _ladder_amplitudes(logamp, prec),
              _EMPTY3 if scale is None else scale)
    return _ordered_sum(rows)


# ---------------------------------------------------------------------------------------
# 2 x 2 block filters
# ---------------------------------------------------------------------------------------
#: Filters of a 2 x 2 block ``[[a, b], [c, d]]`` (top-left corner at pixel ``(i, j)``):
#: the non-constant Haar filters, unit norm, ``h = (a - b + c - d) / 2`` (across columns),
#: ``v = (a + b - c - d) / 2`` (across rows), ``m = (a - b - c + d) / 2`` (mixed).
BLOCK_FILTERS = 3
#: Offsets of the pair weights a field of block filters contributes to ``Q``, in this order.
BLOCK_OFFSETS = np.array([(0, 0, 1), (0, 1, 0), (0, 1, 1), (0, 1, -1)], np.int64)


@njit(inline="always", cache=True)
def _block_response(top, bot, f, n, out):
    """Responses of block filter ``f`` of the blocks ``(i, j)``, ``j < n``, into ``out[:n]``
    (``top`` and ``bot``: rows ``i`` and ``i + 1``)."""
    a = top[0:n]
    b = top[1:n + 1]
    c = bot[0:n]
    d = bot[1:n + 1]
    o = out[:n]
    if f == 0:
        for t in range(n):
            o[t] = 0.5 * ((a[t] + c[t]) - (b[t] + d[t]))
    elif f == 1:
        for t in range(n):
            o[t] = 0.5 * ((a[t] + b[t]) - (c[t] + d[t]))
    else:
        for t in range(n):
            o[t] = 0.5 * ((a[t] + d[t]) - (b[t] + c[t]))


@njit(parallel=True, cache=True)
def _block_rows(x, logamp, prec, strength, temperature, key, mode, w, comp, rows, amp, gs,
                reflect):
    """The body of :func:`_gsm_rows` for the block filters (``logamp``, ``prec``: one row
    per filter; ``w`` and ``comp`` of shape ``(3, Z, H, W)``, block ``(i, j)`` at its
    top-left corner, :data:`NO_CLIQUE` / 0 where no block starts).  ``rows`` receives each
    row's prior energy; no data term.  A block's prior scale (with ``gs``) is the mean of
    its four pixels'."""
    Z, H, W = x.shape
    scaled = gs.shape[0] > 0
    K = logamp.shape[1]
    N = Z * H * W
    it = 1.0 / temperature if temperature > 0.0 else 1.0
    draw = mode == _GSM_DRAW
    fast = mode != _GSM_MEAN and temperature == 1.0 and amp.shape[0] == BLOCK_FILTERS
    nocomp = np.zeros(0, np.uint8)
    noweight = w.reshape(-1)[:0]  # typed as w (float32 in the solver, float64 in tests)
    for k in prange(Z * H):
        z = k // H
        i = k - z * H
        n = W - 1 if i < H - 1 else 0
        lp = np.empty(K)
        scratch = np.empty((K + 3, W))
        ms_row = np.ones(max(n, 0))
        if scaled and n > 0:
            g0 = gs[z, i]
            g1 = gs[z, i + 1]
            for t in range(n):
                ms_row[t] = 0.25 * ((g0[t] + g0[t + 1]) + (g1[t] + g1[t + 1]))
        acc = 0.0
        for f in range(BLOCK_FILTERS):
            wrow = w[f, z, i] if mode == _GSM_MEAN else noweight
            crow = comp[f, z, i] if draw else nocomp
            if mode == _GSM_MEAN:
                for j in range(max(n, 0), W):
                    wrow[j] = 0.0
            elif draw:
                for j in range(max(n, 0), W):
                    crow[j] = NO_CLIQUE
            if n <= 0:
                continue
            la = logamp[f]
            pr = prec[f]
            lam = strength[f]
            base = f * N + (z * H + i) * W
            d2v = scratch[0]
            _block_response(x[z, i], x[z, i + 1], f, n, d2v)
            for t in range(n):
                d2v[t] = d2v[t] * d2v[t] * ms_row[t]
            if fast:
                acc += _ladder_draw(n, amp[f], la, pr, lam, key, base,
                                    crow[0:n] if draw else nocomp, lp, draw, scratch, reflect)
                continue
            for j in range(n):
                acc += _one_clique(d2v[j], ms_row[j], mode, la, pr, lam, it, temperature, key,
                                   base + j, crow, wrow, j, reflect, lp)
        rows[k] = acc


@njit(parallel=True, cache=True)
def _block_weights(comp, prec, strength, gs, bw):
    """``bw[f, p] = strength[f] prec[f, comp[f, p]]`` (times the block's mean prior scale
    with ``gs``; 0 where no block starts)."""
    F, Z, H, W = comp.shape
    scaled = gs.shape[0] > 0
    for k in prange(F * Z * H):
        f, z, i = _plane_row(k, Z, H)
        crow = comp[f, z, i]
        brow = bw[f, z, i]
        lam = strength[f]
        for j in range(W):
            c = crow[j]
            brow[j] = 0.0 if c == NO_CLIQUE else lam * prec[f, c]
        if scaled and i < H - 1:
            g0 = gs[z, i]
            g1 = gs[z, i + 1]
            for j in range(W - 1):
                brow[j] *= 0.25 * ((g0[j] + g0[j + 1]) + (g1[j] + g1[j + 1]))


@njit(parallel=True, cache=True)
def _block_pairs(bw, w4):
    """Pair weights (offsets :data:`BLOCK_OFFSETS`) of the blocks' precision.

    A zero-sum filter ``f`` has ``f f^T = sum_{a<b} (-f_a f_b)(e_a - e_b)(e_a - e_b)^T``
    (its rows sum to zero), so the block field's precision ``sum w_h h h^T + w_v v v^T +
    w_m m m^T`` is a pairwise one: in each block the two row pairs weigh
    ``(w_h - w_v + w_m) / 4``, the two column pairs ``(w_v - w_h + w_m) / 4`` and the two
    diagonals ``(w_h + w_v - w_m) / 4`` (some may be negative; the sum stays positive
    semi-definite).  Row ``(z, i)`` of every pair set gathers from the blocks of rows
    ``i - 1`` and ``i``.
    """
    F, Z, H, W = bw.shape
    for k in prange(Z * H):
        z = k // H
        i = k - z * H
        for o in range(4):
            row = w4[o, z, i]
            for j in range(W):
                row[j] = 0.0
        h0 = bw[0, z, i]
        v0 = bw[1, z, i]
        m0 = bw[2, z, i]
        r0 = w4[0, z, i]
        r1 = w4[1, z, i]
        r2 = w4[2, z, i]
        r3 = w4[3, z, i]
        if i < H - 1:  # the blocks of row i: top row pair, both column pairs, both diagonals
            for j in range(W - 1):
                r0[j] += 0.25 * ((h0[j] - v0[j]) + m0[j])
                b = 0.25 * ((v0[j] - h0[j]) + m0[j])
                r1[j] += b
                r1[j + 1] += b
                c = 0.25 * ((h0[j] + v0[j]) - m0[j])
                r2[j] = c
                r3[j + 1] = c
        if i > 0:  # the blocks of row i - 1: their bottom row pair
            h1 = bw[0, z, i - 1]
            v1 = bw[1, z, i - 1]
            m1 = bw[2, z, i - 1]
            for j in range(W - 1):
                r0[j] += 0.25 * ((h1[j] - v1[j]) + m1[j])


def block_draw_components(x, logamp, prec, strength, temperature, key, comp, scale=None,
                          reflect=False):
    """Draw every block filter's scale given the image (as :func:`gsm_draw_components`, for
    the filters of :data:`BLOCK_FILTERS`); return the blocks' prior energy at T = 1."""
    rows = np.empty(x.shape[0] * x.shape[1])
    amp = _ladder_amplitudes(logamp, prec) if float(temperature) == 1.0 else _EMPTY2
    _block_rows(x, logamp, prec, strength, float(temperature), np.uint64(key), _GSM_DRAW,
                _EMPTY4, comp, rows, amp, _EMPTY3 if scale is None else scale,
                bool(reflect) and float(temperature) > 0.0)
    return _ordered_sum(rows)


def block_expand(comp, prec, strength, bw, w4, scale=None):
    """Filter weights ``bw`` of the drawn components and the pair weights ``w4`` they make
    (offsets :data:`BLOCK_OFFSETS`, see :func:`_block_pairs`)."""
    _block_weights(comp, prec, strength, _EMPTY3 if scale is None else scale, bw)
    _block_pairs(bw, w4)


def block_mean_weights(x, logamp, prec, strength, bw, w4, scale=None):
    """Half-quadratic filter weights ``strength[f] E[prec | r]`` into ``bw`` and their pair
    weights into ``w4`` (as :func:`gsm_mean_weights`)."""
    rows = np.empty(x.shape[0] * x.shape[1])
    _block_rows(x, logamp, prec, strength, 1.0, np.uint64(0), _GSM_MEAN, bw, _EMPTY4U, rows,
                _EMPTY2, _EMPTY3 if scale is None else scale, False)
    _block_pairs(bw, w4)


def block_prior_energy(x, logamp, prec, strength, scale=None):
    """``-sum_blocks sum_f log sum_c exp(logamp[f, c] - strength[f] prec[f, c] m r_f^2 / 2)``."""
    rows = np.empty(x.shape[0] * x.shape[1])
    _block_rows(x, logamp, prec, strength, 1.0, np.uint64(0), _GSM_ENERGY, _EMPTY4, _EMPTY4U,
                rows, _ladder_amplitudes(logamp, prec), _EMPTY3 if scale is None else scale,
                False)
    return _ordered_sum(rows)


@njit(parallel=True, cache=True)
def _block_normals(bw, key, first, buf):
    """``buf[f, p] = sqrt(bw[f, p]) e[f, p]`` (counter ``first + f N + p``; 0 where no block starts)."""
    F, Z, H, W = bw.shape
    N = Z * H * W
    for k in prange(F * Z * H):
        f, z, i = _plane_row(k, Z, H)
        row = buf[f, z, i]
        hi = W - 1 if i < H - 1 else 0
        for j in range(hi, W):
            row[j] = 0.0
        fill_normals(key, first + f * N + (z * H + i) * W, row, 0, hi)
        wrow = bw[f, z, i]
        for j in range(hi):
            row[j] *= np.sqrt(wrow[j])


@njit(parallel=True, cache=True)
def _gather_blocks(buf, scale, out):
    """``out += scale sum_blocks (s_h h + s_v v + s_m m)`` for the scaled normals ``s`` in ``buf``."""
    F, Z, H, W = buf.shape
    for k in prange(Z * H):
        z = k // H
        i = k - z * H
        orow = out[z, i]
        sh = buf[0, z, i]
        sv = buf[1, z, i]
        sm = buf[2, z, i]
        for j in range(W):  # pixel a of block (i, j), b of block (i, j - 1)
            e = (sh[j] + sv[j]) + sm[j]
            if j > 0:
                e += (sv[j - 1] - sh[j - 1]) - sm[j - 1]
            orow[j] += 0.5 * scale * e
        if i > 0:  # pixel c of block (i - 1, j), d of block (i - 1, j - 1)
            th = buf[0, z, i - 1]
            tv = buf[1, z, i - 1]
            tm = buf[2, z, i - 1]
            for j in range(W):
                e = (th[j] - tv[j]) - tm[j]
                if j > 0:
                    e += (tm[j - 1] - th[j - 1]) - tv[j - 1]
                orow[j] += 0.5 * scale * e


def block_perturbation(bw, key, first, scale, out, buf):
    """``out += scale sum_f F_f^T diag(bw_f)^(1/2) e_f``: the block field's share of the
    perturbation of :func:`gmrf_perturbation` (covariance ``scale^2`` times its precision),
    normals at counters ``first + f N + p``."""
    _block_normals(bw, np.uint64(key), int(first), buf)
    _gather_blocks(buf, float(scale), out)


@njit(parallel=True, cache=True)
def _clique_normals(w, offsets, dw, key, buf, out):
    """``buf[o, p] = sqrt(w[o, p]) e2[o, p]`` (0 off the lattice) and ``out[p] = e1[p]``."""
    Z, H, W = dw.shape
    n = offsets.shape[0]
    N = Z * H * W
    for k in prange((n + 1) * Z * H):
        o, z, i = _plane_row(k, Z, H)
        base = (z * H + i) * W
        if o == n:  # the data normals
            fill_normals(key, n * N + base, out[z, i], 0, W)
            continue
        brow = buf[o, z, i]
        wrow = w[o, z, i]
        lo, hi = 0, 0
        if 0 <= z + offsets[o, 0] < Z and 0 <= i + offsets[o, 1] < H:
            lo, hi = _span(offsets[o, 2], W)
        for j in range(0, lo):
            brow[j] = 0.0
        for j in range(hi, W):
            brow[j] = 0.0
        fill_normals(key, o * N + base, brow, lo, hi)
        for j in range(lo, hi):
            brow[j] *= np.sqrt(wrow[j])


@njit(parallel=True, cache=True)
def _gather_perturbation(offsets, dw, buf, scale, out):
    Z, H, W = dw.shape
    n = offsets.shape[0]
    for k in prange(Z * H):
        z = k // H
        i = k - z * H
        orow = out[z, i]
        drow = dw[z, i]
        for j in range(W):
            orow[j] *= np.sqrt(drow[j])
        for o in range(n):
            brow = buf[o, z, i]
            for j in range(W):  # p is the tail of clique (p, p + o)
                orow[j] -= brow[j]
            zb = z - offsets[o, 0]
            ib = i - offsets[o, 1]
            dj = offsets[o, 2]
            if 0 <= zb < Z and 0 <= ib < H:  # p is the head of clique (p - o, p)
                brow = buf[o, zb, ib]
                lo, hi = _span(-dj, W)
                _shifted_add(orow, brow, lo, hi, -dj)
        for j in range(W):
            orow[j] *= scale


@njit(parallel=True, cache=True)
def _curv_normals(key, first, cbuf):
    """Standard normals of the second-difference triples: ``cbuf[0]`` along rows
    (triples starting at ``j < W - 2``), ``cbuf[1]`` down columns (``i < H - 2``);
    counters ``first + t N + p``; 0 where no triple starts."""
    T, Z, H, W = cbuf.shape
    N = Z * H * W
    for k in prange(T * Z * H):
        t, z, i = _plane_row(k, Z, H)
        row = cbuf[t, z, i]
        if t == 0:
            hi = max(W - 2, 0)
        else:
            hi = W if i < H - 2 else 0
        for j in range(hi, W):
            row[j] = 0.0
        fill_normals(key, first + t * N + (z * H + i) * W, row, 0, hi)


@njit(parallel=True, cache=True)
def _gather_curv(cbuf, a, out, cs):
    """``out += a (Dxx^T S^(1/2) e_x + Dyy^T S^(1/2) e_y)`` for the triple normals of
    :func:`_curv_normals` (``S``: ``cs`` at each triple's middle pixel, 1 when ``cs`` is empty)."""
    Z, H, W = out.shape
    scaled = cs.shape[0] > 0
    for k in prange(Z * H):
        z = k // H
        i = k - z * H
        orow = out[z, i]
        ex = cbuf[0, z, i]
        for j in range(W - 2):
            e = a * ex[j]
            if scaled:
                e *= np.sqrt(cs[z, i, j + 1])
            orow[j] += e
            orow[j + 1] -= 2.0 * e
            orow[j + 2] += e
        for c in range(max(0, i - 2), min(i, H - 3) + 1):
            coef = a * _triple_coef(c, i)
            ey = cbuf[1, z, c]
            if scaled:
                cm = cs[z, c + 1]
                for j in range(W):
                    orow[j] += coef * np.sqrt(cm[j]) * ey[j]
            else:
                for j in range(W):
                    orow[j] += coef * ey[j]


def gmrf_perturbation(w, offsets, dw, key, scale, out, buf, curv=0.0, cbuf=None, cs=None):
    """``out = scale * (diag(dw)^(1/2) e1 + sum_o D_o^T diag(w_o)^(1/2) e2_o + curv^(1/2) C^T S^(1/2) e3)``.

    Its covariance is ``scale^2 Q``: solving ``Q e = out`` gives a draw of
    ``N(0, scale^2 Q^-1)`` (perturbation-optimisation, Papandreou & Yuille 2010).
    Each clique's normal (counter ``o N + p``) is drawn once into ``buf`` (shape
    of ``w``) and then gathered at both of its ends; the data normal of pixel
    ``p`` has counter ``n N + p``; with ``curv > 0`` the second-difference
    triples' normals (counters ``(n + 1) N + p`` along rows and ``(n + 2) N + p``
    down columns) go through ``cbuf`` (shape ``(2, Z, H, W)``), each scaled by the
    square root of ``cs`` at its triple's middle pixel when ``cs`` is given (``S``
    above; the identity otherwise).
    """
    _clique_normals(w, offsets, dw, np.uint64(key), buf, out)
    _gather_perturbation(offsets, dw, buf, float(scale), out)
    if curv > 0:
        N = out.size
        _curv_normals(np.uint64(key), (offsets.shape[0] + 1) * N, cbuf)
        _gather_curv(cbuf, float(scale) * math.sqrt(curv), out, _EMPTY3 if cs is None else cs)


@njit(inline="always", cache=True)
def _curv_row(src, z, i, curv, out):
    """Row ``(z, i)`` of ``curv (Dxx^T Dxx + Dyy^T Dyy) src`` added to ``out``.

    ``Dxx`` and ``Dyy`` take the in-plane second differences
    ``x[p] - 2 x[p + e] + x[p + 2 e]`` of every triple inside the plane (free
    boundary), so the interior stencil is ``[1, -4, 6, -4, 1]`` along each
    axis; the two pixels at each end get the sums of their fewer triples.
    Interior loops run over slices (vectorised, as :func:`_clique_rows`).
    """
    Z, H, W = src.shape
    x = src[z, i]
    if W >= 5:  # along the row
        o = out[2:W - 2]
        a0, a1, a2, a3, a4 = x[0:W - 4], x[1:W - 3], x[2:W - 2], x[3:W - 1], x[4:W]
        for t in range(W - 4):
            o[t] += curv * (a0[t] + a4[t] - 4.0 * (a1[t] + a3[t]) + 6.0 * a2[t])
        d0 = x[0] - 2.0 * x[1] + x[2]
        d1 = x[1] - 2.0 * x[2] + x[3]
        e0 = x[W - 3] - 2.0 * x[W - 2] + x[W - 1]
        e1 = x[W - 4] - 2.0 * x[W - 3] + x[W - 2]
        out[0] += curv * d0
        out[1] += curv * (d1 - 2.0 * d0)
        out[W - 2] += curv * (e1 - 2.0 * e0)
        out[W - 1] += curv * e0
    else:
        for j in range(W - 2):  # scatter each triple's difference
            d = curv * (x[j] - 2.0 * x[j + 1] + x[j + 2])
            out[j] += d
            out[j + 1] -= 2.0 * d
            out[j + 2] += d
    if 2 <= i < H - 2:  # down the columns, interior rows: the five-point stencil
        r0, r1, r3, r4 = src[z, i - 2], src[z, i - 1], src[z, i + 1], src[z, i + 2]
        for j in range(W):
            out[j] += curv * (r0[j] + r4[j] - 4.0 * (r1[j] + r3[j]) + 6.0 * x[j])
    else:  # edge rows: the triples c, c+1, c+2 that hold row i
        for c in range(max(0, i - 2), min(i, H - 3) + 1):
            a = curv * _triple_coef(c, i)
            q0 = src[z, c]
            q1 = src[z, c + 1]
            q2 = src[z, c + 2]
            for j in range(W):
                out[j] += a * (q0[j] - 2.0 * q1[j] + q2[j])


@njit(inline="always", cache=True)
def _curv_row_scaled(src, cs, z, i, curv, out):
    """Row ``(z, i)`` of ``curv C^T S C src`` added to ``out``, ``S`` weighting each
    second-difference triple by ``cs`` at its middle pixel (see :func:`_curv_row`).

    Along the row, interior pixel ``j`` gathers the weighted differences of the
    triples starting at ``j - 2``, ``j - 1`` and ``j`` (coefficients 1, -2, 1), over
    slices so that the loop vectorises; down the columns, the (at most three)
    triples holding row ``i``.
    """
    Z, H, W = src.shape
    x = src[z, i]
    c = cs[z, i]
    if W >= 5:
        o = out[2:W - 2]
        x0, x1, x2, x3, x4 = x[0:W - 4], x[1:W - 3], x[2:W - 2], x[3:W - 1], x[4:W]
        c1, c2, c3 = c[1:W - 3], c[2:W - 2], c[3:W - 1]
        for t in range(W - 4):
            d0 = x0[t] - 2.0 * x1[t] + x2[t]
            d1 = x1[t] - 2.0 * x2[t] + x3[t]
            d2 = x2[t] - 2.0 * x3[t] + x4[t]
            o[t] += curv * (c1[t] * d0 - 2.0 * c2[t] * d1 + c3[t] * d2)
        e0 = curv * c[1] * (x[0] - 2.0 * x[1] + x[2])
        e1 = curv * c[2] * (x[1] - 2.0 * x[2] + x[3])
        f0 = curv * c[W - 2] * (x[W - 3] - 2.0 * x[W - 2] + x[W - 1])
        f1 = curv * c[W - 3] * (x[W - 4] - 2.0 * x[W - 3] + x[W - 2])
        out[0] += e0
        out[1] += e1 - 2.0 * e0
        out[W - 2] += f1 - 2.0 * f0
        out[W - 1] += f0
    else:
        for j in range(W - 2):  # scatter each triple's weighted difference
            d = curv * c[j + 1] * (x[j] - 2.0 * x[j + 1] + x[j + 2])
            out[j] += d
            out[j + 1] -= 2.0 * d
            out[j + 2] += d
    if 2 <= i < H - 2:  # interior rows: the three triples fused in one pass
        r0, r1, r3, r4 = src[z, i - 2], src[z, i - 1], src[z, i + 1], src[z, i + 2]
        ca, cb, cc = cs[z, i - 1], c, cs[z, i + 1]
        for j in range(W):
            d0 = r0[j] - 2.0 * r1[j] + x[j]
            d1 = r1[j] - 2.0 * x[j] + r3[j]
            d2 = x[j] - 2.0 * r3[j] + r4[j]
            out[j] += curv * (ca[j] * d0 - 2.0 * cb[j] * d1 + cc[j] * d2)
        return
    for r in range(max(0, i - 2), min(i, H - 3) + 1):
        a = curv * _triple_coef(r, i)
        q0 = src[z, r]
        q1 = src[z, r + 1]
        q2 = src[z, r + 2]
        cm = cs[z, r + 1]
        for j in range(W):
            out[j] += a * cm[j] * (q0[j] - 2.0 * q1[j] + q2[j])


@njit(inline="always", cache=True)
def _is_grid8(offsets):
    """True for the in-plane 8-neighbourhood in the order the shipped priors use:
    ``(0, 0, 1), (0, 1, 0), (0, 1, 1), (0, 1, -1)`` (:func:`_q_row8`'s layout)."""
    if offsets.shape[0] != 4:
        return False
    for o in range(4):
        if offsets[o, 0] != 0:
            return False
    return (offsets[0, 1] == 0 and offsets[0, 2] == 1 and offsets[1, 1] == 1 and offsets[1, 2] == 0
            and offsets[2, 1] == 1 and offsets[2, 2] == 1 and offsets[3, 1] == 1
            and offsets[3, 2] == -1)


@njit(parallel=True, cache=True)
def sgs_weights(w, curv, cs, out):
    """The weights ``-Q[p, p + o]`` of :func:`_sgs_apply`: the cliques' ``w[:4]``
    (:func:`_is_grid8`'s layout) plus, with ``curv > 0``, the second-difference
    triples' entries between row and column neighbours (``2 curv`` for each
    triple that holds both pixels, times ``cs`` at its middle when given).

    Parameters
    ----------
    w : ndarray, shape (4, Z, H, W)
        Clique weights of the in-plane 8-neighbourhood.
    curv : float
        Weight of the second-difference term (0: a copy of ``w``).
    cs : ndarray, shape (Z, H, W) or (0, 0, 0)
        The triples' factors at their middle pixels, or empty for none.
    out : ndarray, shape (4, Z, H, W)
        Receives the weights.

    References
    ----------
    .. [1] Y. Saad, Iterative Methods for Sparse Linear Systems, 2nd ed., SIAM
       (2003), section 10.2 (SSOR preconditioning; from memory).
    """
    Z, H, W = out.shape[1:]
    scaled = cs.shape[0] > 0
    for k in prange(Z * H):
        z = k // H
        i = k - z * H
        for o in range(4):
            src = w[o, z, i]
            dst = out[o, z, i]
            for j in range(W):
                dst[j] = src[j]
        h = out[0, z, i]
        v = out[1, z, i]
        for j in range(W - 1):  # the pair (j, j + 1) sits in triples centred at j and j + 1
            if j >= 1:
                h[j] += 2.0 * curv * (cs[z, i, j] if scaled else 1.0)
            if j + 2 < W:
                h[j] += 2.0 * curv * (cs[z, i, j + 1] if scaled else 1.0)
        if i + 1 < H:
            for j in range(W):
                if i >= 1:
                    v[j] += 2.0 * curv * (cs[z, i, j] if scaled else 1.0)
                if i + 2 < H:
                    v[j] += 2.0 * curv * (cs[z, i + 1, j] if scaled else 1.0)


def is_grid8(offsets) -> bool:
    """True when ``offsets`` (shape ``(n, 3)``) is the in-plane 8-neighbourhood in the
    layout of :func:`_q_row8` and :func:`_sgs_apply`."""
    return bool(_is_grid8(np.asarray(offsets, dtype=np.int64)))


@njit(inline="always", cache=True)
def _q_edge8(x, d, up, dn, w0, w1u, w1, w2u, w2, w3u, w3, j, W):
    """Pixel ``j`` of :func:`_q_row8` at a row end: the terms that exist, in the same order."""
    a = d[j] * x[j]
    if j + 1 < W:
        a += w0[j] * (x[j] - x[j + 1])
    if j >= 1:
        a += w0[j - 1] * (x[j] - x[j - 1])
    a += w1[j] * (x[j] - dn[j])
    a += w1u[j] * (x[j] - up[j])
    if j + 1 < W:
        a += w2[j] * (x[j] - dn[j + 1])
    if j >= 1:
        a += w2u[j - 1] * (x[j] - up[j - 1])
    if j >= 1:
        a += w3[j] * (x[j] - dn[j - 1])
    if j + 1 < W:
        a += w3u[j + 1] * (x[j] - up[j + 1])
    return a


@njit(inline="always", cache=True)
def _q_row8(src, w, dw, z, i, out):
    """Row ``(z, i)`` of ``Q src`` without the curvature term, for the 8-neighbourhood of
    :func:`_is_grid8` and an interior row (``1 <= i < H - 1``, ``W >= 3``).

    The same sums as the general loop of :func:`_q_row` in the same order per pixel
    (the diagonal, then each offset's forward and backward clique), so the result is
    bit-identical when ``src``, ``w``, ``dw`` and ``out`` share one dtype (as every
    caller passes them); but one pass over the row instead of nine, each pixel's sum
    kept in a register (the conjugate-gradient direction pass ran 1.25-1.4x faster on
    two Intel Xeon cores, measured at stop 26).
    """
    W = src.shape[2]
    x = src[z, i]
    up = src[z, i - 1]
    dn = src[z, i + 1]
    d = dw[z, i]
    w0 = w[0, z, i]
    w1 = w[1, z, i]
    w2 = w[2, z, i]
    w3 = w[3, z, i]
    w1u = w[1, z, i - 1]
    w2u = w[2, z, i - 1]
    w3u = w[3, z, i - 1]
    out[0] = _q_edge8(x, d, up, dn, w0, w1u, w1, w2u, w2, w3u, w3, 0, W)
    out[W - 1] = _q_edge8(x, d, up, dn, w0, w1u, w1, w2u, w2, w3u, w3, W - 1, W)
    # pixel j = t + 1 over slices starting at 0 (vectorises, see _clique_rows)
    m = W - 2
    o = out[1:W - 1]
    xc, xl, xr = x[1:W - 1], x[0:W - 2], x[2:W]
    uc, ul, ur = up[1:W - 1], up[0:W - 2], up[2:W]
    dc, dl, dr = dn[1:W - 1], dn[0:W - 2], dn[2:W]
    dd = d[1:W - 1]
    a0c, a0l = w0[1:W - 1], w0[0:W - 2]
    a1c, a1u = w1[1:W - 1], w1u[1:W - 1]
    a2c, a2u = w2[1:W - 1], w2u[0:W - 2]
    a3c, a3u = w3[1:W - 1], w3u[2:W]
    for t in range(m):
        c = xc[t]
        a = dd[t] * c
        a += a0c[t] * (c - xr[t])
        a += a0l[t] * (c - xl[t])
        a += a1c[t] * (c - dc[t])
        a += a1u[t] * (c - uc[t])
        a += a2c[t] * (c - dr[t])
        a += a2u[t] * (c - ul[t])
        a += a3c[t] * (c - dl[t])
        a += a3u[t] * (c - ur[t])
        o[t] = a


@njit(inline="always", cache=True)
def _q_row(src, w, offsets, dw, curv, cs, z, i, out):
    """Row ``(z, i)`` of ``Q src`` into ``out`` (see :func:`gmrf_matvec`)."""
    Z, H, W = src.shape
    if 1 <= i < H - 1 and W >= 3 and _is_grid8(offsets):
        _q_row8(src, w, dw, z, i, out)
        if curv > 0.0:
            if cs.shape[0] > 0:
                _curv_row_scaled(src, cs, z, i, curv, out)
            else:
                _curv_row(src, z, i, curv, out)
        return
    n = offsets.shape[0]
    xrow = src[z, i]
    drow = dw[z, i]
    for j in range(W):
        out[j] = drow[j] * xrow[j]
    for o in range(n):
        dz = offsets[o, 0]
        di = offsets[o, 1]
        dj = offsets[o, 2]
        zf = z + dz
        i_f = i + di
        if 0 <= zf < Z and 0 <= i_f < H:
            wrow = w[o, z, i]
            nrow = src[zf, i_f]
            lo, hi = _span(dj, W)
            _clique_rows(out, wrow, xrow, nrow, lo, hi, 0, dj)
        zb = z - dz
        ib = i - di
        if 0 <= zb < Z and 0 <= ib < H:
            wrow = w[o, zb, ib]
            nrow = src[zb, ib]
            lo, hi = _span(-dj, W)
            _clique_rows(out, wrow, xrow, nrow, lo, hi, -dj, -dj)
    if curv > 0.0:
        if cs.shape[0] > 0:
            _curv_row_scaled(src, cs, z, i, curv, out)
        else:
            _curv_row(src, z, i, curv, out)


@njit(inline="always", cache=True)
def _row_sum(t, n):
    """``sum(t[:n])`` in a fixed order: eight running sums over stride-8 lanes, then a tree.

    A single running sum is a chain of dependent additions that the compiler may
    not reorder (nor vectorise) under strict floating point; eight independent ones
    run about 2.5x faster on the conjugate-gradient rows (measured on 512-wide rows)
    and give the same result on every machine and thread count.
    """
    s0 = s1 = s2 = s3 = s4 = s5 = s6 = s7 = 0.0
    m = n - n % 8
    for j in range(0, m, 8):
        s0 += t[j]
        s1 += t[j + 1]
        s2 += t[j + 2]
        s3 += t[j + 3]
        s4 += t[j + 4]
        s5 += t[j + 5]
        s6 += t[j + 6]
        s7 += t[j + 7]
    for j in range(m, n):
        s0 += t[j]
    return ((s0 + s1) + (s2 + s3)) + ((s4 + s5) + (s6 + s7))


@njit(parallel=True, cache=True)
def _cg_start(X, B, w, offsets, dw, curv, cs, minv, Rr, Zr, rows, jacobi):
    """``r = b - Q x``; row sums of r r and b b, and with ``jacobi`` also ``z = M^-1 r``
    for ``M = diag(Q)`` and the row sums of r z."""
    S, Z, H, W = X.shape
    for k in prange(Z * H):
        z = k // H
        i = k - z * H
        tmp = np.empty(W, X.dtype)
        t0 = np.empty(W)
        t1 = np.empty(W)
        t2 = np.empty(W)
        mrow = minv[z, i]
        for s in range(S):
            _q_row(X[s], w, offsets, dw, curv, cs, z, i, tmp)
            rrow = Rr[s, z, i]
            zrow = Zr[s, z, i]
            brow = B[s, z, i]
            for j in range(W):
                rj = brow[j] - tmp[j]
                rrow[j] = rj
                t1[j] = float64(rj) * rj  # products in float64: no overflow in float32
                t2[j] = float64(brow[j]) * brow[j]
            if jacobi:
                for j in range(W):
                    zj = mrow[j] * rrow[j]
                    zrow[j] = zj
                    t0[j] = float64(rrow[j]) * zj
                rows[0, s, k] = _row_sum(t0, W)
            rows[1, s, k] = _row_sum(t1, W)
            rows[2, s, k] = _row_sum(t2, W)


@njit(parallel=True, cache=True)
def _cg_first_direction(w, offsets, dw, curv, cs, P, Q, Zr, rows):
    """``p = z`` and ``q = Q z``; row sums of p q."""
    S, Z, H, W = P.shape
    for k in prange(Z * H):
        z = k // H
        i = k - z * H
        t0 = np.empty(W)
        for s in range(S):
            qrow = Q[s, z, i]
            _q_row(Zr[s], w, offsets, dw, curv, cs, z, i, qrow)
            prow = P[s, z, i]
            zrow = Zr[s, z, i]
            for j in range(W):
                prow[j] = zrow[j]
                t0[j] = float64(prow[j]) * qrow[j]
            rows[3, s, k] = _row_sum(t0, W)


@njit(parallel=True, cache=True)
def _cg_update(X, Rr, P, Q, Zr, minv, alpha, rows, jacobi):
    """``x += a p``, ``r -= a q``; row sums of r r, and with ``jacobi`` also
    ``z = M^-1 r`` for ``M = diag(Q)`` and the row sums of r z."""
    S, Z, H, W = X.shape
    for k in prange(Z * H):
        z = k // H
        i = k - z * H
        mrow = minv[z, i]
        t0 = np.empty(W)
        t1 = np.empty(W)
        for s in range(S):
            a = alpha[s]
            if a == 0.0:
                continue
            xrow = X[s, z, i]
            rrow = Rr[s, z, i]
            prow = P[s, z, i]
            qrow = Q[s, z, i]
            zrow = Zr[s, z, i]
            if jacobi:
                for j in range(W):
                    xrow[j] += a * prow[j]
                    rj = rrow[j] - a * qrow[j]
                    rrow[j] = rj
                    zj = mrow[j] * rj
                    zrow[j] = zj
                    t0[j] = float64(rj) * zj
                    t1[j] = float64(rj) * rj
                rows[0, s, k] = _row_sum(t0, W)
            else:
                for j in range(W):
                    xrow[j] += a * prow[j]
                    rj = rrow[j] - a * qrow[j]
                    rrow[j] = rj
                    t1[j] = float64(rj) * rj
            rows[1, s, k] = _row_sum(t1, W)


@njit(parallel=True, cache=True)
def _cg_direction(w, offsets, dw, curv, cs, P, Q, Zr, beta, active, rows):
    """``p = z + b p`` and ``q = Q z + b q`` (so ``q = Q p`` with one product); row sums of p q."""
    S, Z, H, W = P.shape
    for k in prange(Z * H):
        z = k // H
        i = k - z * H
        tmp = np.empty(W, P.dtype)
        t0 = np.empty(W)
        for s in range(S):
            if not active[s]:
                continue
            b = beta[s]
            _q_row(Zr[s], w, offsets, dw, curv, cs, z, i, tmp)
            prow = P[s, z, i]
            qrow = Q[s, z, i]
            zrow = Zr[s, z, i]
            for j in range(W):
                pj = zrow[j] + b * prow[j]
                qj = tmp[j] + b * qrow[j]
                prow[j] = pj
                qrow[j] = qj
                t0[j] = float64(pj) * qj
            rows[3, s, k] = _row_sum(t0, W)


@njit(inline="always", cache=True)
def _sgs_vertical(up, dn, wu1, wu2, wu3, w1, w2, w3, has_up, has_dn, j, W):
    """The cliques joining pixel ``j`` of a row to the row above (``up``, when ``has_up``;
    weights ``wu1..3`` are the row above's) and below (``dn``, when ``has_dn``; weights
    ``w1..3`` are the row's own): each weight times the neighbour's value (offsets
    ``(1, 0)``, ``(1, 1)``, ``(1, -1)`` of :func:`_is_grid8`'s layout)."""
    a = 0.0
    if has_up:
        a += wu1[j] * up[j]
        if j >= 1:
            a += wu2[j - 1] * up[j - 1]
        if j + 1 < W:
            a += wu3[j + 1] * up[j + 1]
    if has_dn:
        a += w1[j] * dn[j]
        if j + 1 < W:
            a += w2[j] * dn[j + 1]
        if j >= 1:
            a += w3[j] * dn[j - 1]
    return a


@njit(inline="always", cache=True)
def _sgs_through(base, r, mi, up, dn, wu1, wu2, wu3, w1, w2, w3, has_up, has_dn, out, odd):
    """Over a row: ``out = mi (r + vertical)`` when ``odd`` (an odd row's forward values,
    ``base`` unused), else ``out = base + mi vertical`` (an even row's backward values
    from the odd rows' results; ``r`` unused), ``vertical`` of :func:`_sgs_vertical`.
    The interior of a row with both neighbours runs in one vectorised loop."""
    W = out.shape[0]
    if not (has_up and has_dn) or W < 3:
        for j in range(W):
            v = mi[j] * _sgs_vertical(up, dn, wu1, wu2, wu3, w1, w2, w3, has_up, has_dn, j, W)
            out[j] = mi[j] * r[j] + v if odd else base[j] + v
        return
    for j in (0, W - 1):
        v = mi[j] * _sgs_vertical(up, dn, wu1, wu2, wu3, w1, w2, w3, True, True, j, W)
        out[j] = mi[j] * r[j] + v if odd else base[j] + v
    e = W - 1
    o, bc, rc, mc = out[1:e], base[1:e], r[1:e], mi[1:e]
    uc, ul, ur, dc, dl, dr = up[1:e], up[0:e - 1], up[2:W], dn[1:e], dn[0:e - 1], dn[2:W]
    a1, a2, a3, b1, b2, b3 = wu1[1:e], wu2[0:e - 1], wu3[2:W], w1[1:e], w2[1:e], w3[1:e]
    if odd:
        for t in range(e - 1):
            v = a1[t] * uc[t] + a2[t] * ul[t] + a3[t] * ur[t] + b1[t] * dc[t] + b2[t] * dr[t] \
                + b3[t] * dl[t]
            o[t] = mc[t] * rc[t] + mc[t] * v
    else:
        for t in range(e - 1):
            v = a1[t] * uc[t] + a2[t] * ul[t] + a3[t] * ur[t] + b1[t] * dc[t] + b2[t] * dr[t] \
                + b3[t] * dl[t]
            o[t] = bc[t] + mc[t] * v


@njit(inline="always", cache=True)
def _sgs_step(base, mi, w0, v, par, out):
    """``out[j] = base[j] + mi[j] (w0[j-1] v[j-1] + w0[j] v[j+1])`` at the columns of
    parity ``par`` (row neighbours that exist), ``out[j] = base[j]`` at the others.

    Every column is computed and the parity picked by a select, so the loop
    vectorises (a stride-2 loop did not: the sweep ran 4 times slower).
    """
    W = out.shape[0]
    if W == 1:
        out[0] = base[0]
        return
    out[0] = base[0] + mi[0] * (w0[0] * v[1]) if par == 0 else base[0]
    e = W - 1
    out[e] = base[e] + mi[e] * (w0[e - 1] * v[e - 1]) if (e & 1) == par else base[e]
    o, bc, mc = out[1:e], base[1:e], mi[1:e]
    wl, wr, vl, vr = w0[0:e - 1], w0[1:e], v[0:e - 1], v[2:W]
    q = 1 - par  # column t + 1 has parity par when t has parity 1 - par
    for t in range(e - 1):
        h = bc[t] + mc[t] * (wl[t] * vl[t] + wr[t] * vr[t])
        o[t] = h if (t & 1) == q else bc[t]


@njit(inline="always", cache=True)
def _sgs_even_forward(r, mi, w0, t, y):
    """Forward sweep of an even row, which needs no other row: colour 0 (even columns)
    ``y = r / d``, then colour 1 (odd columns) ``y = (r + w y_left + w y_right) / d``."""
    W = r.shape[0]
    for j in range(W):
        t[j] = mi[j] * r[j]
    _sgs_step(t, mi, w0, t, 1, y)


@njit(inline="always", cache=True)
def _row_dot(r, zr, t0):
    """Row sum of ``r * zr`` in float64 (:func:`_row_sum`)."""
    W = r.shape[0]
    for j in range(W):
        t0[j] = float64(r[j]) * zr[j]
    return _row_sum(t0, W)


@njit(parallel=True, cache=True)
def _sgs_apply(pw, minv, Rr, Zr, on, rows):
    """``z = M^-1 r`` for the symmetric Gauss-Seidel preconditioner
    ``M = (D - L) D^-1 (D - L^T)`` of the 8-neighbourhood in four colours; row sums of r z.

    ``D`` is the whole diagonal of ``Q`` (``1 / minv``) and ``L`` minus the
    entries of ``Q`` between each pixel and its 8 neighbours of lower colour
    (colour ``2 (i mod 2) + (j mod 2)`` at row ``i``, column ``j``): the
    weights ``pw`` in :func:`_is_grid8`'s layout, ``Q[p, p + o] = -pw[o, p]``
    (see :func:`sgs_weights`).  The curvature triples' entries two pixels apart
    join pixels of one colour; the sweep leaves them to the conjugate
    gradients.  ``M`` is symmetric positive definite for any positive
    diagonal, so it is a valid preconditioner whatever the weights.

    The colours make both triangular sweeps local in rows: an even row's
    forward values need no other row, an odd row's forward and backward
    values need only the even rows' forward values beside it, and an even
    row's backward values need the odd rows' results beside it.  So the first
    loop recomputes the forward values of the two even rows beside each odd
    row and finishes the odd row; the second finishes the even rows.  (One
    pass over bands of rows, each recomputing the odd row above it, moved
    less memory but ran 1.6 times slower: its loops did not vectorise.)
    Only systems with ``on[s]`` are touched.

    References
    ----------
    .. [1] Y. Saad, Iterative Methods for Sparse Linear Systems, 2nd ed., SIAM
       (2003), sections 10.2 (SSOR preconditioning) and 12.4 (multicolour
       orderings; section numbers from memory).
    """
    S, Z, H, W = Rr.shape
    dt = Rr.dtype
    ho = H // 2
    for k in prange(Z * ho):
        z = k // ho
        i = 2 * (k - z * ho) + 1
        has_dn = i + 1 < H
        t = np.empty(W, dt)
        yu = np.empty(W, dt)
        yd = np.empty(W, dt)
        a = np.empty(W, dt)
        y = np.empty(W, dt)
        t0 = np.empty(W)
        mi = minv[z, i]
        w0 = pw[0, z, i]
        for s in range(S):
            if not on[s]:
                continue
            r = Rr[s, z, i]
            zr = Zr[s, z, i]
            _sgs_even_forward(Rr[s, z, i - 1], minv[z, i - 1], pw[0, z, i - 1], t, yu)
            if has_dn:
                _sgs_even_forward(Rr[s, z, i + 1], minv[z, i + 1], pw[0, z, i + 1], t, yd)
            # colour 2, forward (kept at even columns)
            _sgs_through(yu, r, mi, yu, yd, pw[1, z, i - 1], pw[2, z, i - 1], pw[3, z, i - 1],
                         pw[1, z, i], pw[2, z, i], pw[3, z, i], True, has_dn, a, True)
            _sgs_step(a, mi, w0, a, 1, y)  # colour 3, forward
            _sgs_step(y, mi, w0, y, 0, zr)  # backward: colour 2 adds colour 3's
            rows[0, s, z * H + i] = _row_dot(r, zr, t0)
    he = (H + 1) // 2
    for k in prange(Z * he):
        z = k // he
        i = 2 * (k - z * he)
        has_up = i >= 1
        has_dn = i + 1 < H
        t = np.empty(W, dt)
        y = np.empty(W, dt)
        u = np.empty(W, dt)
        t0 = np.empty(W)
        mi = minv[z, i]
        w0 = pw[0, z, i]
        iu = i - 1 if has_up else i
        idn = i + 1 if has_dn else i
        for s in range(S):
            if not on[s]:
                continue
            r = Rr[s, z, i]
            zr = Zr[s, z, i]
            _sgs_even_forward(r, mi, w0, t, y)
            # backward: colour 1 from the odd rows, then colour 0 adds colour 1's
            _sgs_through(y, y, mi, Zr[s, z, iu], Zr[s, z, idn], pw[1, z, iu], pw[2, z, iu],
                         pw[3, z, iu], pw[1, z, i], pw[2, z, i], pw[3, z, i], has_up, has_dn,
                         u, False)
            _sgs_step(u, mi, w0, u, 0, zr)
            rows[0, s, z * H + i] = _row_dot(r, zr, t0)


@njit(cache=True)
def gmrf_cg(X, B, w, offsets, dw, curv, cs, minv, tols, max_iter, Rr, P, Q, Zr, pw):
    """Preconditioned conjugate gradients for ``Q X[s] = B[s]``, all ``s`` at once.

    ``X`` holds the starting points and receives the solutions; system ``s``
    stops when ``||r|| <= tols[s] ||b||``.  Returns ``(iterations, worst
    relative residual)``.  Reductions are row partial sums (:func:`_row_sum`)
    added in order, so the result does not depend on the thread count.  The
    preconditioner is the diagonal of ``Q`` (Jacobi) when ``pw`` is empty;
    ``pw`` of shape ``(4, Z, H, W)`` holds the in-plane 8-neighbourhood's
    weights (:func:`sgs_weights`) of a four-colour symmetric Gauss-Seidel
    sweep (:func:`_sgs_apply`), which needs about half the iterations at
    about 1.3 times the time of one.

    References
    ----------
    .. [1] M. R. Hestenes & E. Stiefel, "Methods of conjugate gradients for
       solving linear systems", J. Res. Natl. Bur. Stand. 49 (1952) 409-436 (volume
       and pages from memory).
    .. [2] Y. Saad, Iterative Methods for Sparse Linear Systems, 2nd ed., SIAM
       (2003), sections 9.2 (preconditioned conjugate gradients), 10.2 and 12.4
       (section numbers from memory).
    """
    S, Z, H, W = X.shape
    nr = Z * H
    jacobi = pw.shape[0] != 4
    rows = np.zeros((4, S, nr))
    _cg_start(X, B, w, offsets, dw, curv, cs, minv, Rr, Zr, rows, jacobi)
    if not jacobi:
        _sgs_apply(pw, minv, Rr, Zr, np.ones(S, np.bool_), rows)
    _cg_first_direction(w, offsets, dw, curv, cs, P, Q, Zr, rows)
    rz = np.zeros(S)
    rr = np.zeros(S)
    bb = np.zeros(S)
    pq = np.zeros(S)
    for s in range(S):
        for k in range(nr):
            rz[s] += rows[0, s, k]
            rr[s] += rows[1, s, k]
            bb[s] += rows[2, s, k]
            pq[s] += rows[3, s, k]
    target = np.empty(S)
    active = np.zeros(S, np.bool_)
    for s in range(S):
        target[s] = tols[s] * tols[s] * bb[s]
        active[s] = rr[s] > target[s]
    alpha = np.zeros(S)
    beta = np.zeros(S)
    # step lengths in the solver's precision, so float32 loops stay float32
    alpha_s = np.zeros(S, X.dtype)
    beta_s = np.zeros(S, X.dtype)
    it = 0
    while it < max_iter:
        any_active = False
        for s in range(S):
            any_active = any_active or active[s]
        if not any_active:
            break
        for s in range(S):
            alpha[s] = rz[s] / pq[s] if (active[s] and pq[s] > 0.0) else 0.0
            if active[s] and not pq[s] > 0.0:
                active[s] = False
        for s in range(S):
            alpha_s[s] = alpha[s]
        _cg_update(X, Rr, P, Q, Zr, minv, alpha_s, rows, jacobi)
        if not jacobi:
            _sgs_apply(pw, minv, Rr, Zr, alpha_s != 0.0, rows)
        for s in range(S):
            if alpha_s[s] == 0.0:  # _cg_update skipped it (also when float32 rounds to 0)
                continue
            a0 = 0.0
            a1 = 0.0
            for k in range(nr):
                a0 += rows[0, s, k]
                a1 += rows[1, s, k]
            beta[s] = a0 / rz[s] if rz[s] > 0.0 else 0.0
            rz[s] = a0
            rr[s] = a1
            active[s] = a1 > target[s]
        it += 1
        if it >= max_iter:
            break
        for s in range(S):
            beta_s[s] = beta[s]
        _cg_direction(w, offsets, dw, curv, cs, P, Q, Zr, beta_s, active, rows)
        for s in range(S):
            if active[s]:
                a = 0.0
                for k in range(nr):
                    a += rows[3, s, k]
                pq[s] = a
    worst = 0.0
    for s in range(S):
        if bb[s] > 0.0:
            worst = max(worst, np.sqrt(rr[s] / bb[s]))
    return it, worst
