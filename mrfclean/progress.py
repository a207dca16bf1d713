"""One tiny adapter over tqdm, so progress can be switched off for scripts and tests."""

from __future__ import annotations

import contextlib
import sys


class _Silent:
    def update(self, n=1):
        pass

    def set_postfix_str(self, s):
        pass


@contextlib.contextmanager
def progress_bar(*, total=None, enabled=True, desc=None, unit="it", position=None):
    """A tqdm bar when ``enabled`` and stderr is a terminal or forced, else a silent stand-in."""
    if not enabled:
        yield _Silent()
        return
    from tqdm import tqdm

    bar = tqdm(total=total, desc=desc, unit=unit, file=sys.stderr, leave=False,
               position=position, dynamic_ncols=True)
    try:
        yield bar
    finally:
        bar.close()
