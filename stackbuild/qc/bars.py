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
            where = failure_detail(doc, t.measure)
            failures.append(f"{t.describe()}: measured {got:.3g}" + (f" ({where})" if where else ""))
    return not failures, failures, rows


def _sections(values) -> str:
    v = sorted(set(values))
    return ", ".join(map(str, v[:10])) + (f" and {len(v) - 10} more" if len(v) > 10 else "")


def _channel_reason(row: dict) -> str:
    """Return why a marker registration was not used: the channel stage's reason, else its flags."""
    line = row.get("failure") or ""
    if "not registered: " in line:
        return line.split("not registered: ", 1)[1].split("; no transform stored", 1)[0]
    from .glossary import flag_meaning

    flags = [f for f in row.get("flags") or [] if f != "ambiguous"] or list(row.get("flags") or [])
    return "; ".join(f"{f}: {flag_meaning(f)}" for f in flags) or "no reason recorded"


def failure_detail(doc: dict, measure: str) -> str:
    """Return where a failed count measure comes from: channels and sections, and why (empty when not a count of those).

    A rejected marker registration names its channel, its section(s) and the channel stage's
    reason; blank, unmeasured and lost sections and missing tiles name their sections.
    """
    rows = doc.get("sections") or []
    if measure in ("channels.failed", "channels.flagged"):
        bad = [r for r in doc.get("channels") or []
               if r.get("registered") is False or (measure == "channels.flagged" and r.get("flags"))]
        by: dict[tuple[str, str], list[int]] = {}
        for r in bad:
            by.setdefault((r["channel"], _channel_reason(r)), []).append(r["section"])
        parts = [f"marker {ch!r} in section(s) {_sections(secs)}: {why}" for (ch, why), secs in sorted(by.items())]
        return "; ".join(parts[:5]) + (f"; {len(parts) - 5} more" if len(parts) > 5 else "")
    flag = {"sections.blank": "blank_section", "sections.unmeasured": "not_measured"}.get(measure)
    if flag:
        secs = [r["section"] for r in rows if flag in (r.get("flags") or [])]
        return f"section(s) {_sections(secs)}" if secs else ""
    if measure == "lost":
        secs = [r["section"] for r in rows if r.get("lost")]
        return f"section(s) {_sections(secs)}" if secs else ""
    if measure == "tiles.missing":
        secs = [t["section"] for t in doc.get("flagged_tiles") or [] if "missing_file" in (t.get("flags") or [])]
        return f"in section(s) {_sections(secs)}" if secs else ""
    return ""


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
