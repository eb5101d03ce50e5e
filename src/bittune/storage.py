"""Study storage safety: URL checks before anything runs, one redaction function for
secrets, the run-folder lock, and stale journal locks left by a killed process.

* ``check_url`` refuses a malformed or unknown storage URL, and a journal file
  that is not a journal, as bad input (exit 2) before the probe runs.
* ``redact`` hides every password a storage URL carries (user info, query
  parameters such as ``?password=``, raw or percent-encoded) in any text; it
  is the one place secrets are hidden, and ``install_log_filter`` applies it to
  optuna's and SQLAlchemy's log records too.
* ``RunLock`` is an ``fcntl.flock`` on ``RUN_DIR/tune.lock`` (with the holder's
  pid inside): a second ``tune`` on the same run folder exits with the busy
  code. The kernel drops the lock when its holder dies, so a killed run never
  blocks the next one.
* While we hold that lock no other bittune process writes the journal, so a
  leftover ``study.journal.lock`` (optuna's JournalFileSymlinkLock) belongs to
  a dead process and is removed (``clear_stale_journal_lock``).
"""

from __future__ import annotations

import errno
import json
import logging
import os
import re
import sys
from pathlib import Path
from urllib.parse import parse_qsl, unquote, urlsplit

from .errors import BusyError, InputError

__all__ = ["redact", "secrets_of", "remember", "real_url", "without_secrets", "check_url", "is_database", "journal_path", "RunLock",
           "clear_stale_journal_lock", "install_log_filter", "JOURNAL_LOCK_GRACE"]

#: Query parameters whose values are secrets (common practice, no source: libpq's and
#: SQLAlchemy's spellings).
SECRET_KEYS = ("password", "passwd", "pwd", "secret", "token", "sslpassword")
MASK = "***"
#: Seconds an untouched journal lock may stand before optuna itself breaks it (backstop for a
#: lock held by a live process that hangs; optuna's default is 30).
JOURNAL_LOCK_GRACE = 30

_KNOWN: set[str] = set()  # every secret seen in this process, longest first when replacing
_REAL: dict[str, str] = {}  # redacted URL -> the URL itself, for URLs seen in this process


def is_database(url: str) -> bool:
    return "://" in str(url)


def secrets_of(url: str) -> set[str]:
    """The secrets a URL carries, in every spelling they may be printed in."""
    url = str(url)
    if not is_database(url):
        return set()
    found: set[str] = set()
    try:
        parts = urlsplit(url)
        netloc, query = parts.netloc, parts.query
    except ValueError:
        netloc = url.split("://", 1)[1].split("/", 1)[0]
        query = url.split("?", 1)[1] if "?" in url else ""
    if "@" in netloc:
        cred = netloc.rsplit("@", 1)[0]
        if ":" in cred:
            found.add(cred.split(":", 1)[1])
    for key, value in parse_qsl(query, keep_blank_values=False):
        if key.lower() in SECRET_KEYS:
            found.add(value)  # parse_qsl decodes: the decoded value
    for m in re.finditer(r"(?:^|[?&;])([^=&;]+)=([^&;#]*)", query):
        if unquote(m.group(1)).lower() in SECRET_KEYS:
            found.add(m.group(2))  # as written
    found |= {unquote(s) for s in found} | {unquote(s.replace("+", " ")) for s in found}
    return {s for s in found if s}


def remember(url: str) -> None:
    """Hide this URL's secrets from every later ``redact`` in this process."""
    _KNOWN.update(secrets_of(url))
    _REAL[redact(url, url)] = str(url)
    _REAL[without_secrets(url)] = str(url)


def without_secrets(url: str) -> str:
    """The URL with its passwords left out (not masked): what a file may keep. libpq then takes
    the password from its usual places (PGPASSWORD, ~/.pgpass) when the URL is opened again."""
    url = str(url)
    if not is_database(url) or not secrets_of(url):
        return url
    from urllib.parse import urlsplit, urlunsplit

    try:
        parts = urlsplit(url)
    except ValueError:
        return redact(url, url)
    netloc = parts.netloc
    if "@" in netloc:
        cred, host = netloc.rsplit("@", 1)
        netloc = cred.split(":", 1)[0] + "@" + host
    query = "&".join(q for q in parts.query.split("&")
                     if q and unquote(q.split("=", 1)[0]).lower() not in SECRET_KEYS)
    return redact(urlunsplit((parts.scheme, netloc, parts.path, query, parts.fragment)), url)


def real_url(url: str) -> str:
    """The URL a redacted URL (as written in a summary) stood for, if this process saw it."""
    return _REAL.get(str(url), str(url))


def redact(text, url: str | None = None) -> str:
    """``text`` with every known secret (and those of ``url``) replaced by ``***``."""
    text = str(text)
    secrets = _KNOWN | (secrets_of(url) if url else set())
    for s in sorted(secrets, key=len, reverse=True):
        text = text.replace(s, MASK)
    return text


class _RedactFilter(logging.Filter):
    def filter(self, record: logging.LogRecord) -> bool:
        if _KNOWN:
            try:
                msg = record.getMessage()
            except Exception:  # a malformed record: leave it to logging
                return True
            record.msg, record.args = redact(msg), None
        return True


_FILTER = _RedactFilter()


def install_log_filter() -> None:
    """Redact secrets in log records of optuna, SQLAlchemy and the root logger's handlers."""
    for name in ("optuna", "sqlalchemy", "sqlalchemy.engine", "sqlalchemy.pool", ""):
        logger = logging.getLogger(name)
        if _FILTER not in logger.filters:
            logger.addFilter(_FILTER)
        for h in logger.handlers:
            if _FILTER not in h.filters:
                h.addFilter(_FILTER)


def journal_path(url: str) -> Path:
    return Path(url).absolute()


def check_url(url: str, *, key: str = "--storage", must_exist: bool = False) -> None:
    """Refuse (exit 2) a storage URL that cannot be a study storage, before anything runs.

    A database URL must parse and name a dialect SQLAlchemy knows; a journal path
    must not be a folder, and an existing non-empty file must hold journal records.
    ``must_exist`` (``worker``): the storage must already exist (nothing is created).
    """
    url = str(url)
    remember(url)
    install_log_filter()
    if is_database(url):
        _check_database_url(url, key, must_exist)
        return
    p = Path(url)
    if p.is_dir():
        raise InputError(f"{key}: {p} is a folder, not a journal file")
    if not p.exists():
        if must_exist:
            raise InputError(f"{key}: no journal file {p} (start the coordinator first)")
        return
    with open(p, "rb") as fh:
        head = fh.readline(1 << 20)
    if head.strip():
        try:
            rec = json.loads(head)
        except (ValueError, UnicodeDecodeError):
            rec = None
        if not isinstance(rec, dict) or "op_code" not in rec:
            raise InputError(f"{key}: {p} is not an Optuna journal file (line 1 is not a journal record)")


def _check_database_url(url: str, key: str, must_exist: bool) -> None:
    try:
        from sqlalchemy.engine import make_url
        from sqlalchemy.exc import ArgumentError, NoSuchModuleError
    except ImportError:  # no SQLAlchemy: open_storage reports the missing driver
        return
    shown = redact(url)
    try:
        parsed = make_url(url)
    except (ArgumentError, ValueError) as exc:
        raise InputError(f"{key}: malformed storage URL {shown} ({redact(exc)})") from None
    try:
        parsed.get_dialect()
    except NoSuchModuleError:
        raise InputError(f"{key}: unknown database kind {parsed.drivername!r} in {shown} "
                         f"(use postgresql://..., sqlite:///FILE, or a journal file path)") from None
    except ImportError as exc:  # dialect known, driver missing: open_storage explains
        del exc
    if parsed.get_backend_name() == "sqlite":
        db = parsed.database
        if db and db != ":memory:":
            p = Path(db)
            if p.is_dir():
                raise InputError(f"{key}: {p} is a folder, not an SQLite database")
            if must_exist and not p.exists():
                raise InputError(f"{key}: no database file {p} (start the coordinator first)")
            if p.exists() and p.stat().st_size:
                with open(p, "rb") as fh:
                    if fh.read(16) != b"SQLite format 3\x00":
                        raise InputError(f"{key}: {p} is not an SQLite database")


class RunLock:
    """An exclusive lock on a run folder (``RUN_DIR/tune.lock`` holds the holder's pid)."""

    NAME = "tune.lock"

    def __init__(self, run_dir: Path):
        self.path = Path(run_dir).absolute() / self.NAME
        self.fd: int | None = None

    def acquire(self) -> "RunLock":
        import fcntl

        fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as exc:
            if exc.errno not in (errno.EWOULDBLOCK, errno.EACCES):
                os.close(fd)
                raise
            holder = os.pread(fd, 64, 0).decode("ascii", "replace").strip() or "?"
            os.close(fd)
            raise BusyError(f"run folder {self.path.parent} is in use by another bittune process "
                            f"(pid {holder}); retry when it has finished, or give another --run-dir") from None
        try:
            os.ftruncate(fd, 0)
            os.pwrite(fd, f"{os.getpid()}\n".encode("ascii"), 0)
        except OSError as exc:
            os.close(fd)
            from ._yaml import NO_SPACE

            if exc.errno in NO_SPACE:
                from .errors import WriteError

                raise WriteError(f"{self.path}: cannot write the run-folder lock ({os.strerror(exc.errno)})") \
                    from None
            raise
        self.fd = fd
        return self

    def release(self) -> None:
        if self.fd is not None:
            os.close(self.fd)  # closing drops the flock; the file stays (unlinking would race)
            self.fd = None

    def __enter__(self) -> "RunLock":
        return self.acquire()

    def __exit__(self, *exc) -> None:
        self.release()


def clear_stale_journal_lock(url: str, log=None) -> bool:
    """Remove optuna's journal lock left by a killed process (call only while holding the RunLock)."""
    if is_database(url):
        return False
    lock = Path(str(journal_path(url)) + ".lock")
    if not os.path.lexists(lock):
        return False
    try:
        os.unlink(lock)
    except FileNotFoundError:
        return False
    text = f"resume: removed a stale journal lock {lock} left by a stopped run"
    if log is not None:
        log.note(text)
    else:
        print(f"[bittune] {text}", file=sys.stderr)
    return True
