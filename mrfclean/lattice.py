"""The pixel grid as the kernels see it: shape, boundary, origin, packed layout.

A :class:`Grid` describes a lattice of shape ``(Z, H, W)`` (2-D images have
``Z = 1``), its boundary and where it sits inside a larger image (for tiles).
It converts between image arrays and the packed red-black layout of
:mod:`mrfclean.kernels`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import kernels

BOUNDARIES = ("free", "periodic")


@dataclass(frozen=True)
class Grid:
    """Geometry of a lattice.

    Parameters
    ----------
    shape : tuple of int
        ``(Z, H, W)``.
    boundary : {"free", "periodic"}
        Free: sites on the edge have fewer neighbours.  Periodic: opposite
        edges are neighbours (in-plane only; needs even ``H`` and ``W``).
    origin : tuple of int
        ``(z0, i0, j0)`` of this lattice inside the whole image.
    full_shape : tuple of int or None
        ``(Z, H, W)`` of the whole image; defaults to ``shape``.
    """

    shape: tuple[int, int, int]
    boundary: str = "free"
    origin: tuple[int, int, int] = (0, 0, 0)
    full_shape: tuple[int, int, int] | None = None

    def __post_init__(self):
        if len(self.shape) != 3 or min(self.shape) < 1:
            raise ValueError(f"grid shape must be three positive sizes, got {self.shape}")
        if self.boundary not in BOUNDARIES:
            raise ValueError(f"boundary must be one of {BOUNDARIES}, got {self.boundary!r}")
        if self.boundary == "periodic" and (self.shape[1] % 2 or self.shape[2] % 2):
            raise ValueError(
                "a periodic boundary needs even height and width "
                f"(two-colour updates), got {self.shape[1]}x{self.shape[2]}"
            )
        if self.full_shape is None:
            object.__setattr__(self, "full_shape", tuple(self.shape))

    @classmethod
    def for_image(cls, image, *, boundary="free"):
        """Grid of a 2-D ``(H, W)`` or 3-D ``(Z, H, W)`` array."""
        return cls(shape=as_volume_shape(np.shape(image)), boundary=boundary)

    @property
    def periodic(self) -> bool:
        return self.boundary == "periodic"

    @property
    def parity(self) -> int:
        return int(sum(self.origin)) & 1

    @property
    def packed_shape(self) -> tuple[int, int, int, int]:
        Z, H, W = self.shape
        return (2, Z, H + 2, (W + 1) // 2 + 2)

    @property
    def size(self) -> int:
        Z, H, W = self.shape
        return Z * H * W

    def kernel_geometry(self):
        """Positional arguments ``(q, z0, i0, j0, GH, GW)`` of the sweep kernels."""
        z0, i0, j0 = self.origin
        _, GH, GW = self.full_shape
        return (self.parity, z0, i0, j0, GH, GW)

    def pack(self, values, dtype):
        """Packed copy of an image-layout array (halo zero, or wrapped if periodic)."""
        a = np.ascontiguousarray(np.asarray(values, dtype=dtype).reshape(self.shape))
        out = np.zeros(self.packed_shape, dtype=dtype)
        kernels.pack(a, out, self.parity)
        if self.periodic:
            self.refresh(out)
        return out

    def unpack(self, packed, dtype=None):
        """Image-layout ``(Z, H, W)`` copy of a packed array."""
        out = np.empty(self.shape, dtype=dtype or packed.dtype)
        kernels.unpack(packed, out, self.parity)
        return out

    def refresh(self, packed):
        """Bring the halo of a periodic packed array up to date (no-op for free)."""
        if self.periodic:
            _, H, W = self.shape
            for c in range(2):
                kernels.refresh_halo(packed[c], H, (W + 1) // 2)


def as_volume_shape(shape):
    """``(H, W) -> (1, H, W)``; ``(Z, H, W)`` unchanged; anything else is an error."""
    shape = tuple(int(s) for s in shape)
    if len(shape) == 2:
        return (1, *shape)
    if len(shape) == 3:
        return shape
    raise ValueError(f"expected a 2-D image or a 3-D stack, got shape {shape}")
