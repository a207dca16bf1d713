r"""Stacks of planes: clean each plane on its own, or the stack as one 3-D volume.

Two modes (``Settings.stack``):

* ``"volume"`` — one 3-D field with 6 neighbours: 4 in-plane with coupling
  :math:`\beta` and 2 along z with coupling :math:`\beta_z`.
* ``"planes"`` — every plane is an independent 2-D image (time series, or
  planes too far apart to share information).

Default z coupling
------------------
With ``coupling_z="auto"`` and a voxel size known from the file's metadata
(ImageJ ``spacing`` and X/Y resolution, or OME physical sizes),

.. math:: \beta_z = \beta \, \frac{d_{xy}}{d_z}, \qquad d_{xy} = \sqrt{d_x d_y}.

Why this rule: the Ising energy of a configuration is :math:`2\beta` times
the number of unlike neighbour pairs, a discrete surface area.  A flat
boundary of physical area :math:`A` lying across z cuts :math:`A / d_{xy}^2`
z-bonds; one lying along z cuts :math:`A / (d_{xy} d_z)` in-plane bonds.
Equal energy per unit of physical area in every orientation needs
:math:`\beta_z / d_{xy}^2 = \beta / (d_{xy} d_z)`, i.e. the rule above: the
prior then penalises boundary area the same way whatever the voxel shape
(the anisotropic-grid weighting of discrete perimeter/area estimators, see
Boykov & Kolmogorov 2003, who derive edge weights from Cauchy-Crofton for the
same purpose).  Without a voxel size the stack is taken as isotropic:
:math:`\beta_z = \beta` when :math:`\beta` is given, and a joint
pseudo-likelihood estimate of both when it is not (``coupling_z="fit"``
forces that estimate even when the voxel size is known).

References
----------
.. [1] Y. Boykov and V. Kolmogorov, "Computing geodesics and minimal surfaces
   via graph cuts", ICCV 2003, 26-33.
.. [2] J. Besag, "Statistical analysis of non-lattice data", The Statistician
   24 (1975) 179-195.
"""

from __future__ import annotations

import math

import numpy as np

from . import levels as lv
from .estimates import CleanResult, combine_diagnostics

STACK_MODES = ("volume", "planes")


def z_coupling_ratio(voxel_size):
    r"""``d_xy / d_z`` of a voxel size ``(dz, dy, dx)``; ``None`` when unknown.

    Examples
    --------
    >>> z_coupling_ratio((2.0, 0.5, 0.5))
    0.25
    >>> z_coupling_ratio(None) is None
    True
    """
    if voxel_size is None:
        return None
    dz, dy, dx = (float(v) for v in voxel_size)
    if not all(math.isfinite(v) and v > 0 for v in (dz, dy, dx)):
        raise ValueError(f"voxel size must be three positive numbers, got {voxel_size!r}")
    return math.sqrt(dx * dy) / dz


def check_stack_mode(mode):
    if mode not in STACK_MODES:
        raise ValueError(f"stack must be one of {STACK_MODES}, got {mode!r}")
    return mode


def binary_observed(a, noise):
    """The data the binary model sees, as :func:`mrfclean.binary.clean_binary` prepares it.

    Returns ``(observed, low, high)``: spins ±1 for flip noise (with the
    image's two levels), float32 intensities for Gaussian noise (with the
    mask levels of the dtype).
    """
    if noise == "flip":
        found = lv.distinct_levels(a)
        if found is None:
            raise ValueError("flip noise needs a bi-level image; this one has more than two levels")
        low, high = found[0], found[-1]
        return lv.spins_from_levels(a, high), low, high
    low, high = lv.mask_levels(a.dtype)
    return lv.to_work(a), low, high


def fixed_noise_options(noise_term):
    """``clean_binary`` keywords that fix a fitted data term."""
    d = noise_term.describe()
    if d["noise"] == "flip":
        return {"noise": "flip", "flip_rate": d["flip_rate"]}
    return {"noise": "gaussian", "levels": (d["low"], d["high"], d["sigma"])}


def clean_volume_binary(image, *, voxel_size=None, coupling="auto", coupling_z="auto",
                        rng=None, **options) -> CleanResult:
    """Clean a stack as one 3-D volume with the binary model and the default z-coupling rule.

    Parameters
    ----------
    image : ndarray, shape (Z, H, W)
    voxel_size : (dz, dy, dx), optional
        Physical voxel size (same unit); sets ``coupling_z`` when it is
        ``"auto"`` (see the module notes).
    coupling, coupling_z : float, "auto" or (coupling_z only) "fit"
    rng : int or numpy.random.Generator, optional
    **options
        Passed to :func:`mrfclean.binary.clean_binary`.

    Returns
    -------
    CleanResult
        ``params["coupling_z_rule"]`` says how ``coupling_z`` was set.
    """
    from .binary import FIT_SALT, _auto_noise, clean_binary
    from .fit.binary import fit_binary
    from .sampler import to_seed

    a = np.asarray(image)
    ratio = z_coupling_ratio(voxel_size)
    if isinstance(coupling_z, str) and coupling_z not in ("auto", "fit"):
        raise ValueError(f"coupling_z must be a number, 'auto' or 'fit', got {coupling_z!r}")
    if not isinstance(coupling_z, str) or a.ndim == 2 or a.shape[0] == 1:
        rule = "given" if not isinstance(coupling_z, str) else "single plane"
        res = clean_binary(a, coupling=coupling, coupling_z=coupling_z if not isinstance(
            coupling_z, str) else "auto", rng=rng, **options)
        res.params["coupling_z_rule"] = rule
        return res
    if coupling_z == "fit" or (ratio is None and coupling == "auto"):
        res = clean_binary(a, coupling=coupling, coupling_z="auto", rng=rng, **options)
        res.params["coupling_z_rule"] = "estimated jointly by pseudo-likelihood"
        return res
    if ratio is None:  # coupling given, voxel size unknown: isotropic
        res = clean_binary(a, coupling=coupling, coupling_z=float(coupling), rng=rng, **options)
        res.params["coupling_z_rule"] = "equal to coupling (voxel size unknown)"
        return res
    rule = f"coupling * d_xy / d_z = coupling * {ratio:.6g} (voxel size {tuple(voxel_size)})"
    if coupling != "auto":
        res = clean_binary(a, coupling=coupling, coupling_z=float(coupling) * ratio, rng=rng,
                           **options)
        res.params["coupling_z_rule"] = rule
        return res
    # coupling estimated: fit it (with the data term) first, then tie coupling_z to it
    seed = to_seed(rng)
    noise = options.pop("noise", "auto")
    noise = _auto_noise(a) if noise == "auto" else noise
    observed, _, _ = binary_observed(a, noise)
    given = {"flip_rate": options.pop("flip_rate", "auto"), "levels": options.pop("levels", "auto")}
    fit = fit_binary(observed, noise=noise, coupling="auto", coupling_z="auto",
                     flip_rate=given["flip_rate"], levels=given["levels"],
                     boundary=options.get("boundary", "free"), seed=seed ^ FIT_SALT)
    res = clean_binary(a, coupling=fit.coupling, coupling_z=fit.coupling * ratio, rng=seed,
                       **fixed_noise_options(fit.noise), **options)
    res.params["estimated"] = ["coupling"] + [k for k, v in given.items() if v == "auto"]
    res.params["coupling_z_rule"] = rule
    return res


def clean_planes(image, clean_one, *, rng=None) -> CleanResult:
    """Clean every plane of a stack on its own and stack the results.

    Parameters
    ----------
    image : ndarray, shape (Z, H, W)
    clean_one : callable
        ``clean_one(plane, rng) -> CleanResult`` for one 2-D plane.
    rng : int or numpy.random.Generator, optional
        Converted once; each plane gets its own seed from it.

    Returns
    -------
    CleanResult
        Estimates, means and stds stacked along z; ``energy`` is the sum of the
        planes' energies (the energy of the stack with no coupling between
        planes); ``params["planes"]`` lists each plane's parameters;
        diagnostics take the worst R-hat and join the notes.
    """
    a = np.asarray(image)
    if a.ndim != 3:
        raise ValueError(f"expected a stack (Z, H, W), got shape {a.shape}")
    gen = np.random.default_rng(rng)
    results = [clean_one(a[z], gen) for z in range(a.shape[0])]
    first = results[0]
    mean = None if first.mean is None else np.stack([r.mean for r in results])
    std = None if first.std is None else np.stack([r.std for r in results])
    return combine_planes(results, np.stack([r.estimate for r in results]), mean, std)


def combine_planes(results, estimate, mean, std) -> CleanResult:
    """One :class:`CleanResult` for a stack from the results of its planes (see :func:`clean_planes`)."""
    first = results[0]
    diag = combine_diagnostics([r.diagnostics for r in results],
                               [f"plane {z}" for z in range(len(results))])
    shapes = {r.energy.shape for r in results}
    energy = sum(r.energy for r in results) if len(shapes) == 1 else first.energy
    params = dict(first.params)
    params["stack"] = "planes"
    params["planes"] = [r.params for r in results]
    return CleanResult(estimate=estimate, mean=mean, std=std,
                       energy=energy, temperatures=first.temperatures, params=params,
                       diagnostics=diag, kind=first.kind, method=first.method)
