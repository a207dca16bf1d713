r"""Exact answers for the binary model: enumeration of small lattices and MAP by minimum cut.

These are the references the samplers are checked against.

* :func:`enumerate_posterior` visits all :math:`2^N` configurations of a small
  lattice and returns the partition function, the marginals, the pair
  correlations and the ground state of :math:`p(s) \propto \exp(-E(s)/T)`.
* :func:`exact_map` finds the exact minimum of :math:`E` for a non-negative
  coupling as a minimum s-t cut (Greig, Porteous & Seheult 1989), solved with
  :func:`scipy.sparse.csgraph.maximum_flow`.

Both use the energy of :class:`mrfclean.models.binary.BinaryModel`,

.. math::

    E(s) = -\beta \sum_{\langle ij \rangle} s_i s_j
           - \beta_z \sum_{\langle ij \rangle_z} s_i s_j - \sum_i h_i s_i ,

with the model's stored (float32) fields ``model.h`` and its grid's boundary.

References
----------
.. [1] D. M. Greig, B. T. Porteous and A. H. Seheult, "Exact maximum a
   posteriori estimation for binary images", J. R. Stat. Soc. B 51 (1989)
   271-279.
.. [2] E. A. Dinic, "Algorithm for solution of a problem of maximum flow in
   networks with power estimation", Soviet Math. Doklady 11 (1970) 1277-1280.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass

import numpy as np
from scipy import sparse
from scipy.sparse import csgraph

#: largest lattice :func:`enumerate_posterior` accepts (2**24 configurations)
MAX_ENUMERATION_SITES = 24

#: largest capacity given to one directed edge.  scipy's maximum_flow casts the
#: capacities to int32 (an int64 value above 2**31 - 1 silently wraps) and keeps
#: the residual capacity of an edge, which can reach the capacity of the edge
#: plus that of its reverse, in int32 as well; 2**30 - 1 per edge keeps both in
#: range.
_CAPACITY_LIMIT = 2**30 - 1


def _bonds(grid, coupling, coupling_z):
    """Every neighbour pair ``(a, b, weight)`` in flat C-order site indices.

    Pairs are listed exactly as :meth:`BinaryModel.energy_of` sums them: in-plane
    rows and columns, the wrapped edges for a periodic boundary (in-plane only),
    then the pairs between planes.
    """
    Z, H, W = grid.shape
    idx = np.arange(Z * H * W, dtype=np.int64).reshape(Z, H, W)
    parts = [(idx[:, 1:, :], idx[:, :-1, :], coupling), (idx[:, :, 1:], idx[:, :, :-1], coupling)]
    if grid.periodic:
        parts += [(idx[:, 0, :], idx[:, -1, :], coupling), (idx[:, :, 0], idx[:, :, -1], coupling)]
    parts.append((idx[1:], idx[:-1], coupling_z))
    a = np.concatenate([p[0].ravel() for p in parts])
    b = np.concatenate([p[1].ravel() for p in parts])
    w = np.concatenate([np.full(p[0].size, float(p[2])) for p in parts])
    return a, b, w


def _spins_of(codes, n_sites):
    """Spins (float64, +1/-1) of configuration indices: bit ``k`` set means site ``k`` is +1."""
    as_bytes = np.ascontiguousarray(codes, dtype="<u8").view(np.uint8).reshape(-1, 8)
    bits = np.unpackbits(as_bytes, axis=1, bitorder="little")[:, :n_sites]
    return 2.0 * bits - 1.0


_POPCOUNT16 = np.array([bin(k).count("1") for k in range(1 << 16)], dtype=np.uint8)


def _popcount(x):
    """Number of set bits of non-negative int64 values below 2**32."""
    return _POPCOUNT16[x & 0xFFFF].astype(np.int64) + _POPCOUNT16[(x >> 16) & 0xFFFF]


def _bond_groups(grid, coupling, coupling_z):
    """Bonds grouped as ``(weight, offset, mask)``: pairs ``(k, k + offset)``, ``k`` a bit of ``mask``.

    A pair listed twice (a periodic side of length 2) is one bond of twice the
    weight; pairs of equal weight and offset share a mask, so the number of
    disagreeing pairs of a configuration with index ``c`` is
    ``popcount((c ^ (c >> offset)) & mask)``.
    """
    a, b, w = _bonds(grid, coupling, coupling_z)
    lo, hi = np.minimum(a, b), np.maximum(a, b)
    pairs, inverse = np.unique(np.stack([lo, hi]), axis=1, return_inverse=True)
    weight = np.zeros(pairs.shape[1])
    np.add.at(weight, inverse.ravel(), w)
    groups = {}
    for (k, m), wt in zip(pairs.T.tolist(), weight.tolist()):
        key = (wt, m - k)
        groups[key] = groups.get(key, 0) | (1 << k)
    return [(wt, off, mask) for (wt, off), mask in groups.items() if wt != 0.0]


def configuration_index(spins, *, stacked=False):
    """Index of a configuration in :attr:`Enumeration.probabilities`.

    Sites are numbered in C order of the image layout ``(Z, H, W)``; the index
    is ``sum_k [s_k = +1] 2**k``.

    Parameters
    ----------
    spins : array_like of +1/-1
        One configuration (any shape, read in C order), or with ``stacked`` a
        stack of them along the first axis.
    stacked : bool, optional
        Treat the first axis as indexing configurations.

    Returns
    -------
    int, or ndarray of int64 when ``stacked``

    Examples
    --------
    >>> configuration_index([[-1, 1], [1, -1]])
    6
    >>> configuration_index([[1, 1], [-1, -1]], stacked=True).tolist()
    [3, 0]
    """
    s = np.asarray(spins)
    if not np.all((s == 1) | (s == -1)):
        raise ValueError("spins must be -1 or +1")
    flat = s.reshape(s.shape[0], -1) if stacked else s.reshape(1, -1)
    n = flat.shape[1]
    if n > 62:
        raise ValueError(f"{n} sites do not fit a 64-bit configuration index")
    weights = np.left_shift(np.int64(1), np.arange(n, dtype=np.int64))
    codes = (flat > 0).astype(np.int64) @ weights
    return codes if stacked else int(codes[0])


@dataclass
class Enumeration:
    """Exact moments of :math:`p(s) \\propto \\exp(-E(s)/T)` on a small lattice.

    Attributes
    ----------
    temperature : float
    log_partition : float
        :math:`\\ln Z = \\ln \\sum_s \\exp(-E(s)/T)`.
    marginals : ndarray of float64, shape (Z, H, W)
        :math:`P(s_i = +1)`.
    correlations : ndarray of float64, shape (N, N)
        :math:`E[s_i s_j]` with sites in C order of ``(Z, H, W)`` (diagonal 1).
    mean_energy : float
        :math:`E[E(s)]`.
    min_energy : float
        :math:`\\min_s E(s)`.
    minimiser : ndarray of int8, shape (Z, H, W)
        A configuration of minimum energy (the one of lowest index on ties).
    probabilities : ndarray of float64, shape (2**N,)
        :math:`p(s)` of every configuration, indexed by :func:`configuration_index`.
    """

    temperature: float
    log_partition: float
    marginals: np.ndarray
    correlations: np.ndarray
    mean_energy: float
    min_energy: float
    minimiser: np.ndarray
    probabilities: np.ndarray


def configuration_energies(model) -> np.ndarray:
    """Energies of all :math:`2^N` configurations of a small binary model, float64.

    Entry ``k`` is the energy of the configuration with index ``k`` (see
    :func:`configuration_index`), computed from the model's stored fields and
    couplings with the same pair list as :meth:`BinaryModel.energy_of`.
    """
    grid = model.grid
    n = grid.size
    if n > MAX_ENUMERATION_SITES:
        raise ValueError(f"enumeration needs at most {MAX_ENUMERATION_SITES} sites, "
                         f"got a lattice of {n} ({grid.shape})")
    h = np.asarray(model.h, dtype=np.float64).ravel()
    codes = np.arange(1 << n, dtype=np.int64)
    energies = np.zeros(codes.size)
    for weight, offset, mask in _bond_groups(grid, model.coupling, model.coupling_z):
        # s_i s_j = 1 - 2 [x_i != x_j] summed over the group's pairs
        differ = _popcount((codes ^ (codes >> offset)) & mask)
        energies -= weight * (bin(mask).count("1") - 2.0 * differ)
    # sum_i h_i s_i = 2 sum_{x_i = 1} h_i - sum_i h_i, looked up one byte of sites at a time
    for first in range(0, n, 8):
        sites = np.arange(first, min(first + 8, n))
        byte_values = np.arange(256)[:, None] >> (sites - first)[None, :] & 1
        table = byte_values @ h[sites]
        energies -= 2.0 * table[(codes >> first) & 255]
    energies += h.sum()
    return energies


def enumerate_posterior(model, *, temperature=1.0) -> Enumeration:
    r"""Exact posterior of a small binary model by visiting all :math:`2^N` configurations.

    .. math::

        p(s) = \frac{\exp(-E(s)/T)}{Z}, \qquad
        \ln Z = \operatorname{logsumexp}_s \left(-E(s)/T\right),

    computed in float64 with the log-sum-exp shift.  Memory and time grow as
    :math:`2^N`: about a second and a few hundred MB at N = 22.

    Parameters
    ----------
    model : BinaryModel
        Any lattice of at most :data:`MAX_ENUMERATION_SITES` sites (2-D or 3-D,
        free or periodic boundary, any sign of coupling).
    temperature : float, optional
        :math:`T > 0`; 1 is the posterior itself.

    Returns
    -------
    Enumeration

    References
    ----------
    .. [1] S. Geman and D. Geman, "Stochastic relaxation, Gibbs distributions,
       and the Bayesian restoration of images", IEEE TPAMI 6 (1984) 721-741.

    Examples
    --------
    >>> import numpy as np
    >>> from mrfclean.models.binary import BinaryModel
    >>> ex = enumerate_posterior(BinaryModel(np.zeros((1, 2)), coupling=0.5))
    >>> bool(np.isclose(ex.log_partition, np.log(4 * np.cosh(0.5))))
    True
    >>> bool(np.isclose(ex.correlations[0, 1], np.tanh(0.5)))
    True
    """
    t = float(temperature)
    if not (math.isfinite(t) and t > 0):
        raise ValueError(f"temperature must be positive and finite, got {temperature!r}")
    grid = model.grid
    n = grid.size
    energies = configuration_energies(model)
    log_w = -energies / t
    shift = log_w.max()
    weights = np.exp(log_w - shift)
    norm = weights.sum()
    log_partition = float(shift + np.log(norm))
    p = weights / norm
    # P(x_k = 1) and P(x_i = x_j = 1) read off p reshaped so that the bits in
    # question are axes of their own (bit k of the index is site k)
    on = np.array([p.reshape(-1, 2, 1 << k)[:, 1, :].sum() for k in range(n)])
    corr = np.eye(n)
    for j in range(n):
        for i in range(j):
            both = p.reshape(-1, 2, 1 << (j - i - 1), 2, 1 << i)[:, 1, :, 1, :].sum()
            differ = on[i] + on[j] - 2.0 * both
            corr[i, j] = corr[j, i] = 1.0 - 2.0 * differ
    best = int(np.argmin(energies))
    minimiser = _spins_of(np.array([best], dtype=np.int64), n).astype(np.int8).reshape(grid.shape)
    return Enumeration(temperature=t, log_partition=log_partition,
                       marginals=on.reshape(grid.shape), correlations=corr,
                       mean_energy=float(p @ energies), min_energy=float(energies[best]),
                       minimiser=minimiser, probabilities=p)


@dataclass
class MinCutMap:
    """Exact MAP labelling of a binary model.

    Attributes
    ----------
    spins : ndarray of int8, shape (Z, H, W)
        The minimiser (+1 on, -1 off).
    energy : float
        Its energy, evaluated by the model (float64 over the stored fields), not
        by the rounded graph.
    rounding_bound : float
        Upper bound on ``energy - true minimum`` caused by rounding the
        capacities to integers (see :func:`exact_map`).
    flow_seconds : float
        Wall time of :func:`scipy.sparse.csgraph.maximum_flow` alone.
    scale : float
        Capacities were ``round(scale * cost)``.
    cut_value : int
        The integer minimum cut (equal to the maximum flow).
    """

    spins: np.ndarray
    energy: float
    rounding_bound: float
    flow_seconds: float
    scale: float
    cut_value: int


def exact_map(model) -> MinCutMap:
    r"""Exact MAP estimate of a binary model as a minimum s-t cut.

    With :math:`x_i = (1 + s_i)/2` the energy is, up to a constant,

    .. math::

        E(s) = \text{const} + 2\beta \sum_{\langle ij\rangle} [x_i \ne x_j]
               + 2\beta_z \sum_{\langle ij\rangle_z} [x_i \ne x_j]
               + \sum_{h_i > 0} 2 h_i [x_i = 0] + \sum_{h_i < 0} 2 |h_i| [x_i = 1],

    which is the capacity of the cut separating the source (label "on") from the
    sink (label "off") in a graph with an edge of capacity :math:`2 h_i` from the
    source to every site with :math:`h_i > 0`, one of :math:`2|h_i|` to the sink
    from every site with :math:`h_i < 0`, and edges of capacity :math:`2\beta`
    (:math:`2\beta_z`) both ways between neighbours [1]_.  The cut is found by a
    maximum flow (Dinic's algorithm [2]_, as implemented by scipy) and read off
    as the sites reachable from the source in the residual graph.

    Rounding: scipy needs integer (int32) capacities.  Costs are scaled by
    ``scale`` so that the largest is ``2**30 - 1`` (the residual of an edge can
    reach its capacity plus that of its reverse, which must stay below
    ``2**31``; the flow value itself is summed in int64, and this function
    recomputes the cut in int64 anyway) and rounded to integers.  With
    :math:`\delta_e = c_e - \operatorname{round}(s c_e)/s` the cut of any
    labelling changes by at most :math:`\Delta = \sum_e |\delta_e|` (each bond
    counted once: a cut crosses at most one of its two directions), so the
    labelling returned is at most :math:`\Delta \le (\#\text{edges})/(2s)` above
    the true minimum; :math:`\Delta` is returned as ``rounding_bound``.

    Parameters
    ----------
    model : BinaryModel
        2-D or 3-D lattice, free or periodic boundary, with ``coupling >= 0`` and
        ``coupling_z >= 0`` (the energy must be submodular).

    Returns
    -------
    MinCutMap

    Raises
    ------
    ValueError
        For a negative coupling.

    References
    ----------
    .. [1] D. M. Greig, B. T. Porteous and A. H. Seheult, "Exact maximum a
       posteriori estimation for binary images", J. R. Stat. Soc. B 51 (1989)
       271-279.
    .. [2] E. A. Dinic, "Algorithm for solution of a problem of maximum flow in
       networks with power estimation", Soviet Math. Doklady 11 (1970) 1277-1280.

    Examples
    --------
    >>> import numpy as np
    >>> from mrfclean.models.binary import BinaryModel
    >>> m = BinaryModel(np.array([[1.0, -0.2, 1.0]]), coupling=0.5)
    >>> exact_map(m).spins.ravel().tolist()
    [1, 1, 1]
    """
    beta, beta_z = float(model.coupling), float(model.coupling_z)
    if beta < 0 or beta_z < 0:
        raise ValueError("the minimum cut needs non-negative couplings (a submodular energy), "
                         f"got coupling={beta}, coupling_z={beta_z}")
    grid = model.grid
    n = grid.size
    h = np.asarray(model.h, dtype=np.float64).ravel()
    structure, cost, once = _cut_graph(grid, h, beta, beta_z)
    src, snk = n, n + 1
    if structure is None:  # no field and no coupling: every labelling has the same energy
        spins = np.where(h.reshape(grid.shape) > 0, 1, -1).astype(np.int8)
        return MinCutMap(spins, float(model.energy_of(spins)), 0.0, 0.0, 1.0, 0)
    scale = (_CAPACITY_LIMIT - 1) / float(cost.max())
    scaled = cost * scale
    rounded = np.rint(scaled)
    rounding_bound = float(np.sum(np.abs(scaled - rounded)[once]) / scale)
    del scaled, once
    indices, indptr = structure
    capacity = sparse.csr_array((rounded.astype(np.int32), indices, indptr), shape=(n + 2, n + 2))
    t0 = time.perf_counter()
    result = csgraph.maximum_flow(capacity, src, snk, method="dinic")
    flow_seconds = time.perf_counter() - t0
    flow = result.flow
    if not (np.array_equal(flow.indptr, capacity.indptr)
            and np.array_equal(flow.indices, capacity.indices)):
        # every reverse edge is stored explicitly, so scipy should add none
        raise RuntimeError("maximum_flow changed the graph structure")
    # sites reachable from the source through unsaturated edges form the source side
    free = capacity.data.astype(np.int64) > flow.data
    kept = np.concatenate([[0], np.cumsum(free, dtype=np.int64)])[capacity.indptr]
    residual = sparse.csr_array((np.ones(int(kept[-1]), dtype=np.int8),
                                 capacity.indices[free], kept), shape=capacity.shape)
    del free, flow
    reach = csgraph.breadth_first_order(residual, src, directed=True, return_predecessors=False)
    del residual
    on = np.zeros(n + 2, dtype=bool)
    on[reach] = True
    if on[snk]:
        raise RuntimeError("maximum flow did not saturate a cut "
                           "(sink reachable in the residual graph)")
    rows = np.repeat(on, np.diff(capacity.indptr))
    cut_value = int(np.sum(rounded[rows & ~on[capacity.indices]], dtype=np.int64))
    if cut_value != int(result.flow_value):
        raise RuntimeError(f"minimum cut {cut_value} differs from the maximum flow "
                           f"{int(result.flow_value)}")
    spins = np.where(on[:n], 1, -1).astype(np.int8).reshape(grid.shape)
    return MinCutMap(spins=spins, energy=float(model.energy_of(spins)),
                     rounding_bound=rounding_bound, flow_seconds=flow_seconds,
                     scale=float(scale), cut_value=cut_value)


def _cut_graph(grid, h, beta, beta_z):
    """Structure and float costs of the Greig-Porteous-Seheult graph.

    Returns ``((indices, indptr), cost, once)``: the CSR structure (int32
    indices, sorted within rows) of a graph with nodes ``0 .. n-1`` the sites,
    ``n`` the source and ``n + 1`` the sink, with every reverse edge stored
    explicitly (zero cost for the reverse of a source or sink edge); ``cost``
    its float64 costs in storage order; ``once`` marks one direction of every
    bond and every source / sink edge, for the rounding bound.  Duplicate pairs
    (a periodic side of length 2) are added up before rounding.  The structure
    is None when every cost is zero.
    """
    n = grid.size
    a, b, w = _bonds(grid, beta, beta_z)
    keep = w > 0
    a, b, w = a[keep].astype(np.int32), b[keep].astype(np.int32), 2.0 * w[keep]
    sites = np.arange(n, dtype=np.int32)
    pos, neg = sites[h > 0], sites[h < 0]
    src = np.full(pos.size, n, dtype=np.int32)
    snk = np.full(neg.size, n + 1, dtype=np.int32)
    rows = np.concatenate([a, b, src, pos, neg, snk])
    cols = np.concatenate([b, a, pos, src, snk, neg])
    del a, b, src, snk
    cost = np.concatenate([w, w, 2.0 * h[pos], np.zeros(pos.size), -2.0 * h[neg],
                           np.zeros(neg.size)])
    del w, pos, neg
    graph = sparse.csr_array((cost, (rows, cols)), shape=(n + 2, n + 2))
    del rows, cols, cost
    graph.sum_duplicates()
    graph.sort_indices()
    if graph.nnz == 0 or not graph.data.max() > 0:
        return None, None, None
    row = np.repeat(np.arange(n + 2, dtype=np.int32), np.diff(graph.indptr))
    once = (row >= n) | (graph.indices >= n) | (row < graph.indices)
    return (graph.indices, graph.indptr), graph.data, once


