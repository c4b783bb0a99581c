"""The contrast pass runs as one task per section through the mapper, not serially in the driver."""
from __future__ import annotations

import numpy as np

from stackbuild.render.contrast import DOC_KIND, RangeJob, measure_range
from stackbuild.render.settings import RenderSettings
from stackbuild.render.write import render_volume

from render_builders import make_build


def test_contrast_ranges_are_one_task_per_section_through_the_mapper(tmp_path):
    settings = RenderSettings(chunk=32, shard=2, contrast=True)
    folder = make_build(tmp_path, n_sections=3, lost=(1,), settings=settings)
    seen = []

    def mapper(fn, items):
        items = list(items)
        seen.extend(items)
        return [fn(item) for item in items]

    render_volume(folder.root, settings, mapper=mapper)
    assert sorted(job.section for job in seen) == [0, 2]
    assert all(isinstance(job, RangeJob) for job in seen)
    doc = folder.store.load_doc(DOC_KIND)
    for s in (0, 2):
        # Reference: the in-driver measurement (itself checked against numpy.percentile of the
        # whole coarse render in test_render_build.py).
        expect = measure_range(folder.store.load_stitch(s), settings.contrast_percentiles,
                               settings.contrast_scale)
        got = doc["sections"][str(s)]
        np.testing.assert_allclose((got["low"], got["high"]), expect)
