"""Appended sections re-expressed through their anchor section (``run/update_align.py``).

Checked against closed-form compositions (3 x 3 homogeneous matrices multiplied with numpy) and,
with a smooth displacement field in the window's solve of the anchor, against the defining
relation: every point of the new section reaches the same point of the anchor section before and
after (the field inverse is the record's own iteration, checked to 1e-3 px).
"""
from __future__ import annotations

import numpy as np

from stackbuild.run.update_align import through_anchor
from stackbuild.transforms.records import SectionAlignment
from stackbuild.transforms.types import Affine2D, DisplacementField

BBOX = (0.0, 0.0, 600.0, 400.0)


def _h(a: Affine2D) -> np.ndarray:
    return np.vstack([a.matrix, [0.0, 0.0, 1.0]])


def _points() -> np.ndarray:
    gx, gy = np.meshgrid(np.linspace(20, 580, 7), np.linspace(20, 380, 5))
    return np.column_stack([gx.ravel(), gy.ravel()])


def test_affine_anchors_compose_in_closed_form():
    # Stored anchor: aligned -> section. The window's solve put the anchor elsewhere (a small rotation
    # and shift) and the new section relative to it.
    old = Affine2D(np.array([[1.0, 0.01, 5.0], [-0.01, 1.0, -3.0]]))
    new_anchor = Affine2D(np.array([[0.999, 0.02, 7.5], [-0.02, 0.999, 1.0]]))
    new_rec = Affine2D(np.array([[1.002, 0.0, -4.0], [0.003, 0.998, 2.0]]))
    got = through_anchor(SectionAlignment(5, new_rec), SectionAlignment(4, old), SectionAlignment(4, new_anchor), BBOX)
    # Closed form: aligned P -> W(P) = new_anchor^-1(old(P)) -> new_rec(W(P)).
    want = _h(new_rec) @ np.linalg.inv(_h(new_anchor)) @ _h(old)
    pts = _points()
    expect = (want @ np.column_stack([pts, np.ones(len(pts))]).T).T[:, :2]
    assert np.abs(got.aligned_to_section(pts) - expect).max() < 1e-3  # the field reproduces the affine chain


def test_a_new_section_keeps_its_relation_to_the_anchor_through_a_field():
    yy, xx = np.mgrid[0:9, 0:11]
    vec = np.stack([1.5 * np.sin(xx / 3.0), -1.0 * np.cos(yy / 2.5)], axis=-1).astype(np.float32)
    anchor_new = SectionAlignment(4, Affine2D(np.array([[1.0, 0.0, 2.0], [0.0, 1.0, -1.0]])),
                                  DisplacementField(vec, (-100.0, -100.0), 80.0))
    anchor_old = SectionAlignment(4, Affine2D(np.array([[1.0, 0.004, 0.5], [-0.004, 1.0, 0.2]])))
    rec = SectionAlignment(5, Affine2D(np.array([[1.0, 0.0, -3.0], [0.0, 1.0, 4.0]])))
    got = through_anchor(rec, anchor_old, anchor_new, BBOX)
    pts = _points()  # points of the new section
    # Before: the anchor-section point that the window's solve put under each of them.
    before = anchor_new.aligned_to_section(rec.section_to_aligned(pts))
    after = anchor_old.aligned_to_section(got.section_to_aligned(pts))
    # Bilinear between nodes 64 px apart of a field curving by 1.5 px over ~240 px: a few hundredths (0.025 measured).
    assert np.abs(after - before).max() < 0.05
    # and it did move: the anchor's stored alignment is not the window's (the test can fail).
    assert np.abs(got.section_to_aligned(pts) - rec.section_to_aligned(pts)).max() > 1.0
