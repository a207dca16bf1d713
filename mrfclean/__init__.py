"""mrfclean: clean binary and greyscale microscopy scans by sampling a Markov random field.

Main entry points:

* :func:`mrfclean.clean` — clean an array (binary or grey, chosen from the image).
* :func:`mrfclean.clean_file` — read, clean and write one file safely.
* :func:`mrfclean.clean_binary` — the binary (Ising) cleaner with every option.
* :mod:`mrfclean.metrics` — PSNR, SSIM, error rate, Dice, IoU.
"""

__version__ = "0.1.0"

from .binary import clean_binary  # noqa: E402
from .clean import Settings, clean, clean_file  # noqa: E402
from .estimates import CleanResult  # noqa: E402

__all__ = ["CleanResult", "Settings", "clean", "clean_binary", "clean_file", "__version__"]
