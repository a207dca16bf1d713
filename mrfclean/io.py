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
#: Luminance weights: the same as skimage.color.rgb2gray (close to ITU-R BT.709's).
COLOUR_CHOICES = ("luminance", "mean", "red", "green", "blue")
_LUMINANCE = np.array([0.2125, 0.7154, 0.0721])


class InputError(Exception):
    """A problem with one file, printed as ``path: message``."""

    def __init__(self, path, message):
        self.path = str(path)
        self.message = " ".join(str(message).split())  # always one line
        super().__init__(f"{self.path}: {self.message}")


class OutputExists(InputError):
    """An output of this input is already on disk and replacing it was not allowed."""


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


def plane_shape(path) -> tuple | None:
    """``(H, W)`` of the image (of each plane of a stack) in ``path``, from the header alone.

    ``None`` when the header cannot be read; :func:`read_image` then says what
    is wrong.
    """
    try:
        if image_format(path) == "tiff":
            import tifffile

            _quiet_tifffile()
            with tifffile.TiffFile(path) as tif:
                _, shape, is_colour = _tiff_layout(tif.series[0])
            return tuple(int(v) for v in (shape[-3:-1] if is_colour else shape[-2:]))
        from PIL import Image

        old = Image.MAX_IMAGE_PIXELS
        Image.MAX_IMAGE_PIXELS = None  # as _read_png: our own limit is checked when reading
        try:
            with Image.open(path) as im:
                return int(im.size[1]), int(im.size[0])
        finally:
            Image.MAX_IMAGE_PIXELS = old
    except Exception:
        return None


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


def _tiff_layout(series):
    """Axes and shape of a series once colour samples are last and length-1 axes are gone.

    Returns ``(axes, shape, is_colour)``; at most one axis besides Y and X (and
    colour samples) may remain, else the file is refused.
    """
    axes, shape = series.axes, tuple(series.shape)
    is_colour = "S" in axes and shape[axes.index("S")] in (3, 4)
    if is_colour:
        k = axes.index("S")
        axes = axes[:k] + axes[k + 1:] + "S"
        shape = shape[:k] + shape[k + 1:] + (shape[k],)
    core = 3 if is_colour else 2  # trailing axes always kept
    keep = [k for k in range(len(shape)) if k >= len(shape) - core or shape[k] != 1]
    axes = "".join(axes[k] for k in keep)
    shape = tuple(shape[k] for k in keep)
    extra = len(shape) - core
    if extra > 1:
        raise ValueError(f"has axes {axes} (shape {shape}); only one axis of planes "
                         "besides Y and X is supported")
    return axes, shape, is_colour


def _quiet_tifffile():
    """tifffile logs its own warnings about odd files; ours is the one line per file."""
    import logging

    logging.getLogger("tifffile").setLevel(logging.ERROR)


def _read_tiff(path, max_pixels):
    import tifffile

    _quiet_tifffile()

    with tifffile.TiffFile(path) as tif:
        if not tif.series:
            raise InputError(path, "TIFF holds no image")
        series = tif.series[0]
        _check_size(path, series.shape, max_pixels)
        try:
            axes, shape, is_colour = _tiff_layout(series)
        except ValueError as exc:
            raise InputError(path, str(exc)) from None
        raw_axes = series.axes
        array = series.asarray()
        metadata = _tiff_metadata(tif, tif.pages[0], axes)
    if "S" in raw_axes and is_colour:
        array = np.moveaxis(array, raw_axes.index("S"), -1)
    array = array.reshape(shape)
    if array.dtype.byteorder not in ("=", "|"):
        array = array.astype(array.dtype.newbyteorder("="))
    return array, metadata, is_colour


#: ImageJ description keys that tifffile derives from the array's shape when writing.
_IMAGEJ_SHAPE_KEYS = ("ImageJ", "images", "slices", "frames", "channels", "hyperstack", "axes")

#: Lengths in metres of the units used by ImageJ and OME files.
_UNIT_METRES = {"m": 1.0, "cm": 1e-2, "mm": 1e-3, "um": 1e-6, "µm": 1e-6, "\u00b5m": 1e-6,
                "micron": 1e-6, "microns": 1e-6, "micrometer": 1e-6, "micrometre": 1e-6,
                "nm": 1e-9, "nanometer": 1e-9, "pm": 1e-12, "Å": 1e-10, "angstrom": 1e-10,
                "inch": 0.0254, "in": 0.0254}


def _ome_physical_sizes(tif):
    """``{"PhysicalSizeX": ..., "PhysicalSizeXUnit": ...}`` of the first OME image, if any."""
    import tifffile

    try:
        pixels = tifffile.xml2dict(tif.ome_metadata)["OME"]["Image"]
        pixels = (pixels[0] if isinstance(pixels, list) else pixels)["Pixels"]
    except (KeyError, IndexError, TypeError, ValueError):
        return {}
    out = {}
    for ax in "XYZ":
        key = f"PhysicalSize{ax}"
        if key in pixels:
            try:
                out[key] = float(pixels[key])
            except (TypeError, ValueError):
                continue
            out[key + "Unit"] = str(pixels.get(key + "Unit", "µm"))  # OME's default unit
    return out


def _tiff_metadata(tif, page, axes):
    """What to carry over to the output TIFF.

    Keys: ``axes`` (of the array as returned), ``XResolution``/``YResolution``
    (rationals) and ``ResolutionUnit`` from the first page, ``imagej`` (the
    ImageJ description's scalar entries: spacing, unit, finterval, Info ...),
    ``ome`` (OME physical pixel sizes and units), ``description`` (a plain
    ImageDescription, neither ImageJ, OME nor tifffile's own shape record).
    """
    meta = {"axes": axes}
    tags = page.tags
    for name in ("XResolution", "YResolution"):
        if name in tags:
            meta[name] = tuple(int(v) for v in tags[name].value)
    if "ResolutionUnit" in tags:
        meta["ResolutionUnit"] = int(tags["ResolutionUnit"].value)
    if tif.is_imagej and tif.imagej_metadata:
        meta["imagej"] = {k: v for k, v in tif.imagej_metadata.items()
                          if isinstance(v, (int, float, str)) and k not in _IMAGEJ_SHAPE_KEYS}
    elif tif.is_ome and tif.ome_metadata:
        sizes = _ome_physical_sizes(tif)
        if sizes:
            meta["ome"] = sizes
    elif "ImageDescription" in tags and not tif.is_shaped:
        desc = tags["ImageDescription"].value
        if isinstance(desc, str):
            meta["description"] = desc
    return meta


def voxel_size(metadata):
    """Physical ``(dz, dy, dx)`` of a stack's voxels in one unit, or ``None`` when unknown.

    Read from the ImageJ description (``spacing`` between planes; X/Y
    resolution in pixels per ``unit``) or from OME physical sizes (converted to
    one unit).  A plain TIFF records no plane spacing, so it gives ``None``.

    Examples
    --------
    >>> voxel_size({"XResolution": (5, 1), "YResolution": (5, 1), "imagej": {"spacing": 0.6}})
    (0.6, 0.2, 0.2)
    >>> voxel_size({"XResolution": (5, 1)}) is None
    True
    """
    metadata = metadata or {}
    ij = metadata.get("imagej")
    if ij and "spacing" in ij and "XResolution" in metadata:
        def size(res):
            num, den = res
            return den / num if num else None

        dx = size(metadata["XResolution"])
        dy = size(metadata.get("YResolution", metadata["XResolution"]))
        dz = float(ij["spacing"])
        if dx and dy and dz > 0:
            return (dz, float(dy), float(dx))
        return None
    ome = metadata.get("ome")
    if ome and all(f"PhysicalSize{a}" in ome for a in "XYZ"):
        metres = []
        for a in "ZYX":
            unit = _UNIT_METRES.get(str(ome.get(f"PhysicalSize{a}Unit", "µm")))
            if unit is None:
                return None
            metres.append(float(ome[f"PhysicalSize{a}"]) * unit)
        if min(metres) <= 0:
            return None
        scale = _UNIT_METRES["µm"]
        return tuple(m / scale for m in metres)
    return None


def _read_png(path, max_pixels):
    from PIL import Image

    old = Image.MAX_IMAGE_PIXELS
    Image.MAX_IMAGE_PIXELS = None  # Pillow checks at open; our own limit is checked below
    try:
        with Image.open(path) as im:
            _check_size(path, (im.size[1], im.size[0]), max_pixels)
            im.load()
            array, mode = _png_pixels(im)
    finally:
        Image.MAX_IMAGE_PIXELS = old
    if mode == "1":
        array = array.astype(bool)
    is_colour = array.ndim == 3 and array.shape[-1] in (3, 4)
    return array, {}, is_colour


def _png_pixels(im):
    """Pixels of a loaded Pillow image, palette and alpha resolved; ``(array, mode)``."""
    mode = im.mode
    if mode == "P":
        im = im.convert("RGBA" if "transparency" in im.info else "RGB")
        mode = im.mode
    if mode in ("LA", "La", "PA"):
        im = im.convert("L")
        mode = "L"
    return np.array(im), mode


def _to_one_channel(array, colour):
    rgb = array[..., :3]
    if colour in ("red", "green", "blue"):
        return np.ascontiguousarray(rgb[..., ("red", "green", "blue").index(colour)])
    work = rgb.astype(np.float64)
    if colour == "luminance":  # summed by channel, not by a BLAS product (see GreyModel)
        grey = (work[..., 0] * _LUMINANCE[0] + work[..., 1] * _LUMINANCE[1]
                + work[..., 2] * _LUMINANCE[2])
    else:
        grey = work.mean(axis=-1)
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


def _tiff_kwargs(shape, dtype, metadata):
    """Keyword arguments of :func:`tifffile.imwrite` that carry ``metadata`` over."""
    kwargs = {"photometric": "minisblack"}
    ndim = len(shape)
    axes = metadata.get("axes")
    if not (isinstance(axes, str) and len(axes) == ndim and axes.endswith("YX")):
        axes = "ZYX" if ndim == 3 else "YX"
    if "XResolution" in metadata and "YResolution" in metadata:
        kwargs["resolution"] = (tuple(metadata["XResolution"]), tuple(metadata["YResolution"]))
        if "ResolutionUnit" in metadata:
            kwargs["resolutionunit"] = metadata["ResolutionUnit"]
    dtype = np.dtype(dtype)
    if "imagej" in metadata and dtype in (np.uint8, np.uint16, np.float32):
        ij_axes = axes if set(axes) <= set("TZCYX") else ("ZYX" if ndim == 3 else "YX")
        kwargs["imagej"] = True
        kwargs["metadata"] = dict(metadata["imagej"], axes=ij_axes)
    elif "ome" in metadata:
        kwargs["ome"] = True
        kwargs["metadata"] = dict(metadata["ome"], axes=axes)
    else:
        if "description" in metadata:
            kwargs["description"] = metadata["description"]
        kwargs["metadata"] = None
    return kwargs


def _write_tiff(path, a, metadata):
    import tifffile

    tifffile.imwrite(path, a, **_tiff_kwargs(a.shape, a.dtype, metadata))


class TiffRegions:
    """Read-only, lazily read pixels of an uncompressed TIFF series.

    Indexing with slices returns a new in-memory array of just that region;
    nothing else of the file stays mapped, so memory use is bounded by the
    regions asked for.  Built by :func:`open_image`.

    Attributes
    ----------
    shape : tuple of int
    dtype : numpy.dtype
        Native byte order (converted on reading when the file differs).
    """

    def __init__(self, path, offset, shape, file_dtype):
        self.path = Path(path)
        self.offset = int(offset)
        self.shape = tuple(int(s) for s in shape)
        self._file_dtype = np.dtype(file_dtype)
        self.dtype = self._file_dtype.newbyteorder("=")
        self.ndim = len(self.shape)
        self.size = int(np.prod(self.shape, dtype=np.int64))

    def __repr__(self):
        return f"TiffRegions({str(self.path)!r}, shape={self.shape}, dtype={self.dtype})"

    def __getitem__(self, index):
        mm = np.memmap(self.path, dtype=self._file_dtype, mode="r", offset=self.offset,
                       shape=self.shape)
        out = np.array(mm[index], dtype=self.dtype, copy=True)
        del mm  # unmapped now, so the pages read do not stay in this process
        return out

    def __array__(self, dtype=None, copy=None):
        a = self[...]
        return a if dtype is None else a.astype(dtype)


def open_image(path, *, colour: str | None = None, max_pixels: int = DEFAULT_MAX_PIXELS) -> Loaded:
    """Like :func:`read_image`, but leave an uncompressed TIFF on disk.

    For an uncompressed, contiguous TIFF the returned ``array`` is a
    :class:`TiffRegions` that reads regions on demand (tiled cleaning reads
    one band of rows at a time); any other file is read whole with
    :func:`read_image`.  Pixel values of a lazily opened image are not checked
    here (NaN, colour): the reader of the regions checks them.

    Raises
    ------
    InputError
        As :func:`read_image`.
    """
    path = Path(path)
    fmt = image_format(path)
    if fmt != "tiff" or not path.is_file():
        return read_image(path, colour=colour, max_pixels=max_pixels)
    import tifffile

    try:
        with tifffile.TiffFile(path) as tif:
            if not tif.series:
                raise InputError(path, "TIFF holds no image")
            series = tif.series[0]
            _check_size(path, series.shape, max_pixels)
            axes, shape, is_colour = _tiff_layout(series)
            offset = series.dataoffset
            metadata = _tiff_metadata(tif, tif.pages[0], axes)
            file_dtype = np.dtype(tif.byteorder + series.dtype.char)
    except InputError:
        raise
    except Exception as exc:
        raise InputError(path, f"cannot read image ({type(exc).__name__}: {exc})") from None
    if is_colour or offset is None or len(shape) not in (2, 3):
        return read_image(path, colour=colour, max_pixels=max_pixels)
    try:
        check_dtype(file_dtype)
    except ValueError as exc:
        raise InputError(path, str(exc)) from None
    if path.stat().st_size < offset + int(np.prod(shape)) * file_dtype.itemsize:
        raise InputError(path, "cannot read image (file is truncated)")
    return Loaded(TiffRegions(path, offset, shape, file_dtype), path, fmt, metadata)


class TiffBandWriter:
    """An uncompressed TIFF written band by band (see :func:`tiff_band_writer`).

    ``writer[z0:z1, i0:i1] = values`` (or ``writer[i0:i1] = values`` for a 2-D
    image) writes whole rows straight into the file.
    """

    def __init__(self, path, offset, shape, dtype):
        self.path = Path(path)
        self.offset = int(offset)
        self.shape = tuple(shape)
        self.dtype = np.dtype(dtype)
        self.ndim = len(self.shape)

    def __setitem__(self, index, values):
        shape3 = self.shape if self.ndim == 3 else (1, *self.shape)
        index = index if isinstance(index, tuple) else (index,)
        if self.ndim == 2:
            index = (slice(0, 1), *index)
        zs = index[0] if len(index) > 0 else slice(None)
        rs = index[1] if len(index) > 1 else slice(None)
        if len(index) > 2 and index[2] != slice(None):
            raise ValueError("a band writer takes whole rows only")
        z0, z1, zstep = zs.indices(shape3[0])
        i0, i1, istep = rs.indices(shape3[1])
        if zstep != 1 or istep != 1:
            raise ValueError("a band writer takes contiguous bands only")
        v = np.asarray(values, dtype=self.dtype).reshape(z1 - z0, i1 - i0, shape3[2])
        row = shape3[2] * self.dtype.itemsize
        with open(self.path, "r+b") as fh:
            for z in range(z0, z1):
                fh.seek(self.offset + (z * shape3[1] + i0) * row)
                fh.write(np.ascontiguousarray(v[z - z0]).tobytes())


@contextlib.contextmanager
def tiff_band_writer(path, shape, dtype, *, metadata=None, overwrite=False):
    """Create an uncompressed TIFF of ``shape`` and ``dtype`` and yield a :class:`TiffBandWriter`.

    The file is laid out by tifffile (same tags as :func:`write_image` would
    write for ``metadata``) with the pixels left to fill; it appears at
    ``path`` atomically when the block ends without error.
    """
    import tifffile

    dtype = np.dtype(dtype)
    with atomic_output(path, overwrite=overwrite) as tmp:
        result = tifffile.imwrite(tmp, None, shape=tuple(shape), dtype=dtype, returnoffset=True,
                                  **_tiff_kwargs(tuple(shape), dtype, metadata or {}))
        if result is None:  # pragma: no cover - tifffile always writes contiguously here
            raise ValueError(f"{path}: cannot lay out an uncompressed TIFF")
        yield TiffBandWriter(tmp, result[0], shape, dtype)


def write_map(path, values, *, overwrite=False) -> Path:
    """Write a float map (P(on), posterior std) as a float32 TIFF, atomically."""
    return write_image(path, np.asarray(values, dtype=np.float32), fmt="tiff", overwrite=overwrite)
