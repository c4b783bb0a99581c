"""The --fail-on expressions: accepted forms, rejected forms, and how they judge totals."""
from __future__ import annotations

import pytest

from stackbuild.errors import InputError
from stackbuild.qc.settings import ReportSettings
from stackbuild.qc.thresholds import MEASURES, Threshold, default_thresholds, parse_fail_on, parse_fail_on_list


@pytest.mark.parametrize("text, expect", [
    ("align.p95>2px", ("align.p95", ">", 2.0, "px")),
    ("stitch.rms > 0.5 px", ("stitch.rms", ">", 0.5, "px")),
    ("align.max>=40nm", ("align.max", ">=", 40.0, "nm")),
    ("flagged>0", ("flagged", ">", 0.0, "")),
    ("lost<=1", ("lost", "<=", 1.0, "")),
    ("rejected.fraction>5%", ("rejected.fraction", ">", 5.0, "%")),
    ("elastic.max>1.5e1", ("elastic.max", ">", 15.0, "px")),  # no unit: pixels
    ("  stitch.max < .25px ", ("stitch.max", "<", 0.25, "px")),
])
def test_good_expressions(text, expect):
    t = parse_fail_on(text)
    assert (t.measure, t.op, t.value, t.unit) == expect


@pytest.mark.parametrize("text, hint", [
    ("align.p95", "expected MEASURE OP NUMBER"),
    ("align.p95 > two px", "expected MEASURE OP NUMBER"),
    ("align.p95 => 2px", "expected MEASURE OP NUMBER"),
    ("align.p95 == 2px", "expected MEASURE OP NUMBER"),
    ("align.p99 > 2px", "unknown measure 'align.p99'"),
    ("flagged > 0px", "flagged is a count"),
    ("align.p95 > 2%", "align.p95 is a distance"),
    ("", "expected MEASURE OP NUMBER"),
])
def test_bad_expressions_say_what_was_expected(text, hint):
    with pytest.raises(InputError) as err:
        parse_fail_on(text)
    assert hint in str(err.value)


def test_lists_split_on_commas_and_reject_empty_parts():
    ts = parse_fail_on_list(["align.p95>2px, flagged>0", "lost>0"])
    assert [t.measure for t in ts] == ["align.p95", "flagged", "lost"]
    with pytest.raises(InputError):
        parse_fail_on_list([" , "])


def test_judging_converts_units():
    totals = {"align.max": 9.0, "rejected.fraction": 0.04, "flagged": 0, "stitch.rms": None}
    # 40 nm at 5 nm per pixel is 8 px: 9 px fails
    assert parse_fail_on("align.max>40nm").fails(totals, 5.0) == (True, 9.0)
    assert parse_fail_on("align.max>50nm").fails(totals, 5.0) == (False, 9.0)
    assert parse_fail_on("rejected.fraction>5%").fails(totals, 5.0)[0] is False
    assert parse_fail_on("rejected.fraction>=4%").fails(totals, 5.0)[0] is True
    assert parse_fail_on("flagged>0").fails(totals, 5.0)[0] is False
    # a measure that could not be measured does not fail the build
    assert parse_fail_on("stitch.rms>0.1px").fails(totals, 5.0) == (False, None)


def test_defaults_come_from_the_settings():
    ts = default_thresholds(ReportSettings(stitch_rms=0.7, align_p95=3.0))
    assert {(t.measure, t.value) for t in ts} == {("stitch.rms", 0.7), ("align.p95", 3.0), ("align.max", 5.0),
                                                  ("sections.blank", 0.0), ("tiles.missing", 0.0),
                                                  ("sections.unmeasured", 0.0),
                                                  ("channels.failed", 0.0)}
    assert all(isinstance(t, Threshold) and t.measure in MEASURES for t in ts)
