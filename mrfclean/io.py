"""Reading and writing images safely.

* TIFF (tifffile) and PNG (Pillow) in; the same format out.
* Every problem with an input becomes an :class:`InputError` that prints as one
  line, ``path: what is wrong``.
* Outputs are written atomically (a temporary file in the same folder, then a
  rename), never over an input, and never over an existing file unless asked.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .levels import check_dtype, from_work

TIFF_SUFFIXES = (".tif", ".tiff")
PNG_SUFFIXES = (".png",)
IMAGE_SUFFIXES = TIFF_SUFFIXES + PNG_SUFFIXES

#: Default safety limit against decompression bombs: 2**31 pixels (about 2.1 gigapixels).
DEFAULT_MAX_PIXELS = 2**31

#: Colour conversions accepted by ``read_image(colour=...)``.
#: Luminance weights are ITU-R BT.709 (as in skimage.color.rgb2gray).
COLOUR_CHOICES = ("luminance", "mean", "red", "green", "blue")
_LUMINANCE = np.array([0.2125, 0.7154, 0.0721])


class InputError(Exception):
    """A problem with one file, printed as ``path: message``."""

    def __init__(self, path, message):
        self.path = str(path)
        self.message = " ".join(str(message).split())  # always one line
        super().__init__(f"{self.path}: {self.message}")


@dataclass
class Loaded:
    """An image read from disk.

    Attributes
    ----------
    array : ndarray
        Pixels, ``(H, W)`` or ``(Z, H, W)``.
    path : Path
    format : {"tiff", "png"}
    metadata : dict
        What the writer should carry over (resolution, description, axes ...).
    """

    array: np.ndarray
    path: Path
    format: str
    metadata: dict = field(default_factory=dict)


def image_format(path) -> str:
    """``"tiff"`` or ``"png"`` from the file name; InputError for anything else."""
    suffix = Path(path).suffix.lower()
    if suffix in TIFF_SUFFIXES:
        return "tiff"
    if suffix in PNG_SUFFIXES:
        return "png"
    raise InputError(path, f"unsupported file type {suffix or '(none)'!r}; use TIFF or PNG")


def read_image(path, *, colour: str | None = None, max_pixels: int = DEFAULT_MAX_PIXELS) -> Loaded:
    """Read one TIFF or PNG image and check that it can be cleaned.

    Parameters
    ----------
    path : str or Path
    colour : {"luminance", "mean", "red", "green", "blue"}, optional
        How to turn a colour image into one channel.  Without it a colour image
        is refused, so that nothing is converted silently.
    max_pixels : int
        Refuse images with more pixels than this (decompression-bomb guard).

    Raises
    ------
    InputError
        Missing, unreadable or truncated file; unsupported type; colour image
        without ``colour``; NaN or infinite values; empty or too large image.
    """
    path = Path(path)
    fmt = image_format(path)
    if not path.exists():
        raise InputError(path, "no such file")
    if path.is_dir():
        raise InputError(path, "is a folder, not an image")
    if colour is not None and colour not in COLOUR_CHOICES:
        raise InputError(path, f"unknown colour conversion {colour!r}; choose from {', '.join(COLOUR_CHOICES)}")
    try:
        if fmt == "tiff":
            array, metadata, is_colour = _read_tiff(path, max_pixels)
        else:
            array, metadata, is_colour = _read_png(path, max_pixels)
    except InputError:
        raise
    except MemoryError:
        raise InputError(path, "not enough memory to read this image") from None
    except Exception as exc:  # any decoder failure is the file's problem, said in one line
        raise InputError(path, f"cannot read image ({type(exc).__name__}: {exc})") from None
    if is_colour:
        if colour is None:
            raise InputError(path, "colour image; choose a conversion to one channel "
                                   f"({', '.join(COLOUR_CHOICES)})")
        array = _to_one_channel(array, colour)
    return Loaded(check_pixels(array, path), path, fmt, metadata)


def check_pixels(array, path="<array>") -> np.ndarray:
    """Refuse arrays that cannot be cleaned; return them unchanged otherwise."""
    a = np.asarray(array)
    try:
        check_dtype(a.dtype)
    except ValueError as exc:
        raise InputError(path, str(exc)) from None
    if a.size == 0:
        raise InputError(path, "empty image (no pixels)")
    if a.ndim not in (2, 3):
        raise InputError(path, f"expected a 2-D image or a stack of planes, got shape {a.shape}")
    if a.dtype.kind == "f" and not np.all(np.isfinite(a)):
        bad = int(np.count_nonzero(~np.isfinite(a)))
        raise InputError(path, f"{bad} pixel(s) are NaN or infinite")
    return a


def _check_size(path, shape, max_pixels):
    n = int(np.prod(shape, dtype=np.int64))
    if n == 0:
        raise InputError(path, "empty image (no pixels)")
    if n > max_pixels:
        raise InputError(path, f"{n} pixels exceeds the safety limit of {max_pixels}; "
                               "raise the limit if the file is trusted")


def _read_tiff(path, max_pixels):
    import tifffile

    with tifffile.TiffFile(path) as tif:
        if not tif.series:
            raise InputError(path, "TIFF holds no image")
        series = tif.series[0]
        _check_size(path, series.shape, max_pixels)
        axes = series.axes
        array = series.asarray()
        page = tif.pages[0]
        metadata = _tiff_metadata(tif, page, axes)
    is_colour = "S" in axes and array.shape[axes.index("S")] in (3, 4)
    if is_colour:
        array = np.moveaxis(array, axes.index("S"), -1)
    array = np.squeeze(array) if array.ndim > (3 if is_colour else 2) else array
    if is_colour and array.ndim == 2:
        is_colour = False
    return array, metadata, is_colour


def _tiff_metadata(tif, page, axes):
    """What to carry over to the output TIFF: resolution, unit, description, axes."""
    meta = {"axes": axes}
    tags = page.tags
    for name in ("XResolution", "YResolution"):
        if name in tags:
            meta[name] = tags[name].value
    if "ResolutionUnit" in tags:
        meta["ResolutionUnit"] = int(tags["ResolutionUnit"].value)
    if tif.is_imagej and tif.imagej_metadata:
        meta["imagej"] = {k: v for k, v in tif.imagej_metadata.items()
                          if isinstance(v, (int, float, str))}
    elif "ImageDescription" in tags and not tif.is_shaped:
        desc = tags["ImageDescription"].value
        if isinstance(desc, str):
            meta["description"] = desc
    return meta


def _read_png(path, max_pixels):
    from PIL import Image

    with Image.open(path) as im:
        _check_size(path, (im.size[1], im.size[0]), max_pixels)
        old = Image.MAX_IMAGE_PIXELS
        Image.MAX_IMAGE_PIXELS = None  # our own limit was checked above
        try:
            im.load()
        finally:
            Image.MAX_IMAGE_PIXELS = old
        mode = im.mode
        if mode == "P":
            im = im.convert("RGBA" if "transparency" in im.info else "RGB")
            mode = im.mode
        if mode in ("LA", "La", "PA"):
            im = im.convert("L")
            mode = "L"
        array = np.array(im)
    if mode == "1":
        array = array.astype(bool)
    is_colour = array.ndim == 3 and array.shape[-1] in (3, 4)
    return array, {}, is_colour


def _to_one_channel(array, colour):
    rgb = array[..., :3]
    if colour in ("red", "green", "blue"):
        return np.ascontiguousarray(rgb[..., ("red", "green", "blue").index(colour)])
    work = rgb.astype(np.float64)
    grey = work @ _LUMINANCE if colour == "luminance" else work.mean(axis=-1)
    return from_work(grey, array.dtype)


# ---------------------------------------------------------------------------
# writing
# ---------------------------------------------------------------------------
def same_file(a, b) -> bool:
    """True when two paths name the same file (or would, once created)."""
    a, b = Path(a), Path(b)
    try:
        if a.exists() and b.exists():
            return os.path.samefile(a, b)
    except OSError:
        pass
    return a.resolve() == b.resolve()


@contextlib.contextmanager
def atomic_output(path, *, overwrite=False):
    """Yield a temporary path beside ``path``; on success move it into place.

    Without ``overwrite`` an existing file at ``path`` is never replaced (the
    final step is a hard link, which fails if the name exists).  On any error
    the temporary file is removed and ``path`` is untouched.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    if path.exists() and not overwrite:
        raise FileExistsError(f"{path}: already exists; choose another output folder or allow overwriting")
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".part" + path.suffix)
    os.close(fd)
    tmp = Path(tmp)
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(tmp, 0o666 & ~umask)  # mkstemp makes 0600; results should read like any file
    try:
        yield tmp
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        if overwrite:
            os.replace(tmp, path)
        else:
            try:
                os.link(tmp, path)
            except FileExistsError:
                raise FileExistsError(f"{path}: already exists; choose another output folder "
                                      "or allow overwriting") from None
            except OSError:  # file system without hard links
                if path.exists():
                    raise FileExistsError(f"{path}: already exists") from None
                os.replace(tmp, path)
    finally:
        with contextlib.suppress(FileNotFoundError):
            tmp.unlink()


def write_image(path, array, *, fmt=None, metadata=None, overwrite=False) -> Path:
    """Write ``array`` atomically as TIFF or PNG (chosen from ``fmt`` or the name).

    PNG holds 2-D bool, uint8 and uint16 images; anything else needs TIFF.
    ``metadata`` (from :class:`Loaded`) is carried into TIFF tags.
    """
    path = Path(path)
    fmt = fmt or image_format(path)
    a = np.asarray(array)
    if fmt == "png":
        if a.ndim != 2 or a.dtype not in (np.bool_, np.uint8, np.uint16):
            raise ValueError(f"{path}: PNG holds 2-D 8/16-bit images only, got {a.dtype} {a.shape}; use TIFF")
    with atomic_output(path, overwrite=overwrite) as tmp:
        if fmt == "png":
            from PIL import Image

            img = Image.fromarray(a.astype(np.uint8) * 255 if a.dtype == np.bool_ else a)
            if a.dtype == np.bool_:
                img = img.convert("1")
            img.save(tmp, format="PNG")
        else:
            _write_tiff(tmp, a, metadata or {})
    return path


def _write_tiff(path, a, metadata):
    import tifffile

    kwargs = {"photometric": "minisblack"}
    if "XResolution" in metadata and "YResolution" in metadata:
        kwargs["resolution"] = (metadata["XResolution"], metadata["YResolution"])
        if "ResolutionUnit" in metadata:
            kwargs["resolutionunit"] = metadata["ResolutionUnit"]
    if "imagej" in metadata and a.dtype in (np.uint8, np.uint16, np.float32):
        kwargs["imagej"] = True
        kwargs["metadata"] = dict(metadata["imagej"], axes="ZYX" if a.ndim == 3 else "YX")
    else:
        if "description" in metadata:
            kwargs["description"] = metadata["description"]
        kwargs["metadata"] = None
    tifffile.imwrite(path, a, **kwargs)


def write_map(path, values, *, overwrite=False) -> Path:
    """Write a float map (P(on), posterior std) as a float32 TIFF, atomically."""
    return write_image(path, np.asarray(values, dtype=np.float32), fmt="tiff", overwrite=overwrite)
