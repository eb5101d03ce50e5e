"""The error types every stage raises, with the exit code each maps to (docs/design.md, "Commands and exit codes")."""

from __future__ import annotations

__all__ = ["BittuneError", "InputError", "GradientCheckError", "StorageError", "WriteError", "BusyError", "EXIT"]

#: Exit codes of every command (docs/design.md, "Commands and exit codes").
EXIT = {
    "ok": 0,
    "internal": 1,
    "input": 2,
    "gradient_check": 3,
    "no_candidate": 4,
    "kept_previous": 5,
    "storage": 6,
    "disk": 7,
    "busy": 8,
    "interrupted": 130,
}


class BittuneError(Exception):
    """Base class: an error bittune explains to the user, with an exit code."""

    exit_code = EXIT["internal"]


class InputError(BittuneError):
    """Invalid usage or input (job, data or config file).

    ``problems`` holds every message found in one file, each starting with its
    key path or line (``workers.count: must be an integer >= 2, got 1``), so the
    user sees all of them at once.
    """

    exit_code = EXIT["input"]

    def __init__(self, problems: str | list[str], *, source: str | None = None):
        if isinstance(problems, str):
            problems = [problems]
        self.problems = list(problems)
        self.source = source
        head = f"{source}: " if source else ""
        if len(self.problems) == 1:
            text = head + self.problems[0]
        else:
            text = head + f"{len(self.problems)} problems\n" + "\n".join(
                "  " + p for p in self.problems
            )
        super().__init__(text)


class GradientCheckError(BittuneError):
    """The model's gradient disagrees with finite differences."""

    exit_code = EXIT["gradient_check"]


class StorageError(BittuneError):
    """The study storage cannot be reached (retryable: exit 6)."""

    exit_code = EXIT["storage"]


class WriteError(BittuneError):
    """A file could not be written: disk full, quota exceeded or read-only file system (exit 7).

    The message names the path; the previous file, if any, is left as it was.
    """

    exit_code = EXIT["disk"]


class BusyError(BittuneError):
    """Another bittune process holds the run folder (retry later: exit 8)."""

    exit_code = EXIT["busy"]
