"""The progress helper: readable in batch logs, a new bar per phase."""
from __future__ import annotations

import io

from stackbuild.run.progress import ProgressBar


def test_batch_log_gets_a_line_per_tenth_and_phases_are_numbered():
    out = io.StringIO()  # not a terminal: one line per tenth, no carriage returns
    bar = ProgressBar("tally", stream=out)  # a label with no unit of its own: phases are numbered
    for i in range(1, 101):
        bar(i, 100)
    for i in range(1, 4):
        bar(i, 3)
    lines = out.getvalue().splitlines()
    assert "\r" not in out.getvalue()
    # the first call, then one line per tenth done (0 % ... 100 %)
    assert sum("tally [" in line for line in lines) == 11 and "100/100" in lines[10]
    assert [line.split("]")[1].split()[0] for line in lines[11:]] == ["1/3", "2/3", "3/3"]
    assert all("tally (2)" in line for line in lines[11:])


def test_disabled_bar_writes_nothing():
    out = io.StringIO()
    ProgressBar("stitch", enabled=False, stream=out)(1, 2)
    assert out.getvalue() == ""


def test_every_bar_says_what_it_counts_and_a_mapper_names_each_phase():
    # A mapper announces the task function it maps; the bar starts a new phase counting its words.
    from stackbuild.run.cluster import serial_mapper
    from stackbuild.run.progress import TASK_UNITS

    out = io.StringIO()
    bar = ProgressBar("report", stream=out)
    mapper = serial_mapper(bar)

    def seam_job(x):
        return x

    def some_new_job(x):
        return x

    mapper(seam_job, range(3))
    mapper(some_new_job, range(2))
    lines = out.getvalue().splitlines()
    assert any(f"3/3 {TASK_UNITS['seam_job']} " in line for line in lines)
    assert "2/2 some new job tasks " in lines[-1]
    # a stage's own bar takes its label's unit
    out = io.StringIO()
    ProgressBar("render", stream=out)(1, 4)
    assert "1/4 planes written " in out.getvalue()
