"""Bars and verdicts: judge stored totals, re-check ``DIR/qc/metrics.json`` without measuring.

Kept apart from the report (no plotting imports) so that ``stackbuild report DIR --fail-on ...``
answers from the stored metrics in well under a second.
"""
from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

from ..errors import InputError
from ..folder import BuildFolder
from .settings import ReportSettings
from .thresholds import Threshold, default_thresholds, parse_fail_on_list

#: ``schema_version`` of ``metrics.json`` (see :mod:`stackbuild.qc.metrics`)
SCHEMA_VERSION = 2


@dataclass
class Verdict:
    """Outcome of the report.

    Attributes
    ----------
    passed : bool
        True when no threshold failed.
    failures : list of str
        One line per failed threshold: the condition and the measured value.
    paths : list of Path
        Every file written under ``DIR/qc``.
    missed_bars : list of str
        The failures among the ``fail_on`` expressions alone (what a batch
        script asked to be checked; the CLI's exit status follows these).
    warnings : list of str
        What a reader must know although no bar fails (lossy-compressed tiles, unmeasured sections).
    """

    passed: bool
    failures: list[str] = field(default_factory=list)
    paths: list[Path] = field(default_factory=list)
    missed_bars: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)


def _thresholds(settings: ReportSettings, fail_on) -> list[Threshold]:
    """Return the settings' bars, replaced or extended by ``fail_on`` (text or Threshold)."""
    extra = [t for t in (fail_on or []) if isinstance(t, Threshold)]
    extra += parse_fail_on_list([t for t in (fail_on or []) if not isinstance(t, Threshold)])
    named = {t.measure for t in extra}
    return [t for t in default_thresholds(settings) if t.measure not in named] + extra


def judge(doc: dict, thresholds: list[Threshold]) -> tuple[bool, list[str], list[dict]]:
    """Return ``(passed, failures, rows)`` of the thresholds against ``doc["totals"]``."""
    px = doc["volume"]["pixel_size_nm"]
    failures, rows = [], []
    for t in thresholds:
        failed, got = t.fails(doc["totals"], px)
        rows.append({"condition": t.describe(), "measure": t.measure, "measured": got, "failed": failed,
                     "text": t.text})
        if failed:
            failures.append(f"{t.describe()}: measured {got:.3g}")
    return not failures, failures, rows


def stored_metrics_stale(build_dir) -> str | None:
    """Return why ``DIR/qc/metrics.json`` no longer describes the build (or None when it still does).

    Stale when missing, or older than any transform record, the volume's metadata or ``build.json``.
    """
    folder = BuildFolder(build_dir)
    path = folder.qc_dir / "metrics.json"
    if not path.is_file():
        return "no stored metrics"
    when = path.stat().st_mtime_ns
    newer = [p for p in [folder.state_path, *sorted(folder.store.root.rglob("*.json"))]
             if p.is_file() and p.stat().st_mtime_ns > when]
    for zj in folder.volume_path.glob("*/zarr.json"):
        if zj.stat().st_mtime_ns > when:
            newer.append(zj)
    if newer:
        return f"{newer[0]} changed after the metrics were measured"
    return None


def recheck(build_dir, settings: ReportSettings, fail_on: list[str] | None) -> Verdict:
    """Return the verdict of the bars against the stored ``DIR/qc/metrics.json``, without measuring or writing.

    Raises
    ------
    InputError
        When there are no stored metrics, or they are of another schema version.
    """
    folder = BuildFolder(build_dir)
    thresholds = _thresholds(settings, fail_on)
    path = folder.qc_dir / "metrics.json"
    if not path.is_file():
        raise InputError("no stored metrics to check; run the report without --fail-on first, or add "
                         "--measure-again", file=path)
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError) as exc:
        raise InputError(f"stored metrics cannot be read ({exc}); add --measure-again", file=path) from None
    if doc.get("schema_version") != SCHEMA_VERSION:
        raise InputError(f"stored metrics are schema {doc.get('schema_version')}, this version reads "
                         f"{SCHEMA_VERSION}; add --measure-again", file=path)
    passed, failures, _ = judge(doc, thresholds)
    asked = set(parse_fail_on_list([t for t in (fail_on or []) if not isinstance(t, Threshold)]))
    _, missed, _ = judge(doc, [t for t in thresholds if t in asked])
    return Verdict(passed, failures, [], missed, list(doc.get("warnings") or []))
