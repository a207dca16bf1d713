"""One entry point for any image: choose binary or grey, clean, write the outputs.

:class:`Settings` groups every option of a run (what the command line and a
config file set); :func:`clean` cleans an array; :func:`clean_file` reads one
file, cleans it and writes the result (and maps) safely.
"""

from __future__ import annotations

import dataclasses
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from . import io
from . import levels as lv
from .binary import clean_binary
from .estimates import CleanResult
from .grey import PRIORS
from .schedules import make_schedule
from .stacks import STACK_MODES
from .tiles import DEFAULT_TILE, MIN_TILE

KINDS = ("auto", "binary", "grey")
METHODS = ("auto", "map", "mpm", "mean")
NOISES = ("auto", "flip", "gaussian", "poisson-gaussian")
#: noise models each kind accepts ("gaussian" is the two-level data term for binary)
KIND_NOISES = {"binary": ("auto", "flip", "gaussian"), "grey": ("auto", "gaussian", "poisson-gaussian")}
#: :func:`clean_file` cleans a greyscale image (or stack) whose planes have more pixels
#: than this in tiles of :data:`mrfclean.tiles.DEFAULT_TILE` when no tile size is set
#: (see :func:`tiles_automatically`).  Untiled, the
#: greyscale posterior holds about 210 bytes a pixel (880 MiB above the process for a
#: 2048^2 float32 image, ``scripts/bench_scale.py``, stop 22; 3.9 GB peak for a 4096^2
#: 16-bit scan from the command line), so 2^25 pixels (a 5793^2 scan) would need about
#: 7 GB and a 10000^2 scan 20 GB: more than a workstation running two workers has.
#: Tiled, memory is bounded by a band of tiles (a 6000^2 16-bit scan peaked at 0.65 GB
#: with its tiles cleaned in the process).  Binary images need about 7 bytes a pixel
#: untiled and are tiled only when asked.
AUTO_TILE_PIXELS = 2**25


@dataclass(frozen=True)
class Settings:
    """Every option of a cleaning run; ``"auto"`` means estimate or choose it.

    Attributes
    ----------
    kind : {"auto", "binary", "grey"}
        ``"auto"``: binary when the image has at most two levels, else grey.
    method : {"auto", "map", "mpm", "mean"}
        Estimate: ``"auto"`` is MPM for binary and the posterior mean for grey.
    noise : str
        Binary: ``"flip"`` or ``"gaussian"``; grey: ``"gaussian"`` or
        ``"poisson-gaussian"``; ``"auto"`` chooses.
    coupling, coupling_z : float or "auto"
        Binary coupling ``beta`` (in-plane, and between planes of a stack).
    flip_rate : float or "auto"
    levels : (low, high, sigma) or "auto"
        Two-level Gaussian data term of the binary model.
    sigma : float or "auto"
        Grey: Gaussian noise standard deviation in image units.
    gain, read_variance : float or "auto"
        Grey, Poisson-Gaussian noise: ``Var(y | x) = gain * x + read_variance``.
    strength : float or "auto"
        Grey: multiplier of the learned prior's precision.
    curvature : float or "auto"
        Grey: weight of the second-difference (smooth-ramp) term; ``"auto"``:
        chosen by SURE, 0 when it does not help.
    prior : {"auto", "smooth", "textured", "blocks"}
        Grey: which shipped prior; ``"auto"`` picks one from the image's
        roughness (then, for a smooth 2-D image, between ``"smooth"`` and
        ``"blocks"`` by one SURE risk), or ``"smooth"`` when strength or
        curvature is set (see
        :func:`mrfclean.grey.clean_grey`, which also takes a prior file).
    schedule, t_start, t_end
        Annealing schedule for MAP.
    sweeps, burn_in, samples, chains : int or None
        ``None`` takes the cleaner's default.
    boundary : {"free", "periodic"}
    uncertainty : bool
        With MAP, also sample the posterior for the mean and std maps.
    certify : bool
        Binary MAP: also compute the exact MAP energy by minimum cut.
    stack : {"volume", "planes"}
        A stack is one 3-D volume (6 neighbours, z coupling ``coupling_z``;
        ``"auto"`` follows the voxel size, see :mod:`mrfclean.stacks`) or a
        set of planes cleaned one by one.
    tile : int or None
        Clean in square tiles of this many pixels, reading and writing band by
        band.  Binary: memory bounded by a band of tile rows plus one byte per
        pixel of state, results identical to an untiled run.  Greyscale: each
        tile sampled with a margin, memory bounded by a band of tiles, results
        equal to an untiled run within Monte-Carlo error (see
        :mod:`mrfclean.tiles`).  ``None``: untiled, except that
        :func:`clean_file` tiles greyscale files whose planes have more than
        :data:`AUTO_TILE_PIXELS` pixels (:func:`tiles_automatically`).
    """

    kind: str = "auto"
    method: str = "auto"
    noise: str = "auto"
    coupling: object = "auto"
    coupling_z: object = "auto"
    flip_rate: object = "auto"
    levels: object = "auto"
    sigma: object = "auto"
    gain: object = "auto"
    read_variance: object = "auto"
    strength: object = "auto"
    curvature: object = "auto"
    prior: str = "auto"
    schedule: str = "geometric"
    t_start: float = 3.0
    t_end: float = 0.05
    sweeps: int | None = None
    burn_in: int | None = None
    samples: int | None = None
    chains: int | None = None  # None: each cleaner's default
    boundary: str = "free"
    uncertainty: bool = False
    certify: bool = False
    stack: str = "volume"
    tile: int | None = None

    def __post_init__(self):
        if self.kind not in KINDS:
            raise ValueError(f"kind must be one of {KINDS}, got {self.kind!r}")
        if self.stack not in STACK_MODES:
            raise ValueError(f"stack must be one of {STACK_MODES}, got {self.stack!r}")
        if self.tile is not None and not (isinstance(self.tile, int) and self.tile >= MIN_TILE):
            raise ValueError(f"tile must be a whole number of at least {MIN_TILE} pixels, got {self.tile!r}")
        if self.method not in METHODS:
            raise ValueError(f"method must be one of {METHODS}, got {self.method!r}")
        if self.noise not in NOISES:
            raise ValueError(f"noise must be one of {NOISES}, got {self.noise!r}")
        if self.prior not in PRIORS:
            raise ValueError(f"prior must be one of {PRIORS}, got {self.prior!r}")

    def replace(self, **changes) -> "Settings":
        return dataclasses.replace(self, **changes)

    def as_dict(self) -> dict:
        return dataclasses.asdict(self)


def choose_kind(image, kind="auto") -> str:
    """``binary`` for images with at most two levels, else ``grey`` (unless forced)."""
    if kind != "auto":
        return kind
    return "binary" if lv.is_bilevel(image) else "grey"


def clean(image, *, settings: Settings | None = None, rng=None, progress=False,
          voxel_size=None) -> CleanResult:
    """Clean one image or stack with the binary or greyscale model.

    Parameters
    ----------
    image : ndarray, shape (H, W) or (Z, H, W)
        Not modified.
    settings : Settings, optional
        Defaults to ``Settings()``: everything automatic.
    rng : int or numpy.random.Generator, optional
    progress : bool
    voxel_size : (dz, dy, dx), optional
        Physical voxel size of a stack (sets the default z coupling).

    Returns
    -------
    CleanResult

    Examples
    --------
    >>> import numpy as np
    >>> img = np.zeros((16, 16), np.uint8); img[4:12, 4:12] = 1
    >>> clean(img, rng=0).kind
    'binary'
    """
    s = settings or Settings()
    kind = choose_kind(image, s.kind)
    if s.noise not in KIND_NOISES[kind]:
        raise ValueError(f"noise {s.noise!r} does not fit the {kind} model; choose one of "
                         f"{', '.join(KIND_NOISES[kind])}")
    stack = np.ndim(image) == 3 and np.shape(image)[0] > 1
    if stack and s.stack == "planes":
        from .stacks import clean_planes

        one = s.replace(kind=kind, stack="volume")
        return clean_planes(image, lambda plane, gen: clean(plane, settings=one, rng=gen,
                                                            progress=progress), rng=rng)
    if s.tile is not None:
        from .tiles import clean_tiled

        return clean_tiled(image, settings=s.replace(kind=kind), voxel_size=voxel_size, rng=rng,
                           progress=progress)
    if kind == "binary":
        method = "mpm" if s.method == "auto" else s.method
        if method == "mean":
            method = "mpm"  # the posterior mean of a binary field, thresholded, is the MPM
        binary = clean_binary
        if stack:
            from functools import partial

            from .stacks import clean_volume_binary
            binary = partial(clean_volume_binary, voxel_size=voxel_size)
        return binary(
            image, method=method, noise=s.noise,
            coupling=s.coupling, coupling_z=s.coupling_z, flip_rate=s.flip_rate, levels=s.levels,
            schedule=make_schedule(s.schedule, start=s.t_start, end=s.t_end), sweeps=s.sweeps,
            burn_in=s.burn_in, samples=s.samples, chains=s.chains, boundary=s.boundary,
            uncertainty=s.uncertainty, certify=s.certify, rng=rng, progress=progress)
    from .grey import clean_grey

    method = "mean" if s.method in ("auto", "mpm") else s.method
    return clean_grey(
        image, method=method, noise=s.noise,
        sigma=s.sigma, gain=s.gain, read_variance=s.read_variance, strength=s.strength,
        curvature=s.curvature, prior=s.prior,
        schedule=make_schedule(s.schedule, start=s.t_start, end=s.t_end), sweeps=s.sweeps,
        burn_in=s.burn_in, samples=s.samples, chains=s.chains, rng=rng, progress=progress)


@dataclass
class FileOutcome:
    """What :func:`clean_file` did for one input."""

    input: Path
    output: Path
    maps: dict
    result: CleanResult
    seconds: float


def output_paths(input_path, outdir, *, kind):
    """Where the cleaned image and its maps go: same name in ``outdir``, maps beside it."""
    input_path, outdir = Path(input_path), Path(outdir)
    out = outdir / input_path.name
    stem = input_path.name[: -len(input_path.suffix)] if input_path.suffix else input_path.name
    maps = {"p_on": outdir / f"{stem}_p_on.tif", "std": outdir / f"{stem}_std.tif"}
    if kind == "grey":
        maps = {"std": outdir / f"{stem}_std.tif"}
    return out, maps


def check_targets(path, targets, *, overwrite=False):
    """Refuse outputs that would replace the input, or an existing file unless ``overwrite``."""
    for target in targets:
        if io.same_file(target, path):
            raise io.InputError(path, f"output {target} would overwrite the input; choose another folder")
        if Path(target).exists() and not overwrite:
            raise io.OutputExists(path, f"output {target} already exists; choose another folder or allow overwriting")


def tiles_automatically(path, settings: Settings, *, colour=None,
                        max_pixels=io.DEFAULT_MAX_PIXELS) -> bool:
    """Whether :func:`clean_file` cleans ``path`` in tiles although ``settings.tile`` is None.

    True for a greyscale image whose planes have more than
    :data:`AUTO_TILE_PIXELS` pixels (a stack is measured by its planes: tiles
    span every plane, so a stack of small planes gains nothing from them).
    The plane size comes from the file's header; with ``kind="auto"`` the
    levels are then scanned band by band (an uncompressed TIFF is not read
    whole for it).  False when the header cannot be read: reading the file
    then says what is wrong.

    Raises
    ------
    InputError
        When the scan finds NaN or infinite values, or the file cannot be read.
    """
    if settings.tile is not None or settings.kind == "binary":
        return False
    plane = io.plane_shape(path)
    if plane is None or plane[0] * plane[1] <= AUTO_TILE_PIXELS:
        return False
    if settings.kind == "grey":
        return True
    from .tiles import VolumeRows, scan_levels

    loaded = io.open_image(path, colour=colour, max_pixels=max_pixels)
    try:
        return scan_levels(VolumeRows(loaded.array)) is None  # more than two levels
    except ValueError as exc:
        raise io.InputError(path, str(exc)) from None


def clean_file(path, outdir, *, settings: Settings | None = None, rng=None, maps=None,
               colour=None, overwrite=False, max_pixels=io.DEFAULT_MAX_PIXELS,
               progress=False, output=None, tile_executor=None) -> FileOutcome:
    """Read ``path``, clean it, write the result into ``outdir`` (never over the input).

    A greyscale file whose planes have more than :data:`AUTO_TILE_PIXELS` pixels
    is cleaned in tiles of :data:`mrfclean.tiles.DEFAULT_TILE` when
    ``settings.tile`` is None (see :func:`tiles_automatically`; the parameters
    then record ``tile``).

    Parameters
    ----------
    maps : bool or None
        Write the uncertainty maps as float32 TIFF beside the result: P(on) and
        std for binary, std for grey.  ``None``: grey yes, binary no.
    colour : str, optional
        Conversion of colour images (see :func:`mrfclean.io.read_image`).
    output : path, optional
        Exact output file instead of ``outdir / name``.
    tile_executor : optional
        Where the tiles of a tiled greyscale image run (see
        :func:`mrfclean.tiles.clean_grey_tiled`); default here.

    Raises
    ------
    InputError
        Anything wrong with the input or with where its outputs would go.
    """
    t0 = time.perf_counter()
    settings = settings or Settings()
    if tiles_automatically(path, settings, colour=colour, max_pixels=max_pixels):
        settings = settings.replace(kind="grey", tile=DEFAULT_TILE)
    if settings.tile is not None:
        from .tiles import clean_file_tiled

        return clean_file_tiled(path, outdir, settings=settings, rng=rng, maps=maps, colour=colour,
                                overwrite=overwrite, max_pixels=max_pixels, progress=progress,
                                output=output, tile_executor=tile_executor)
    loaded = io.read_image(path, colour=colour, max_pixels=max_pixels)
    kind = choose_kind(loaded.array, settings.kind)
    out, map_paths = output_paths(path, outdir, kind=kind)
    if output is not None:
        out = Path(output)
    check_targets(path, (out, *map_paths.values()), overwrite=overwrite)
    want_maps = (kind == "grey") if maps is None else bool(maps)
    s = settings.replace(kind=kind)
    if str(loaded.metadata.get("axes", ""))[:1] == "C" and loaded.array.ndim == 3:
        s = s.replace(stack="planes")  # channels are not neighbours in space: never couple them
    if want_maps and kind == "binary":
        s = s.replace(uncertainty=True)
    try:
        result = clean(loaded.array, settings=s, rng=rng, progress=progress,
                       voxel_size=io.voxel_size(loaded.metadata))
    except ValueError as exc:
        raise io.InputError(path, str(exc)) from None
    written = {}
    try:
        io.write_image(out, result.estimate, fmt=loaded.format, metadata=loaded.metadata,
                       overwrite=overwrite)
        written["image"] = out
        if want_maps:
            for name, target in map_paths.items():
                values = result.mean if name == "p_on" else result.std
                if values is not None:
                    written[name] = io.write_map(target, values, overwrite=overwrite)
    except BaseException:
        for p in written.values():  # all or nothing: no result without its maps
            Path(p).unlink(missing_ok=True)
        raise
    written.pop("image")
    return FileOutcome(Path(path), out, written, result, time.perf_counter() - t0)
