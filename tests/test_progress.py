"""The progress reporter: silent when quiet or not on a terminal, a line otherwise."""

from __future__ import annotations

import io

from invariance.progress import Progress, format_duration, track


class FakeTerminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_quiet_writes_nothing_even_on_a_terminal():
    out = FakeTerminal()
    with Progress(5, label="search", quiet=True, stream=out) as bar:
        for _ in range(5):
            bar.update()
    assert out.getvalue() == ""
    assert bar.count == 5 and not bar.enabled


def test_not_a_terminal_writes_nothing():
    out = io.StringIO()  # isatty() is False: a log file or a pipe
    for _ in track(range(4), label="batch", stream=out):
        pass
    assert out.getvalue() == ""


def test_terminal_shows_count_share_and_note():
    out = FakeTerminal()
    with Progress(4, label="score tests", stream=out, min_interval=0.0) as bar:
        for k in range(4):
            bar.update(note=f"item {k}")
    text = out.getvalue()
    assert text.startswith("\r") and text.endswith("\n")
    last = text.strip().split("\r")[-1]
    assert "score tests" in last and "4/4" in last and "100%" in last and "item 3" in last


def test_unknown_total_counts_only():
    out = FakeTerminal()
    seen = list(track((x for x in range(3)), label="sims", stream=out))
    assert seen == [0, 1, 2]
    assert "3 done" in out.getvalue()


def test_line_estimates_time_left():
    bar = Progress(10, label="x", quiet=True)
    bar.count = 5
    line = bar.line(now=bar._start + 10.0)
    assert "5/10" in line and "elapsed 0:10" in line and "left ~0:10" in line


def test_format_duration():
    assert format_duration(0) == "0:00"
    assert format_duration(75) == "1:15"
    assert format_duration(3 * 3600 + 62) == "3:01:02"


def test_fitting_stages_advance_the_line():
    # the runner advances one step per stage, naming the stage; quiet runs draw nothing
    from types import SimpleNamespace

    from invariance.pipeline.runner import run_stages

    spec = SimpleNamespace(title="t", estimator="ml", seed=1)
    stages = [("data", lambda spec, state: ({"a": 1}, state)), ("fits", lambda spec, state: ({"b": 2}, state))]
    out = FakeTerminal()
    with Progress(len(stages), label="fitting", stream=out, min_interval=0.0) as bar:
        results, _ = run_stages(spec, stages, progress=bar)
    assert results["a"] == 1 and results["b"] == 2 and bar.count == 2
    last = out.getvalue().strip().split("\r")[-1]
    assert "fitting" in last and "2/2" in last and "fits" in last
    quiet = FakeTerminal()
    with Progress(len(stages), label="fitting", stream=quiet, quiet=True) as bar:
        run_stages(spec, stages, progress=bar)
    assert quiet.getvalue() == ""
