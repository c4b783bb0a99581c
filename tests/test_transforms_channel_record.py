"""The typed channel registration record: its map joins channel -> section, and nothing else is accepted.

A contract of this project's record format (see DEVELOPERS.md, "Records on disk"); no outside source.
"""
from __future__ import annotations

import numpy as np
import pytest

from stackbuild.transforms import Affine2D, ChannelRegistration

# Invented marker record, in the form the channels stage stores.
MAP = Affine2D(np.array([[8.0, 0.1, 3.5], [-0.1, 8.0, 12.0]]))
REC = {"section": 4, "channel": "glowA", "path": "m.tif", "pixel_size_nm": 32.0, "registered": True,
       "transform": {**MAP.to_json(), "input": "channel", "output": "section"}, "flags": ["ambiguous"],
       "measure_after": 1.2}


def test_record_round_trips_and_keeps_its_facts():
    reg = ChannelRegistration.from_json(REC)
    assert np.array_equal(reg.to_section.matrix, MAP.matrix) and reg.flags == ["ambiguous"]
    assert reg.to_json() == REC


@pytest.mark.parametrize("frames", [("section", "channel"), ("channel", "aligned")])
def test_a_map_between_other_frames_is_refused(frames):
    bad = {**REC, "transform": {**MAP.to_json(), "input": frames[0], "output": frames[1]}}
    with pytest.raises(ValueError, match="expected channel -> section"):
        ChannelRegistration.from_json(bad)
