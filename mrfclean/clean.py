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
from .schedules import make_schedule

KINDS = ("auto", "binary", "grey")
METHODS = ("auto", "map", "mpm", "mean")


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
    strength : float or "auto"
        Grey: multiplier of the learned prior's precision.
    schedule, t_start, t_end
        Annealing schedule for MAP.
    sweeps, burn_in, samples, chains : int or None
        ``None`` takes the cleaner's default.
    boundary : {"free", "periodic"}
    uncertainty : bool
        With MAP, also sample the posterior for the mean and std maps.
    certify : bool
        Binary MAP: also compute the exact MAP energy by minimum cut.
    """

    kind: str = "auto"
    method: str = "auto"
    noise: str = "auto"
    coupling: object = "auto"
    coupling_z: object = "auto"
    flip_rate: object = "auto"
    levels: object = "auto"
    sigma: object = "auto"
    strength: object = "auto"
    schedule: str = "geometric"
    t_start: float = 3.0
    t_end: float = 0.05
    sweeps: int | None = None
    burn_in: int | None = None
    samples: int | None = None
    chains: int = 2
    boundary: str = "free"
    uncertainty: bool = False
    certify: bool = False

    def __post_init__(self):
        if self.kind not in KINDS:
            raise ValueError(f"kind must be one of {KINDS}, got {self.kind!r}")
        if self.method not in METHODS:
            raise ValueError(f"method must be one of {METHODS}, got {self.method!r}")

    def replace(self, **changes) -> "Settings":
        return dataclasses.replace(self, **changes)

    def as_dict(self) -> dict:
        return dataclasses.asdict(self)


def choose_kind(image, kind="auto") -> str:
    """``binary`` for images with at most two levels, else ``grey`` (unless forced)."""
    if kind != "auto":
        return kind
    return "binary" if lv.is_bilevel(image) else "grey"


def clean(image, *, settings: Settings | None = None, rng=None, progress=False) -> CleanResult:
    """Clean one image or stack with the binary or greyscale model.

    Parameters
    ----------
    image : ndarray, shape (H, W) or (Z, H, W)
        Not modified.
    settings : Settings, optional
        Defaults to ``Settings()``: everything automatic.
    rng : int or numpy.random.Generator, optional
    progress : bool

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
    if kind == "binary":
        method = "mpm" if s.method == "auto" else s.method
        if method == "mean":
            method = "mpm"  # the posterior mean of a binary field, thresholded, is the MPM
        return clean_binary(
            image, method=method, noise=s.noise if s.noise in ("auto", "flip", "gaussian") else "auto",
            coupling=s.coupling, coupling_z=s.coupling_z, flip_rate=s.flip_rate, levels=s.levels,
            schedule=make_schedule(s.schedule, start=s.t_start, end=s.t_end), sweeps=s.sweeps,
            burn_in=s.burn_in, samples=s.samples, chains=s.chains, boundary=s.boundary,
            uncertainty=s.uncertainty, certify=s.certify, rng=rng, progress=progress)
    from .grey import clean_grey

    return clean_grey(image, settings=s, rng=rng, progress=progress)


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


def clean_file(path, outdir, *, settings: Settings | None = None, rng=None, maps=None,
               colour=None, overwrite=False, max_pixels=io.DEFAULT_MAX_PIXELS,
               progress=False, output=None) -> FileOutcome:
    """Read ``path``, clean it, write the result into ``outdir`` (never over the input).

    Parameters
    ----------
    maps : bool or None
        Write the uncertainty maps as float32 TIFF beside the result: P(on) and
        std for binary, std for grey.  ``None``: grey yes, binary no.
    colour : str, optional
        Conversion of colour images (see :func:`mrfclean.io.read_image`).
    output : path, optional
        Exact output file instead of ``outdir / name``.

    Raises
    ------
    InputError
        Anything wrong with the input or with where its outputs would go.
    """
    t0 = time.perf_counter()
    settings = settings or Settings()
    loaded = io.read_image(path, colour=colour, max_pixels=max_pixels)
    kind = choose_kind(loaded.array, settings.kind)
    out, map_paths = output_paths(path, outdir, kind=kind)
    if output is not None:
        out = Path(output)
    for target in (out, *map_paths.values()):
        if io.same_file(target, path):
            raise io.InputError(path, f"output {target} would overwrite the input; choose another folder")
        if target.exists() and not overwrite:
            raise io.InputError(path, f"output {target} already exists; choose another folder or allow overwriting")
    want_maps = (kind == "grey") if maps is None else bool(maps)
    s = settings.replace(kind=kind)
    if want_maps and kind == "binary":
        s = s.replace(uncertainty=True)
    try:
        result = clean(loaded.array, settings=s, rng=rng, progress=progress)
    except ValueError as exc:
        raise io.InputError(path, str(exc)) from None
    written = {}
    io.write_image(out, result.estimate, fmt=loaded.format, metadata=loaded.metadata,
                   overwrite=overwrite)
    if want_maps:
        for name, target in map_paths.items():
            values = result.mean if name == "p_on" else result.std
            if values is not None:
                written[name] = io.write_map(target, values, overwrite=overwrite)
    return FileOutcome(Path(path), out, written, result, time.perf_counter() - t0)
