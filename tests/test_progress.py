"""The progress helper: readable in batch logs, a new bar per phase."""
from __future__ import annotations

import io

from stackbuild.run.progress import ProgressBar


def test_batch_log_gets_a_line_per_tenth_and_phases_are_numbered():
    out = io.StringIO()  # not a terminal: one line per tenth, no carriage returns
    bar = ProgressBar("report", stream=out)
    for i in range(1, 101):
        bar(i, 100)
    for i in range(1, 4):
        bar(i, 3)
    lines = out.getvalue().splitlines()
    assert "\r" not in out.getvalue()
    # the first call, then one line per tenth done (0 % ... 100 %)
    assert sum("report [" in line for line in lines) == 11 and "100/100" in lines[10]
    assert [line.split("]")[1].split()[0] for line in lines[11:]] == ["1/3", "2/3", "3/3"]
    assert all("report (2)" in line for line in lines[11:])


def test_disabled_bar_writes_nothing():
    out = io.StringIO()
    ProgressBar("stitch", enabled=False, stream=out)(1, 2)
    assert out.getvalue() == ""
