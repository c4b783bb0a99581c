"""The one progress helper: library code reports progress through a callable, the CLI draws it.

Stages accept ``progress(done, total)``; :class:`ProgressBar` is such a callable
that draws a bar on standard error (redrawn in place on a terminal, a line
every 10 % otherwise, so batch logs stay readable). Every bar says what it
counts: a bar made for a stage's own loop is given its unit, and a mapper tells
its bar the task it is about to run (:meth:`ProgressBar.counting`, words from
:data:`TASK_UNITS`), so each phase of a stage reads, for example,
``align [####] 12/12 section pairs matched``.
"""
from __future__ import annotations

import sys
import time

# What one task of each task function does, as the bar counts it (a mapper announces the function it maps).
TASK_UNITS = {
    "_stitch_one": "sections stitched",
    "restitch_task": "sections stitched again",
    "features_job": "section overviews",
    "pair_job": "section pairs matched",
    "region_job": "region tasks matched",
    "residual_job": "region residual tasks",
    "solve_block_job": "field blocks solved",
    "register_channel": "marker images registered",
    "range_job": "sections' intensity ranges",
    "seam_job": "sections measured",
    "probe_pair": "plane-pair tasks",
    "merge_pair_parts": "plane-pair parts joined",
    "jitter_run": "plane runs solved",
    "check_plane": "planes checked",
    "_tile_task": "replaced tiles traced",
    "register_region": "inset regions registered",
    "render_inset_block": "inset chunks rendered",
    "reduce_inset_block": "inset pyramid chunks",
}

# What a stage's own bar counts, by its label (a bar made without a unit takes its label's).
STAGE_UNITS = {
    "align": "steps of the stage",
    "render": "planes written",
    "markers": "marker planes written",
    "report": "sections measured",
}


def unit_of(fn) -> str:
    """Return what one task of ``fn`` counts as on a bar (its entry in :data:`TASK_UNITS`, or its name)."""
    name = getattr(fn, "__name__", "task")
    return TASK_UNITS.get(name, name.strip("_").replace("_", " ") + " tasks")


def announce(progress, fn) -> None:
    """Tell ``progress`` (if it is a :class:`ProgressBar`) that tasks of ``fn`` follow."""
    if hasattr(progress, "counting"):
        progress.counting(unit_of(fn))


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
    unit : str, optional
        What one step counts, e.g. ``"planes written"``; by default the label's entry in
        :data:`STAGE_UNITS` (a mapper replaces it per phase, see :meth:`counting`).
    """

    def __init__(self, label: str, enabled: bool = True, stream=None, unit: str | None = None):
        self.label = label
        self.unit = STAGE_UNITS.get(label, "") if unit is None else unit
        self.enabled = enabled
        self.stream = stream or sys.stderr
        self.start = time.monotonic()
        self._last_decile = -1
        self._total = None
        self._phase = 1
        self._tty = hasattr(self.stream, "isatty") and self.stream.isatty()

    def counting(self, unit: str) -> None:
        """Start a new bar (a new phase of the stage) counting ``unit``."""
        if self._total is not None:
            self._phase += 1
        self.unit, self._total, self._last_decile = unit, None, -1
        self.start = time.monotonic()

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
        label = self.label if self._phase == 1 or self.unit else f"{self.label} ({self._phase})"
        text = f"{label:>12} [{bar}] {done}/{total}{' ' + self.unit if self.unit else ''} {elapsed:6.1f}s"
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
