"""Progress on stderr for every long phase: search, validation, back-off, baselines.

One :class:`Progress` per command. ``note`` prints a message line; ``task``
starts a phase with a known amount of work (trials, trajectories) and returns a
:class:`Task` whose ``update(done, best)`` prints ``done/total``, the best value
so far, the elapsed time and an ETA. On a terminal the line is rewritten in
place (at most every ``TTY_INTERVAL`` s); otherwise (a log file, CI, cron) one
plain line is written at most every ``LOG_INTERVAL`` s, plus the first and the
last, so logs stay short at any speed.

The ETA assumes the rest of the phase runs at the mean pace so far (elapsed /
done x left): rough for trajectories that finish at very different rounds, but
it never claims precision it lacks (whole seconds, none before the first unit).
"""

from __future__ import annotations

import math
import sys
import time

__all__ = ["Progress", "Task", "task", "LOG_INTERVAL", "TTY_INTERVAL"]

#: Seconds between plain progress lines when stderr is not a terminal, and between rewrites on one
#: (common practice, no source: a line every few seconds reads as alive without flooding a log).
LOG_INTERVAL, TTY_INTERVAL = 5.0, 0.25


def _duration(seconds: float) -> str:
    seconds = max(0, int(round(seconds)))
    return f"{seconds // 60} min {seconds % 60:02d} s" if seconds >= 60 else f"{seconds} s"


class Task:
    """One phase: ``update(done, best)`` as work finishes; ``finish()`` prints the last line."""

    def __init__(self, owner: "Progress | None", name: str, total: int, unit: str, best_label: str = ""):
        self.owner, self.name, self.total, self.unit, self.best_label = owner, name, int(total), unit, best_label
        self.start = time.monotonic()
        self.done, self.best, self.extra = 0, None, ""
        self._shown = -math.inf
        self._first, self._ended = True, False
        self._parts: list[_Part] = []

    def update(self, done: int, best: float | None = None, extra: str = "") -> None:
        self.done, self.extra = int(done), extra
        if best is not None:
            self.best = best
        if self.owner is None:
            return
        now, final = time.monotonic(), self.done >= self.total
        if self._ended:
            return
        gap = TTY_INTERVAL if self.owner.tty else LOG_INTERVAL
        if self._first or final or now - self._shown >= gap:
            self._first, self._ended, self._shown = False, final, now
            self.owner._line(self.line(now), final=final)

    def part(self) -> "_Part":
        """A share of this task for work that reports on its own (one batch among several): its
        ``update(done)`` counts towards this task's done as the sum over the parts."""
        part = _Part(self)
        self._parts.append(part)
        return part

    def finish(self) -> None:
        if self.done < self.total:
            self.total = self.done  # the phase ended early (e.g. trajectories that stopped together)
        self.update(self.done)

    def line(self, now: float | None = None) -> str:
        elapsed = (now or time.monotonic()) - self.start
        text = f"{self.name}: {self.done}/{self.total} {self.unit}"
        if self.extra:
            text += f" ({self.extra})"
        if self.best_label:
            best = self.best
            text += f", best {self.best_label.format(best) if best is not None and math.isfinite(best) else 'none yet'}"
        text += f", {_duration(elapsed)}"
        if 0 < self.done < self.total:
            text += f", ETA {_duration(elapsed / self.done * (self.total - self.done))}"
        return text


class _Part:
    def __init__(self, task: Task):
        self.task, self.done = task, 0

    def update(self, done: int, best: float | None = None, extra: str = "") -> None:
        self.done = int(done)
        self.task.update(sum(p.done for p in self.task._parts), best, extra)


class Progress:
    """Progress on stderr: one rewritten line on a terminal, plain lines at a steady pace otherwise.

    ``total`` and ``unit`` describe the search (trials; ``unit`` is how a trial's value reads,
    e.g. ``bits/worker``); ``trials(...)`` is what the search's watcher calls.
    """

    def __init__(self, total: int = 0, stream=None, *, unit: str = "bits/worker"):
        self.total = total
        self.unit = unit
        self.stream = stream or sys.stderr
        self.tty = hasattr(self.stream, "isatty") and self.stream.isatty()
        self._open = False
        self._search: Task | None = None

    def note(self, text: str) -> None:
        self._close()
        self.stream.write(f"[bittune] {text}\n")
        self.stream.flush()

    def task(self, name: str, total: int, unit: str, best_label: str = "") -> Task:
        return Task(self, name, total, unit, best_label)

    def trials(self, done: int, best: float | None, pruned: int, failed: int) -> None:
        if self._search is None or self._search.total != self.total:
            self._search = self.task("search", self.total, "trials",
                                     best_label="{:,.4g} " + self.unit + " (mean over the search seeds)")
        self._search.update(done, best, extra=f"pruned {pruned}, failed {failed}")

    def _line(self, text: str, *, final: bool) -> None:
        if self.tty:
            self.stream.write("\r[bittune] " + text + " " * 8)
            self._open = True
            if final:
                self._close()
        else:
            self.stream.write(f"[bittune] {text}\n")
        self.stream.flush()

    def _close(self) -> None:
        if self._open:
            self.stream.write("\n")
            self._open = False


class _Silent:
    def update(self, *args, **kwargs) -> None:
        pass

    def finish(self) -> None:
        pass

    def part(self) -> "_Silent":
        return self


def task(log, name: str, total: int, unit: str, best_label: str = ""):
    """``log.task(...)``, or a silent task when ``log`` is a bare progress object (note and trials only,
    as tests and benchmarks pass)."""
    make = getattr(log, "task", None)
    return make(name, total, unit, best_label) if make is not None else _Silent()
