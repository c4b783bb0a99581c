"""The align step of an update: which sections are solved again, and which alignments are kept.

A re-imaged section whose new pixels show its old content where it was keeps its alignment
without a re-solve (:mod:`stackbuild.run.update_reach`). Otherwise a window of sections around
the changed ones is solved again (:func:`window_sections`); untouched sections are held (no pixel
of theirs may change) and a re-imaged one takes the re-solve only when it moves beyond the
update's ``hold_within`` (:func:`stackbuild.transforms.hold.hold_alignments`). Appended sections
are re-expressed through the nearest existing section below them (:mod:`stackbuild.run.update_align`).
"""
from __future__ import annotations

import logging
import shutil

from ..folder import BuildFolder
from .update_plan import UpdatePlan, before_store, killed_here

log = logging.getLogger(__name__)


def align_step(build: BuildFolder, plan: UpdatePlan, mappers) -> None:
    """Keep, solve again or hold each section's alignment; record why in ``plan.facts["align"]``."""
    from ..render.dirty import same_alignment
    from ..transforms.hold import hold_alignments
    from .update_reach import alignment_reach

    before, store = before_store(build.root, plan), build.store
    # A re-imaged section whose new pixels show its old content where it was keeps its alignment
    # without a re-solve (the re-solve could move it only by its own noise, which the hold discards).
    reach = alignment_reach(build, before, plan.replaced, plan.hold_within, mappers("compare"))
    same = {s for s, r in reach.items() if r["same"]}
    resolve = sorted(set(plan.sections) - same)
    checked = {str(s): {"kept_without_solve": r["same"], "why": r["why"], "tiles": r["tiles"]}
               for s, r in sorted(reach.items())}
    if not resolve:
        killed_here("align")
        plan.facts["align"] = {"realigned": [], "frame_rms_px": None, "largest_untouched_move_px": 0.0,
                               "moved_px": {}, "moved_beyond_tolerance": [], "window": [], "checked": checked}
        return
    from ..align.stage import align_sections  # only now: a section kept without a re-solve needs none of it

    scratch = build.scratch_dir("align")
    source = WindowSource(build.root, window_sections(store.sections_with("stitch"), resolve,
                                                      build.config.align.neighbours, appended=plan.added))
    try:
        new = align_sections(source, build.config.align,
                             mapper=mappers("align"), progress=mappers.bar("align"), scratch=scratch)
    finally:
        shutil.rmtree(scratch, ignore_errors=True)
    old = {s: a for s in new if (a := before.load_alignment(s)) is not None}
    bboxes = {s: store.load_stitch(s).bbox() for s in new}
    # Re-imaged tiles were placed in their section's old frame, so its old alignment still holds unless
    # the re-solve moves it beyond the tolerance; untouched sections are held (no pixel of theirs may
    # change), except, when sections are appended, the existing ones the new ones are matched to.
    changed = {int(k) for k in plan.replaced} - same
    untouched = {s for s in old if s not in changed}
    near_new = {s for s in old if plan.realign_neighbours
                and any(0 < a - s <= build.config.align.neighbours for a in plan.added)}
    keep, facts = hold_alignments(old, new, bboxes, fit_on=untouched or set(old),
                                  movable=changed | near_new, tolerance=plan.hold_within)
    anchored = _anchor_appended(plan, old, new, keep, bboxes)
    for s, rec in keep.items():
        if not same_alignment(store.load_alignment(s), rec):
            store.save_alignment(rec)
    killed_here("align")
    moved = {s: v for s, v in facts["moved_px"].items() if s not in changed}
    plan.facts["align"] = {"realigned": facts["realigned"], "frame_rms_px": facts["frame_rms_px"],
                           "largest_untouched_move_px": max(moved.values(), default=0.0),
                           "moved_px": {str(s): round(v, 3) for s, v in sorted(facts["moved_px"].items())},
                           "moved_beyond_tolerance": sorted(s for s, v in facts["moved_px"].items()
                                                            if v > plan.hold_within),
                           "window": sorted(new), "checked": checked, "anchored": anchored}


def _anchor_appended(plan: UpdatePlan, old: dict, new: dict, keep: dict, bboxes: dict) -> dict:
    """Re-express each appended section through the nearest existing section below it (in place in ``keep``).

    See :mod:`stackbuild.run.update_align`; returns ``{section: {"anchor", "moved_px"}}``, how far
    this moved each new section from the one-affine frame change.
    """
    from .update_align import anchor_moves, through_anchor

    out = {}
    for s in plan.added:
        below = [a for a in old if a < s and a in keep and a in new]
        if s not in new or not below:
            continue
        a = max(below)
        try:
            rec = through_anchor(new[s], keep[a], new[a], bboxes[s])
        except ValueError as exc:  # an inverse that does not converge: keep the affine frame change
            log.warning("section %s: not anchored on section %s (%s)", s, a, exc)
            continue
        out[str(s)] = {"anchor": a, "moved_px": round(anchor_moves(keep[s], rec, bboxes[s]), 3)}
        keep[s] = rec
    return out


def window_sections(sections: list[int], changed: list[int], neighbours: int, appended=()) -> list[int]:
    """Return the sections solved again: each changed one and ``neighbours + 1`` stitched sections each side.

    The sections around a changed one anchor it (their alignments are held; see
    :func:`stackbuild.transforms.hold.hold_alignments`), so the rest of the stack is not solved again.
    An appended section needs only the ``neighbours`` sections it is matched to: it is re-expressed
    through the nearest of them (:func:`_anchor_appended`).
    """
    have = sorted(sections)
    keep = set()
    for s in changed:
        if s not in have:
            continue
        k = have.index(s)
        reach = neighbours if s in appended else neighbours + 1
        keep.update(have[max(0, k - reach):k + reach + 1])
    return sorted(keep)


class WindowSource:
    """A build's sections restricted to ``sections`` (an align source: see :mod:`stackbuild.align.sources`)."""

    def __init__(self, root, sections: list[int]):
        from ..align.sources import BuildSource

        self._source = BuildSource(root)
        self._sections = list(sections)

    def sections(self) -> list[int]:
        return list(self._sections)

    def __getattr__(self, name):
        if name.startswith("__") or name in ("_source", "_sections"):
            raise AttributeError(name)  # not delegated (pickling looks these up before __dict__ is set)
        return getattr(self._source, name)
