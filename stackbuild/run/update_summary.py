"""What an update tells the terminal: its outcome, the summary of a finished update and a dry run's list.

The text is made from the plan alone (:class:`~stackbuild.run.update_plan.UpdatePlan`: what
each step recorded in ``facts``), so a resumed update prints the same summary as one that
ran through.
"""
from __future__ import annotations

from dataclasses import dataclass, field

from .update_plan import UpdatePlan


@dataclass
class UpdateOutcome:
    """What an update did (or, with ``dry_run``, would do).

    Attributes
    ----------
    plan : UpdatePlan or None
        The update's record (None for an inset, which is added beside the volume).
    lines : list of str
        The summary, one line each (the CLI prints them).
    verdict : object or None
        The report's verdict (None for a dry run).
    """

    plan: UpdatePlan | None
    lines: list[str] = field(default_factory=list)
    verdict: object | None = None


def verdict_line(verdict) -> str:
    """Return the report's verdict as the summary's last line."""
    return "  report: " + ("PASSED" if verdict.passed else "FAILED: " + "; ".join(verdict.failures))


def dry_run_lines(plan: UpdatePlan) -> list[str]:
    """Return what an update would change, one line each, for ``--dry-run``."""
    from .update_cluster import in_process
    from .update_reach import SAME_CONTENT_NCC

    lines = [f"update {plan.number:04d} (dry run: nothing written)"]
    for s in plan.sections:
        what = "new section" if s in plan.added else "tiles " + ", ".join(plan.replaced[str(s)])
        lines.append(f"  section {s}: {what}")
    for z, shards in sorted(plan.predicted.items(), key=lambda kv: int(kv[0])):
        listed = shards if isinstance(shards, str) else " ".join(shards)
        lines.append(f"  plane {z}: level-0 shards (row,col) {listed}")
    lines.append("  untouched sections keep their alignment unless the re-solve moves them more than "
                 f"{plan.hold_within:g} px; such sections would be rewritten too")
    lines.append("  a re-imaged section keeps its alignment without a re-solve when its new pixels show the volume's "
                 f"old content (block shift <= {plan.hold_within:g} px, correlation >= {SAME_CONTENT_NCC:g}); else "
                 "its window is solved again")
    where = "in this process" if in_process(plan, None) else "on a Dask cluster (or --scheduler)"
    lines.append(f"  would run {where} ({sum(len(v) for v in plan.replaced.values())} tile(s) replaced or added, "
                 f"{plan.facts.get('restitched_tiles', 0)} tile(s) read to register their pairs again)")
    return lines


def summary_lines(plan: UpdatePlan, verdict) -> list[str]:
    """Return the update's summary for the terminal, one line each."""
    f = plan.facts
    n_repl = sum(len(v) for v in plan.replaced.values())
    lines = [f"update {plan.number:04d}: {n_repl} tile(s) replaced or added in section(s) "
             f"{sorted(int(s) for s in plan.replaced) or '-'}; new section(s) {plan.added or '-'}; "
             f"ran {f.get('ran', 'on the Dask cluster')}"]
    held = f.get("stitch", {}).get("held", {})
    moved = [v["held_moved_px"] for v in held.values() if v.get("held_moved_px") is not None]
    lines.append(f"  stitch: {f.get('stitch', {}).get('pairs', 0)} tile pair(s) registered again, "
                 f"{f.get('stitch', {}).get('pairs_kept', 0)} kept from the build; untouched "
                 f"tiles held (a free re-solve would have moved them up to {max(moved, default=0.0):.2f} px)")
    a = f.get("align", {})
    for s, c in a.get("checked", {}).items():
        lines.append(f"  align: section {s} " + ("keeps its alignment without a re-solve: " if c["kept_without_solve"]
                                                  else "solved again: ") + c["why"])
    if a.get("window"):
        lines.append(f"  align: sections {a['window']} solved again, {len(a.get('realigned', []))} re-aligned "
                     f"{a.get('realigned', [])}; the re-solve would move untouched sections up to "
                     f"{a.get('largest_untouched_move_px', 0.0):.2f} px (held; re-imaged"
                     f"{' and neighbouring' if plan.realign_neighbours else ''} sections re-aligned beyond "
                     f"{plan.hold_within:g} px)")
    if a.get("anchored"):
        anchors = sorted({v["anchor"] for v in a["anchored"].values()})
        lines.append(f"  align: appended section(s) {sorted(int(k) for k in a['anchored'])} kept as solved against "
                     f"section(s) {anchors} as stored (moved up to "
                     f"{max(v['moved_px'] for v in a['anchored'].values()):.2f} px from one affine frame change)")
    r = f.get("render", {})
    if r.get("full"):
        lines.append(f"  render: the canvas origin moved, every plane rendered again ({len(r.get('planes', []))})")
    elif r:
        lines.append(f"  render: {r['shards'][0]} of {r['shards_total'][0]} level-0 shards rewritten "
                     f"({sum(r['shards'])} of {sum(r['shards_total'])} over all levels) in plane(s) {r['planes']}")
    before, after = plan.totals_before, f.get("totals_after", {})
    for key in ("stitch.rms", "stitch.p95", "align.rms", "align.p95"):
        if key in before or key in after:
            lines.append(f"  {key}: {_num(before.get(key))} -> {_num(after.get(key))} px")
    rep = f.get("report", {})
    if rep.get("sections_reused") is not None:
        lines.append(f"  report: {rep['sections'] - rep['sections_reused']} of {rep['sections']} section(s) measured "
                     "again, the others' measurements kept (their inputs did not change)")
    if rep.get("pairs_measured") is not None and rep.get("pairs_reused") is not None:
        lines.append(f"  report: probe: {rep['pairs_measured']} of {rep['pairs_measured'] + rep['pairs_reused']} plane "
                     "pair(s) measured again")
    if verdict is not None:
        lines.append(verdict_line(verdict))
    return lines


def _num(v) -> str:
    return "-" if v is None else f"{v:.3g}"
