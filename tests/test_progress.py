"""Progress lines: steady pace off a terminal, done/total, best so far, ETA."""

from __future__ import annotations

import io

import pytest

import bittune.progress as progress
from bittune.progress import LOG_INTERVAL, Progress


class Clock:
    def __init__(self):
        self.now = 100.0

    def __call__(self):
        return self.now


@pytest.fixture
def clock(monkeypatch):
    c = Clock()
    monkeypatch.setattr(progress.time, "monotonic", c)
    return c


def test_plain_lines_come_at_most_every_interval_with_first_and_last(clock):
    out = io.StringIO()  # not a terminal
    log = Progress(stream=out)
    task = log.task("validation", 100, "trajectories")
    for done in range(1, 101):
        clock.now += 0.5  # one unit every half second: 50 s in all
        task.update(done)
    task.finish()
    lines = out.getvalue().splitlines()
    # first line, then one per LOG_INTERVAL (50 s / 5 s = 10), the last at 100/100, nothing twice
    assert lines[0].startswith("[bittune] validation: 1/100 trajectories")
    assert lines[-1].startswith("[bittune] validation: 100/100 trajectories")
    assert len(lines) <= 2 + 50 / LOG_INTERVAL
    assert sum("100/100" in ln for ln in lines) == 1


def test_eta_is_the_mean_pace_times_what_is_left(clock):
    out = io.StringIO()
    task = Progress(stream=out).task("search", 60, "trials", best_label="{:,.4g} bits/worker")
    clock.now += 20.0
    task.update(15, best=27119.0)  # 20 s for 15 trials: 45 left at 4/3 s each = 60 s
    line = out.getvalue().splitlines()[-1]
    assert line == "[bittune] search: 15/60 trials, best 2.712e+04 bits/worker, 20 s, ETA 1 min 00 s"


def test_search_lines_name_the_seeds_their_best_is_measured_on(clock):
    out = io.StringIO()
    log = Progress(total=10, stream=out)
    log.trials(0, None, 0, 0)
    clock.now += 6.0
    log.trials(4, 5000.0, 1, 0)
    first, second = out.getvalue().splitlines()
    assert "0/10 trials (pruned 0, failed 0), best none yet" in first
    assert "4/10 trials (pruned 1, failed 0), best 5,000 bits/worker (mean over the search seeds)" in second
    assert "ETA 9 s" in second  # 6 s for 4 trials, 6 left


def test_a_terminal_gets_one_rewritten_line(clock):
    class Tty(io.StringIO):
        def isatty(self):
            return True

    out = Tty()
    task = Progress(stream=out).task("back-off", 3, "trajectories")
    for done in (1, 2, 3):
        clock.now += 1.0
        task.update(done)
    text = out.getvalue()
    assert text.count("\r") == 3 and text.endswith("\n") and text.count("\n") == 1


def test_parts_of_a_task_add_up(clock):
    out = io.StringIO()
    task = Progress(stream=out).task("baselines", 10, "trajectories")
    a, b = task.part(), task.part()
    a.update(3)
    clock.now += 6.0
    b.update(4)  # 3 + 4 of 10
    clock.now += 6.0
    a.update(6)  # 6 + 4: the last line
    lines = out.getvalue().splitlines()
    assert [ln.split(": ")[1].split(" ")[0] for ln in lines] == ["3/10", "7/10", "10/10"]
