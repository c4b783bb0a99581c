"""The one progress helper: library code reports progress through a callable, the CLI draws it.

Stages accept ``progress(done, total)``; :class:`ProgressBar` is such a callable
that draws a bar on standard error (redrawn in place on a terminal, a line
every 10 % otherwise, so batch logs stay readable).
"""
from __future__ import annotations

import sys
import time


class ProgressBar:
    """A text progress bar for one piece of work.

    Parameters
    ----------
    label : str
        What is being done, e.g. ``"stitch"``.
    enabled : bool
        If False, draw nothing.
    stream : file, optional
        Where to draw (default ``sys.stderr``).
    """

    def __init__(self, label: str, enabled: bool = True, stream=None):
        self.label = label
        self.enabled = enabled
        self.stream = stream or sys.stderr
        self.start = time.monotonic()
        self._last_decile = -1
        self._total = None
        self._phase = 1
        self._tty = hasattr(self.stream, "isatty") and self.stream.isatty()

    def __call__(self, done: int, total: int) -> None:
        """Report that ``done`` of ``total`` units are finished."""
        if not self.enabled or total <= 0:
            return
        if self._total is not None and total != self._total:  # a stage's next phase starts a new bar
            self._phase += 1
            self.start = time.monotonic()
            self._last_decile = -1
        self._total = total
        frac = min(1.0, done / total)
        elapsed = time.monotonic() - self.start
        eta = elapsed / frac - elapsed if frac > 0 else float("nan")
        width = 28
        bar = "#" * int(frac * width) + "-" * (width - int(frac * width))
        label = self.label if self._phase == 1 else f"{self.label} ({self._phase})"
        text = f"{label:>12} [{bar}] {done}/{total} {elapsed:6.1f}s"
        if 0 < frac < 1:
            text += f" (about {eta:.0f}s left)"
        if self._tty:
            end = "\n" if done >= total else ""
            self.stream.write("\r" + text.ljust(78) + end)
        else:
            decile = int(frac * 10)
            if decile == self._last_decile and done < total:
                return
            self._last_decile = decile
            self.stream.write(text + "\n")
        self.stream.flush()


def no_progress(done: int, total: int) -> None:
    """A progress callable that reports nothing."""
