"""The one place for dtype and range rules.

* Integer input is processed in float32 *physical units* (no rescaling to
  [0, 1]) and written back in its own dtype, rounded and clipped to the dtype's
  valid range.
* Float input stays in its own units and is written back in its own dtype.
* Bi-level images keep their two levels: "on" is the higher one.
"""

from __future__ import annotations

import numpy as np

SUPPORTED_KINDS = "buif"


def check_dtype(dtype) -> np.dtype:
    """Accept bool, integer and real float dtypes; refuse anything else."""
    dtype = np.dtype(dtype)
    if dtype.kind not in SUPPORTED_KINDS or dtype.itemsize > 8:
        raise ValueError(f"unsupported pixel type {dtype}")
    return dtype


def dtype_range(dtype) -> tuple[float, float] | None:
    """``(min, max)`` of an integer or bool dtype; ``None`` for floats."""
    dtype = check_dtype(dtype)
    if dtype.kind == "b":
        return (0.0, 1.0)
    if dtype.kind in "ui":
        info = np.iinfo(dtype)
        return (float(info.min), float(info.max))
    return None


def to_work(image) -> np.ndarray:
    """Float32 copy of ``image`` in its own units (a new array, never a view)."""
    a = np.asarray(image)
    check_dtype(a.dtype)
    return np.array(a, dtype=np.float32, copy=True)


def from_work(values, dtype) -> np.ndarray:
    """Convert work values back to ``dtype``: round and clip for integers, cast for floats."""
    dtype = check_dtype(dtype)
    v = np.asarray(values)
    rng = dtype_range(dtype)
    if rng is None:
        return v.astype(dtype)
    if dtype.kind == "b":
        return v > 0.5
    return np.clip(np.rint(v), rng[0], rng[1]).astype(dtype)


def distinct_levels(image, *, most: int = 2):
    """The sorted distinct values of ``image`` if there are at most ``most``, else ``None``."""
    a = np.asarray(image)
    if a.size == 0:
        raise ValueError("empty image")
    if a.dtype.itemsize == 1:
        codes = np.flatnonzero(np.bincount(a.view(np.uint8).ravel(), minlength=256))
        if len(codes) > most:
            return None
        return np.sort(codes.astype(np.uint8).view(a.dtype))
    first = a.flat[0]
    other = a[a != first]
    if other.size == 0:
        return np.array([first])
    second = other.flat[0]
    if most >= 2 and np.all((a == first) | (a == second)):
        return np.sort(np.array([first, second], dtype=a.dtype))
    return None


def is_bilevel(image) -> bool:
    """True when ``image`` has at most two distinct values."""
    return distinct_levels(image) is not None


def spins_from_levels(image, high) -> np.ndarray:
    """+1 where ``image == high``, -1 elsewhere (int8)."""
    return np.where(np.asarray(image) == high, np.int8(1), np.int8(-1))


def levels_from_spins(spins, low, high, dtype) -> np.ndarray:
    """``high`` where the spin is +1, ``low`` elsewhere, in ``dtype``."""
    dtype = check_dtype(dtype)
    out = np.where(np.asarray(spins) > 0, np.asarray(high, dtype=dtype), np.asarray(low, dtype=dtype))
    return out.astype(dtype, copy=False)


def mask_levels(dtype) -> tuple:
    """The two levels of a mask written in ``dtype``: 0 and the dtype's maximum (1.0 for floats)."""
    rng = dtype_range(dtype)
    if rng is None:
        return (0.0, 1.0)
    return (0, rng[1]) if np.dtype(dtype).kind != "b" else (False, True)
