"""The report stage entry: ``run(folder, settings, *, mapper, progress)``.

Measures the build (one task per section for its seams, the alignment-error probe as
pair and run tasks, all through ``mapper``), writes ``DIR/qc`` and returns the
:class:`~stackbuild.qc.report.Verdict`. :func:`check_bars` re-evaluates bars
against the stored metrics without measuring or writing anything.
"""
from __future__ import annotations

from .bars import Verdict, recheck, stored_metrics_stale
from .settings import ReportSettings


def run(folder, settings: ReportSettings, *, mapper=None, progress=None, fail_on=None, reuse: bool = True,
        changed: dict | None = None) -> Verdict:
    """Measure the build in ``folder`` and write its report; return the verdict.

    Measurements stored by an earlier report whose inputs are unchanged are re-used
    (``reuse=False`` measures everything again); see :mod:`stackbuild.qc.reuse`. ``changed``
    (``{z: {"before": render fingerprint, "boxes": [[x0, y0, x1, y1], ...]}}``, level-0 canvas px)
    tells where planes changed since they were rendered from ``before``: the probe re-measures
    only there (:func:`stackbuild.qc.probe.measure_error`).
    """
    from .report import run_report  # plotting is imported only when a report is written

    root = getattr(folder, "root", folder)
    changed = {int(z): v for z, v in (changed or {}).items()} or None
    return run_report(root, settings, fail_on=fail_on, progress=progress, mapper=mapper, reuse=reuse,
                      changed=changed)


def check_bars(folder, settings: ReportSettings, fail_on) -> Verdict:
    """Return the verdict of ``fail_on`` and the default bars against ``DIR/qc/metrics.json`` (no writing)."""
    return recheck(getattr(folder, "root", folder), settings, fail_on)


def stale_reason(folder) -> str | None:
    """Return why the stored metrics cannot be re-used for a bar check (None when they can)."""
    return stored_metrics_stale(getattr(folder, "root", folder))
