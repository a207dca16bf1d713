"""Image-quality metrics: MSE, PSNR, SSIM and overlap scores for binary masks.

Every metric takes ``(reference, test, *, ...)``, checks that the shapes
agree before anything else, never modifies its inputs and computes in
float64.  Intensity metrics need the dynamic range of the data: for integer
(and boolean) input it is taken from the dtype, ``iinfo.max - iinfo.min``
(255 for uint8, 65535 for uint16, 1 for bool); for floating-point input it
must be passed as ``data_range``, because no dtype says whether floats live
in [0, 1], [0, 255] or somewhere else.

References
----------
.. [1] Z. Wang, A. C. Bovik, H. R. Sheikh and E. P. Simoncelli, "Image quality
   assessment: from error visibility to structural similarity", IEEE
   Transactions on Image Processing 13 (2004) 600-612.
.. [2] L. R. Dice, "Measures of the amount of ecologic association between
   species", Ecology 26 (1945) 297-302.
.. [3] P. Jaccard, "The distribution of the flora in the alpine zone", New
   Phytologist 11 (1912) 37-50.
"""

from __future__ import annotations

import math
import numbers

import numpy as np
from scipy import ndimage

__all__ = [
    "mse",
    "psnr",
    "ssim",
    "error_rate",
    "dice",
    "iou",
    "score",
    "format_table",
]

#: Gaussian window cut-off in standard deviations; with ``sigma=1.5`` it gives
#: radius ``int(3.5 * 1.5 + 0.5) = 5``, the 11x11 window of Wang et al. [1]_
#: (the same value scikit-image uses).
SSIM_TRUNCATE = 3.5


# ---------------------------------------------------------------------------
# input checks
# ---------------------------------------------------------------------------

def _pair(reference, test):
    """Return both images as arrays after checking shapes and dtypes."""
    ref = np.asarray(reference)
    tst = np.asarray(test)
    if ref.shape != tst.shape:
        raise ValueError(
            f"reference and test must have the same shape, got {ref.shape} and {tst.shape}"
        )
    for name, a in (("reference", ref), ("test", tst)):
        if a.dtype.kind not in "biuf":
            raise TypeError(f"{name} must be a real numeric or boolean array, got dtype {a.dtype}")
    if ref.size == 0:
        raise ValueError("reference and test are empty")
    return ref, tst


def _data_range(ref, tst, data_range) -> float:
    """The dynamic range: given, or from the (shared) integer dtype."""
    if data_range is not None:
        if isinstance(data_range, bool) or not isinstance(data_range, numbers.Real):
            raise TypeError(f"data_range must be a real number, got {data_range!r}")
        value = float(data_range)
        if not (value > 0 and math.isfinite(value)):
            raise ValueError(f"data_range must be positive and finite, got {data_range!r}")
        return value
    if ref.dtype.kind == "f" or tst.dtype.kind == "f":
        raise ValueError(
            "floating-point input needs an explicit data_range "
            "(e.g. data_range=1.0 for images in [0, 1])"
        )
    if ref.dtype != tst.dtype:
        raise ValueError(
            f"reference ({ref.dtype}) and test ({tst.dtype}) have different dtypes; "
            "pass data_range explicitly"
        )
    if ref.dtype.kind == "b":
        return 1.0
    info = np.iinfo(ref.dtype)
    return float(info.max) - float(info.min)


# ---------------------------------------------------------------------------
# intensity metrics
# ---------------------------------------------------------------------------

def mse(reference, test) -> float:
    """Mean squared error between two images.

    .. math:: \\mathrm{MSE} = \\frac{1}{N} \\sum_{i=1}^{N} (x_i - y_i)^2

    Parameters
    ----------
    reference, test : array_like
        Images of the same shape (any number of dimensions).

    Returns
    -------
    float
        The mean of the squared differences, computed in float64.

    Raises
    ------
    ValueError
        If the shapes differ.

    Examples
    --------
    >>> mse([[0, 0], [0, 0]], [[0, 0], [0, 2]])
    1.0
    """
    ref, tst = _pair(reference, test)
    diff = ref.astype(np.float64) - tst.astype(np.float64)
    return float(np.mean(diff * diff))


def psnr(reference, test, *, data_range=None) -> float:
    """Peak signal-to-noise ratio in decibels.

    .. math:: \\mathrm{PSNR} = 10 \\log_{10} \\frac{R^2}{\\mathrm{MSE}}

    where ``R`` is the dynamic range of the data.

    Parameters
    ----------
    reference, test : array_like
        Images of the same shape.
    data_range : float, optional
        ``R``.  Required for floating-point input; for integer input it
        defaults to the dtype's range ``iinfo.max - iinfo.min`` (1 for bool).

    Returns
    -------
    float
        PSNR in dB; ``inf`` when the images are identical.

    Raises
    ------
    ValueError
        If the shapes differ, or the input is floating point and
        ``data_range`` is not given.

    References
    ----------
    .. [1] Z. Wang and A. C. Bovik, "Mean squared error: love it or leave it?",
       IEEE Signal Processing Magazine 26 (2009) 98-117.

    Examples
    --------
    A single wrong pixel out of four, at full range: MSE = 255**2 / 4, so
    PSNR = 10 log10(4).

    >>> import numpy as np
    >>> a = np.zeros((2, 2), np.uint8)
    >>> b = a.copy(); b[1, 1] = 255
    >>> round(psnr(a, b), 4)
    6.0206
    >>> psnr(a, a)
    inf
    """
    ref, tst = _pair(reference, test)
    r = _data_range(ref, tst, data_range)
    err = mse(ref, tst)
    if err == 0.0:
        return float("inf")
    return float(10.0 * np.log10(r * r / err))


def ssim(reference, test, *, data_range=None, sigma=1.5, k1=0.01, k2=0.03) -> float:
    """Mean structural similarity index with a Gaussian window.

    For local Gaussian-weighted means :math:`\\mu`, variances
    :math:`\\sigma^2` and covariance :math:`\\sigma_{xy}` [1]_,

    .. math::

        \\mathrm{SSIM}(x, y) = \\frac{(2 \\mu_x \\mu_y + C_1)(2 \\sigma_{xy} + C_2)}
                                   {(\\mu_x^2 + \\mu_y^2 + C_1)(\\sigma_x^2 + \\sigma_y^2 + C_2)},
        \\qquad C_1 = (k_1 R)^2, \\; C_2 = (k_2 R)^2,

    averaged over all pixels at least one window radius away from the border.

    Choices, stated so the numbers can be compared with other tools:

    * The window is a Gaussian of standard deviation ``sigma`` truncated at
      3.5 standard deviations (radius ``int(3.5 * sigma + 0.5)``: 11x11 for
      ``sigma=1.5``, the window of [1]_), applied with
      :func:`scipy.ndimage.gaussian_filter` in ``reflect`` mode.
    * Variances and covariance are the weighted *population* moments
      :math:`E[x^2] - E[x]^2`, with no ``N/(N-1)`` sample correction, as in
      [1]_.  This equals :func:`skimage.metrics.structural_similarity` with
      ``gaussian_weights=True, sigma=1.5, use_sample_covariance=False``.
    * The mean is taken over the SSIM map with a border of one window radius
      removed on every filtered axis (as scikit-image does).
    * A 3-D array is a z-stack ``(planes, rows, columns)``: each plane is
      filtered on its own (no smoothing across planes) and the result is the
      mean of the per-plane mean SSIM values.

    Parameters
    ----------
    reference, test : array_like, 2-D or 3-D
        Images of the same shape; each plane at least ``2 * radius + 1``
        pixels on a side.
    data_range : float, optional
        ``R``.  Required for floating-point input; for integer input it
        defaults to the dtype's range.
    sigma : float, optional
        Standard deviation of the Gaussian window in pixels.
    k1, k2 : float, optional
        Stabilising constants of [1]_.

    Returns
    -------
    float
        Mean SSIM, at most 1 (1.0 for identical images).

    Raises
    ------
    ValueError
        If the shapes differ, the images are not 2-D or 3-D, a plane is
        smaller than the window, or ``data_range`` is missing for float input.

    References
    ----------
    .. [1] Z. Wang, A. C. Bovik, H. R. Sheikh and E. P. Simoncelli, "Image
       quality assessment: from error visibility to structural similarity",
       IEEE Transactions on Image Processing 13 (2004) 600-612.

    Examples
    --------
    >>> import numpy as np
    >>> x = np.random.default_rng(0).integers(0, 256, (32, 32)).astype(np.uint8)
    >>> ssim(x, x)
    1.0
    >>> ssim(x, 255 - x) < 0
    True
    """
    ref, tst = _pair(reference, test)
    if ref.ndim not in (2, 3):
        raise ValueError(f"ssim needs a 2-D image or a 3-D z-stack, got {ref.ndim} dimensions")
    r = _data_range(ref, tst, data_range)
    for name, value in (("sigma", sigma), ("k1", k1), ("k2", k2)):
        if not (isinstance(value, numbers.Real) and value > 0 and math.isfinite(value)):
            raise ValueError(f"{name} must be a positive finite number, got {value!r}")
    radius = int(SSIM_TRUNCATE * sigma + 0.5)
    win = 2 * radius + 1
    if min(ref.shape[-2:]) < win:
        raise ValueError(
            f"each plane must be at least {win}x{win} pixels for sigma={sigma}, "
            f"got {ref.shape[-2:]}"
        )

    x = ref.astype(np.float64)
    y = tst.astype(np.float64)
    # sigma 0 on the plane axis: scipy skips that axis, so planes stay separate.
    sig = (sigma, sigma) if x.ndim == 2 else (0.0, sigma, sigma)

    def smooth(a):
        return ndimage.gaussian_filter(a, sig, mode="reflect", truncate=SSIM_TRUNCATE)

    mx, my = smooth(x), smooth(y)
    vx = smooth(x * x) - mx * mx
    vy = smooth(y * y) - my * my
    vxy = smooth(x * y) - mx * my
    c1 = (k1 * r) ** 2
    c2 = (k2 * r) ** 2
    smap = ((2 * mx * my + c1) * (2 * vxy + c2)) / ((mx * mx + my * my + c1) * (vx + vy + c2))
    inner = smap[..., radius:smap.shape[-2] - radius, radius:smap.shape[-1] - radius]
    # every plane has the same cropped size, so the overall mean is the mean
    # of the per-plane means.
    return float(inner.mean())


# ---------------------------------------------------------------------------
# binary masks
# ---------------------------------------------------------------------------

def _masks(reference, test, threshold):
    """Boolean "on" masks of both images.

    ``on = x > threshold``.  Without a threshold, the two images together must
    show at most two distinct values and ``threshold`` is the lower of them,
    so the upper level is "on" (0/1, 0/255, False/True and -1/+1 masks all
    work).  If the pair shows one value only, the images are identical and
    every score is the same whichever level is called "on".
    """
    ref, tst = _pair(reference, test)
    if threshold is None:
        levels = np.unique(np.concatenate([np.unique(ref), np.unique(tst)]))
        if levels.size > 2:
            raise ValueError(
                f"reference and test together have {levels.size} distinct values; "
                "binary scores need masks with two levels or an explicit threshold"
            )
        threshold = levels[0]
    return ref > threshold, tst > threshold


def error_rate(reference, test, *, threshold=None) -> float:
    """Fraction of pixels whose on/off state differs.

    .. math:: \\mathrm{error} = \\frac{|A \\,\\triangle\\, B|}{N}

    for the "on" sets ``A`` (reference) and ``B`` (test) of an ``N``-pixel
    image.

    Parameters
    ----------
    reference, test : array_like
        Masks of the same shape.
    threshold : float, optional
        A pixel is "on" when its value is ``> threshold``.  By default the
        two images together must have at most two distinct values and the
        higher one is "on".

    Returns
    -------
    float
        A number in [0, 1].

    Raises
    ------
    ValueError
        If the shapes differ, or ``threshold`` is omitted and the pair has
        more than two distinct values.

    Examples
    --------
    >>> error_rate([[0, 1], [1, 1]], [[0, 1], [0, 0]])
    0.5
    """
    a, b = _masks(reference, test, threshold)
    return float(np.count_nonzero(a != b) / a.size)


def dice(reference, test, *, threshold=None) -> float:
    """Dice (Sorensen-Dice) overlap coefficient of two masks.

    .. math:: D = \\frac{2 |A \\cap B|}{|A| + |B|}

    with ``D = 1`` when both masks are empty [1]_.

    Parameters
    ----------
    reference, test : array_like
        Masks of the same shape.
    threshold : float, optional
        As in :func:`error_rate`.

    Returns
    -------
    float
        A number in [0, 1].

    References
    ----------
    .. [1] L. R. Dice, "Measures of the amount of ecologic association between
       species", Ecology 26 (1945) 297-302.

    Examples
    --------
    >>> dice([[0, 1], [1, 1]], [[0, 1], [1, 0]])
    0.8
    """
    a, b = _masks(reference, test, threshold)
    total = np.count_nonzero(a) + np.count_nonzero(b)
    if total == 0:
        return 1.0
    return float(2 * np.count_nonzero(a & b) / total)


def iou(reference, test, *, threshold=None) -> float:
    """Intersection over union (Jaccard index) of two masks.

    .. math:: J = \\frac{|A \\cap B|}{|A \\cup B|} = \\frac{D}{2 - D}

    with ``J = 1`` when both masks are empty [1]_.

    Parameters
    ----------
    reference, test : array_like
        Masks of the same shape.
    threshold : float, optional
        As in :func:`error_rate`.

    Returns
    -------
    float
        A number in [0, 1].

    References
    ----------
    .. [1] P. Jaccard, "The distribution of the flora in the alpine zone", New
       Phytologist 11 (1912) 37-50.

    Examples
    --------
    >>> round(iou([[0, 1], [1, 1]], [[0, 1], [1, 0]]), 4)
    0.6667
    """
    a, b = _masks(reference, test, threshold)
    union = np.count_nonzero(a | b)
    if union == 0:
        return 1.0
    return float(np.count_nonzero(a & b) / union)


# ---------------------------------------------------------------------------
# summaries
# ---------------------------------------------------------------------------

def score(reference, test, *, kind=None, data_range=None) -> dict:
    """All metrics that apply to a pair of images, as a dict.

    Parameters
    ----------
    reference, test : array_like
        Images of the same shape.  ``ssim`` needs them 2-D or 3-D.
    kind : {None, "grey", "binary"}, optional
        ``"grey"`` gives ``psnr`` and ``ssim``; ``"binary"`` adds
        ``error_rate``, ``dice`` and ``iou`` (upper level "on", see
        :func:`error_rate`).  ``None`` picks ``"binary"`` when the two images
        together have at most two distinct values, else ``"grey"``.
    data_range : float, optional
        Passed to :func:`psnr` and :func:`ssim`; required for float input.

    Returns
    -------
    dict
        ``{"psnr", "ssim"}`` for grey images, ``{"psnr", "ssim",
        "error_rate", "dice", "iou"}`` for binary ones, all floats.

    Examples
    --------
    >>> import numpy as np
    >>> ref = np.zeros((16, 16), np.uint8); ref[4:12, 4:12] = 255
    >>> s = score(ref, ref)
    >>> sorted(s)
    ['dice', 'error_rate', 'iou', 'psnr', 'ssim']
    >>> s["dice"], s["error_rate"]
    (1.0, 0.0)
    """
    ref, tst = _pair(reference, test)
    if kind is None:
        joint = np.unique(np.concatenate([np.unique(ref), np.unique(tst)]))
        kind = "binary" if joint.size <= 2 else "grey"
    elif kind not in ("grey", "binary"):
        raise ValueError(f"kind must be None, 'grey' or 'binary', got {kind!r}")
    out = {
        "psnr": psnr(ref, tst, data_range=data_range),
        "ssim": ssim(ref, tst, data_range=data_range),
    }
    if kind == "binary":
        out["error_rate"] = error_rate(ref, tst)
        out["dice"] = dice(ref, tst)
        out["iou"] = iou(ref, tst)
    return out


def _cell(value, floatfmt):
    if value is None:
        return ""
    if isinstance(value, (bool, np.bool_)):
        return str(bool(value))
    if isinstance(value, numbers.Integral):
        return str(int(value))
    if isinstance(value, numbers.Real):
        v = float(value)
        if math.isnan(v) or math.isinf(v):
            return str(v)
        return format(v, floatfmt)
    return str(value)


def format_table(rows, columns=None, *, floatfmt=".4f") -> str:
    """Format a list of dicts as an aligned plain-text table.

    Parameters
    ----------
    rows : iterable of dict
        One dict per row; a missing key gives an empty cell.
    columns : sequence of str, optional
        Keys to show, in order; by default the keys of the first row.
    floatfmt : str, optional
        :func:`format` spec for real numbers (``nan`` and ``inf`` are written
        as such).

    Returns
    -------
    str
        A header line, a rule of dashes and one line per row, joined by
        newlines (no trailing newline).  Numbers are right-aligned, text is
        left-aligned; columns are separated by two spaces.

    Examples
    --------
    >>> print(format_table([{"file": "a.tif", "psnr": 31.0},
    ...                     {"file": "bb.tif", "psnr": float("inf")}],
    ...                    ["file", "psnr"]))
    file       psnr
    ------  -------
    a.tif   31.0000
    bb.tif      inf
    """
    rows = list(rows)
    if columns is None:
        columns = list(rows[0]) if rows else []
    columns = [str(c) for c in columns]
    cells = [[_cell(row.get(c), floatfmt) for c in columns] for row in rows]
    numeric = [
        all(
            row.get(c) is None
            or (isinstance(row.get(c), numbers.Number) and not isinstance(row.get(c), (bool, np.bool_)))
            for row in rows
        )
        for c in columns
    ]
    widths = [
        max([len(c)] + [len(r[j]) for r in cells]) for j, c in enumerate(columns)
    ]

    def line(values):
        parts = [
            v.rjust(w) if num else v.ljust(w)
            for v, w, num in zip(values, widths, numeric)
        ]
        return "  ".join(parts).rstrip()

    out = [line(columns), "  ".join("-" * w for w in widths)]
    out.extend(line(r) for r in cells)
    return "\n".join(out)
