"""Cleaning bi-level images: the binary pipeline from pixels to a :class:`CleanResult`.

levels → spins or intensities → parameters (given or estimated) → annealed MAP
or posterior marginals (MPM) → the same two levels out.
"""

from __future__ import annotations

import numpy as np

from . import levels as lv
from .estimates import (CleanResult, Diagnostics, anneal, record_posterior,
                        sample_posterior)
from .fit.binary import fit_binary
from .lattice import Grid
from .models.binary import BinaryModel
from .sampler import to_seed
from .schedules import Geometric, Schedule

METHODS = ("mpm", "map")
NOISES = ("auto", "flip", "gaussian")

#: Defaults chosen with scripts/bench_binary.py (see README, "Benchmarks").
DEFAULT_ANNEAL_SWEEPS = 300
DEFAULT_BURN_IN = 100
DEFAULT_SAMPLES = 400
DEFAULT_CHAINS = 2
#: The parameter fit and the sampling runs draw from streams of different seeds.
FIT_SALT = 0x3C6EF372FE94F82A
POSTERIOR_SALT = 0x5A5A5A5A


def _auto_noise(image):
    return "flip" if lv.is_bilevel(image) else "gaussian"


def clean_binary(image, *, method="mpm", noise="auto", coupling="auto", coupling_z="auto",
                 flip_rate="auto", levels="auto", schedule: Schedule | None = None,
                 sweeps=None, burn_in=None, samples=None, chains=None,
                 boundary="free", uncertainty=False, certify=False, rng=None,
                 progress=False) -> CleanResult:
    """Clean a bi-level image (or a stack of them) with an Ising posterior.

    The prior couples 4 neighbours in-plane (and 2 along z for a stack) with
    coupling ``beta``; the data term is flip noise for two-valued images and a
    two-level Gaussian for greyscale scans of bi-level specimens.  See
    :mod:`mrfclean.models.binary` for the energy.

    Parameters
    ----------
    image : ndarray, shape (H, W) or (Z, H, W)
        Bool, integer or float pixels.  Not modified.
    method : {"mpm", "map"}
        ``"mpm"``: each pixel on where its posterior marginal P(on) > 1/2
        (temperature-1 chains; minimises the expected number of wrong pixels).
        ``"map"``: the most probable image, by simulated annealing then ICM.
    noise : {"auto", "flip", "gaussian"}
        ``"auto"``: flip noise when the image has at most two levels, else
        two-level Gaussian.
    coupling, coupling_z : float or "auto"
        ``beta`` (and the between-plane coupling); ``"auto"`` estimates them by
        maximum pseudo-likelihood inside stochastic EM (Besag 1975; Chalmond 1989).
    flip_rate : float or "auto"
        Flip probability for ``noise="flip"``.
    levels : (low, high, sigma) or "auto"
        Gaussian levels for ``noise="gaussian"``.
    schedule : Schedule, optional
        Annealing schedule for ``"map"``; default geometric 3.0 → 0.05.
    sweeps : int, optional
        Annealing sweeps per chain (``"map"``).
    burn_in, samples : int, optional
        Sweeps discarded and kept per temperature-1 chain.
    chains : int, optional
        Independent chains (R-hat needs at least 2); default :data:`DEFAULT_CHAINS`.
    boundary : {"free", "periodic"}
    uncertainty : bool
        With ``"map"``, also run temperature-1 chains for P(on) and its std.
    certify : bool
        Also compute the exact MAP energy by minimum cut (Greig, Porteous &
        Seheult 1989) and report the gap.
    rng : int or numpy.random.Generator, optional
    progress : bool
        Show a progress bar over sweeps.

    Returns
    -------
    CleanResult
        ``estimate`` has the input's shape, dtype and two levels (for
        ``noise="gaussian"``: 0 and the dtype's maximum); ``mean`` is P(on).

    References
    ----------
    .. [1] S. Geman and D. Geman, IEEE TPAMI 6 (1984) 721-741.
    .. [2] J. Marroquin, S. Mitter and T. Poggio, "Probabilistic solution of
       ill-posed problems in computational vision", JASA 82 (1987) 76-89 (MPM).
    .. [3] D. M. Greig, B. T. Porteous and A. H. Seheult, J. R. Stat. Soc. B 51
       (1989) 271-279.

    Examples
    --------
    >>> import numpy as np
    >>> img = np.zeros((32, 32), np.uint8); img[8:24, 8:24] = 255
    >>> noisy = img.copy(); noisy[5, 5] = 255; noisy[16, 16] = 0
    >>> out = clean_binary(noisy, rng=1)
    >>> bool((out.estimate == img).all()), out.estimate.dtype
    (True, dtype('uint8'))
    """
    if method not in METHODS:
        raise ValueError(f"method must be one of {METHODS}, got {method!r}")
    if noise not in NOISES:
        raise ValueError(f"noise must be one of {NOISES}, got {noise!r}")
    a = np.asarray(image)
    lv.check_dtype(a.dtype)
    if a.ndim not in (2, 3) or a.size == 0:
        raise ValueError(f"expected a non-empty 2-D image or 3-D stack, got shape {a.shape}")
    if a.dtype.kind == "f" and not np.all(np.isfinite(a)):
        raise ValueError("image contains NaN or infinite values")
    chains = DEFAULT_CHAINS if chains is None else int(chains)
    noise = _auto_noise(a) if noise == "auto" else noise
    grid = Grid.for_image(a, boundary=boundary)
    seed = to_seed(rng)

    if noise == "flip":
        found = lv.distinct_levels(a)
        if found is None:
            raise ValueError("flip noise needs a bi-level image; this one has more than two levels")
        low, high = found[0], found[-1]
        observed = lv.spins_from_levels(a, high).reshape(grid.shape)
    else:
        low, high = lv.mask_levels(a.dtype)
        observed = lv.to_work(a).reshape(grid.shape)

    fit = fit_binary(observed, noise=noise, coupling=coupling, coupling_z=coupling_z,
                     flip_rate=flip_rate, levels=levels, boundary=boundary, seed=seed ^ FIT_SALT)
    start = observed if noise == "flip" else None
    model = BinaryModel(fit.noise.field(observed), coupling=fit.coupling,
                        coupling_z=fit.coupling_z, grid=grid, start=start)
    diag = Diagnostics()
    params = {"method": method, "chains": chains, "boundary": boundary, "seed": seed,
              "levels_out": [float(low), float(high)], **fit.describe(),
              "estimated": [k for k, v in (("coupling", coupling), ("coupling_z", coupling_z),
                                           ("flip_rate", flip_rate),
                                           ("levels", levels)) if v == "auto"]}
    mean = std = None
    if method == "map":
        schedule = schedule or Geometric(3.0, 0.05)
        sweeps = int(DEFAULT_ANNEAL_SWEEPS if sweeps is None else sweeps)
        res = anneal(model, schedule=schedule, sweeps=sweeps, chains=chains, seed=seed,
                     progress=progress)
        spins = model.image(res.state)
        diag.final_energy = res.energy
        diag.quench_passes = int(res.run.quench_passes[res.chain])
        energy, temps = res.run.energies, res.run.temperatures
        params.update(schedule.describe(), sweeps=sweeps)
    if method == "mpm" or uncertainty:
        burn_in = int(DEFAULT_BURN_IN if burn_in is None else burn_in)
        samples = int(DEFAULT_SAMPLES if samples is None else samples)
        post = sample_posterior(model, burn_in=burn_in, samples=samples, chains=chains,
                                seed=seed ^ POSTERIOR_SALT, progress=progress)
        mean, std = post.tally.mean(), post.tally.std()
        record_posterior(diag, post)
        params.update(burn_in=burn_in, samples=samples)
        if method == "mpm":
            spins = np.where(mean > 0.5, np.int8(1), np.int8(-1))
            diag.final_energy = model.energy_of_spins(spins)
            energy, temps = post.run.energies, post.run.temperatures
    if certify:
        from .exact import exact_map

        ex = exact_map(model)
        diag.exact_energy = float(ex.energy)
        diag.energy_gap = float((diag.final_energy - ex.energy) / max(abs(ex.energy), 1e-300))
    estimate = lv.levels_from_spins(spins, low, high, a.dtype).reshape(a.shape)
    if mean is not None:
        mean, std = mean.reshape(a.shape), std.reshape(a.shape)
    return CleanResult(estimate=estimate, mean=mean, std=std, energy=energy, temperatures=temps,
                       params=params, diagnostics=diag, kind="binary", method=method)

