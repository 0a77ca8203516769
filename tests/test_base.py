"""Shared plumbing: plain progress lines where stderr is not a terminal."""
from __future__ import annotations

import io

from warmstart.base.progress import PlainProgress, progress_bar


def test_plain_progress_writes_whole_lines():
    out = io.StringIO()
    bar = PlainProgress(range(3), desc="corpus: sources", unit="src", interval=0.0, stream=out)
    assert list(bar) == [0, 1, 2]
    lines = out.getvalue().splitlines()
    assert "\r" not in out.getvalue()
    assert lines[0].startswith("corpus: sources: 1/3 src (33 %)") and lines[-1].startswith("corpus: sources: 3/3 src (100 %)")


def test_plain_progress_waits_for_its_interval_and_can_be_silenced():
    out = io.StringIO()
    bar = PlainProgress(total=100, initial=10, desc="bench runs", unit="run", interval=3600.0, stream=out)
    for _ in range(50):
        bar.update()
    bar.set_postfix(dice=0.5)
    assert out.getvalue() == ""  # nothing before the interval has passed
    bar.close()
    bar.close()
    assert out.getvalue().splitlines() == [out.getvalue().splitlines()[0]]
    assert out.getvalue().startswith("bench runs: 60/100 run (60 %)") and "dice=0.5" in out.getvalue()
    quiet = io.StringIO()
    PlainProgress(total=2, disable=True, interval=0.0, stream=quiet).close()
    assert quiet.getvalue() == ""


def test_progress_bar_is_plain_when_stderr_is_not_a_terminal():
    # pytest captures stderr, so it is not a terminal here
    assert isinstance(progress_bar(total=3, desc="x", disable=True), PlainProgress)


def test_plain_progress_does_not_repeat_its_last_line():
    out = io.StringIO()
    bar = PlainProgress(total=2, desc="bench runs", unit="run", interval=0.0, stream=out)
    bar.update()
    bar.update()
    bar.close()  # the last update already wrote 2/2
    assert [line.split(",")[0] for line in out.getvalue().splitlines()] == ["bench runs: 1/2 run (50 %)",
                                                                          "bench runs: 2/2 run (100 %)"]
