"""The progress bar of a run: resamples done / total and the time left, on stderr.

`planrunner run` shows it; `api.run(progress=True)` shows the very same bar. It stays silent when
stderr is not a terminal and for runs shorter than a second, so a script's or a test's output is
never touched by it.
"""

from __future__ import annotations

import shutil
import sys
from typing import Any


class ProgressBar:
    """A ``progress(done, total)`` hook that draws a bar; only for a terminal and long runs."""

    def __init__(self, quiet: bool = False):
        self._quiet = quiet
        self._bar: Any = None

    def __call__(self, done: int, total: int) -> None:
        if self._bar is None:
            from tqdm import tqdm
            # a terminal that reports no size (0 × 0) would hide the bar
            size = shutil.get_terminal_size((80, 24))
            # disable=None: silent when stderr is not a terminal; delay: short runs show nothing
            self._bar = tqdm(total=total, unit=" resamples", unit_scale=True, file=sys.stderr, delay=1.0,
                             disable=True if self._quiet else None, leave=False,
                             ncols=min(size.columns or 80, 100), nrows=size.lines or 24)
        self._bar.update(done - self._bar.n)

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()
