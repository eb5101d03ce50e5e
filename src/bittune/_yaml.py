"""YAML in and out: a strict safe loader, a numpy-aware dumper, atomic writes,
and the declared-schema checker that ``job.py`` and ``config.py`` share.

The loader fixes two YAML 1.1 traps (DEVELOPERS.md, "Code habits"): duplicate keys are an
error instead of last-one-wins, and ``1e-3`` is a float instead of a string.
"""

from __future__ import annotations

import difflib
import errno
import math
import numbers
import os
import re
import reprlib
import stat
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import yaml

from bittune.errors import InputError

__all__ = [
    "load_yaml", "parse_yaml", "read_bytes", "dump_yaml", "atomic_write_text",
    "REQUIRED", "Param", "check_mapping", "unknown_key", "show", "key_text",
]

# YAML 1.2 core schema float (YAML 1.2.2 spec, section 10.3.2 "Core Schema"):
# [-+]? ( \. [0-9]+ | [0-9]+ ( \. [0-9]* )? ) ( [eE] [-+]? [0-9]+ )?
# PyYAML implements YAML 1.1, whose float needs a dot and a signed exponent,
# so ``1e-3`` and ``1E5`` would stay strings. This regex also matches plain
# integers, but resolvers are tried in order and ours is appended after the
# built-in int resolver, so ``12`` still loads as an int.
_FLOAT_12 = re.compile(r"^[-+]?(?:\.[0-9]+|[0-9]+(?:\.[0-9]*)?)(?:[eE][-+]?[0-9]+)?$")
_MERGE_TAG = "tag:yaml.org,2002:merge"


class _StrictLoader(yaml.SafeLoader):
    """SafeLoader + YAML 1.2 floats + duplicate keys rejected with their line."""

    source = "<yaml>"

    def construct_mapping(self, node: yaml.MappingNode, deep: bool = False) -> dict:
        if not isinstance(node, yaml.MappingNode):  # e.g. ``!!set x``: the base class says so
            return super().construct_mapping(node, deep=deep)
        seen: dict[Any, int] = {}
        for key_node, _ in node.value:
            if key_node.tag == _MERGE_TAG or not isinstance(key_node, yaml.ScalarNode):
                continue  # merge keys may be overridden; complex keys: the base class decides
            key = self.construct_object(key_node)
            line = key_node.start_mark.line + 1
            try:
                hash(key)
            except TypeError:
                continue  # e.g. ``!!set`` as a key: the base class reports the unhashable key
            if key in seen:
                raise InputError(f"{self.source}:{line}: duplicate key {key!r} "
                                 f"(first at line {seen[key]})")
            seen[key] = line
        return super().construct_mapping(node, deep=deep)


    def construct_object(self, node: yaml.Node, deep: bool = False) -> Any:
        # PyYAML's scalar constructors turn the text of one value into a Python
        # value and fail with plain Python errors on text such as ``!!int xx``
        # (ValueError), an empty ``!!int`` (IndexError), ``!!bool x`` (KeyError),
        # ``2020-13-45`` or a 5000-digit integer (Python's int-to-string limit);
        # report them as YAML errors with the node's line.
        try:
            return super().construct_object(node, deep=deep)
        except (yaml.YAMLError, InputError, RecursionError):
            raise
        except Exception as exc:
            if not isinstance(node, yaml.ScalarNode):
                raise
            raise yaml.constructor.ConstructorError(
                None, None, f"cannot read {show(node.value)} as {node.tag.rsplit(':', 1)[-1]}: "
                f"{type(exc).__name__}: {exc}", node.start_mark) from None


_StrictLoader.add_implicit_resolver("tag:yaml.org,2002:float", _FLOAT_12, list("-+.0123456789"))


class _Dumper(yaml.SafeDumper):
    """SafeDumper that knows the loader's YAML 1.2 floats, so it quotes the string
    ``'1e-3'`` instead of writing a plain ``1e-3`` that would load back as a number."""


_Dumper.add_implicit_resolver("tag:yaml.org,2002:float", _FLOAT_12, list("-+.0123456789"))

#: Unicode line breaks (YAML 1.1 sec. 5.4, from memory: NEL, LS, PS) that PyYAML writes raw into a single-quoted
#: or plain scalar with ``allow_unicode``; its reader then folds them (NEL comes back as a space).
_UNICODE_BREAKS = "\x85\u2028\u2029"


def _represent_str(dumper: yaml.SafeDumper, text: str):
    """A string with a Unicode line break goes double-quoted, where the emitter escapes it
    (``\\N``, ``\\L``, ``\\P``) and it loads back unchanged; other strings as PyYAML chooses."""
    style = '"' if any(c in text for c in _UNICODE_BREAKS) else None
    return dumper.represent_scalar("tag:yaml.org,2002:str", text, style=style)


_Dumper.add_representer(str, _represent_str)


def read_bytes(path: str | os.PathLike) -> bytes:
    """The bytes of a user's file; a missing or unreadable file is an InputError."""
    p = Path(path)
    try:
        return p.read_bytes()
    except FileNotFoundError:
        raise InputError(f"file not found: {p.absolute()}") from None
    except IsADirectoryError:
        raise InputError(f"not a file: {p.absolute()}") from None
    except OSError as exc:
        raise InputError(f"cannot read {p.absolute()}: {exc.strerror}") from None


def parse_yaml(data: bytes | str, *, source: str) -> object:
    """Parse YAML text with the strict loader; errors name ``source`` and the line."""
    try:
        loader = _StrictLoader(data)  # the reader checks the encoding here already
    except yaml.YAMLError as exc:  # e.g. bytes that are not UTF-8/UTF-16, control characters
        raise InputError(f"{source}: invalid YAML: {exc}") from None
    loader.source = source
    try:
        return loader.get_single_data()
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        where = f"{source}:{mark.line + 1}" if mark is not None else source
        what = "; ".join(s for s in (exc.context, exc.problem) if s)
        raise InputError(f"{where}: invalid YAML: {what}") from None
    except yaml.YAMLError as exc:
        raise InputError(f"{source}: invalid YAML: {exc}") from None
    except RecursionError:  # PyYAML's parser and composer recurse once per nesting level
        raise InputError(f"{source}: invalid YAML: nested too deeply") from None
    finally:
        loader.dispose()


def load_yaml(path: str | os.PathLike) -> object:
    """Read a user's YAML file safely (see the module docstring)."""
    return parse_yaml(read_bytes(path), source=str(path))


def _plain(obj: Any) -> Any:
    """Numpy scalars/arrays, tuples and paths -> plain Python, recursively."""
    if isinstance(obj, dict):
        return {_plain(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _plain(obj.tolist())
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, os.PathLike):
        return os.fspath(obj)
    return obj


def dump_yaml(data: Any) -> str:
    """YAML text of ``data`` in its own key order; numpy values become plain numbers."""
    return yaml.dump(_plain(data), Dumper=_Dumper, sort_keys=False, allow_unicode=True)


def _new_file_mode() -> int:
    """Mode a plain ``open(path, "w")`` would give a new file (0o666 minus umask)."""
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            umask = next(int(ln.split()[1], 8) for ln in fh if ln.startswith("Umask:"))
    except (OSError, StopIteration, ValueError):
        umask = 0o022  # common practice, no source: the usual default umask
    return 0o666 & ~umask


def atomic_write_text(path: str | os.PathLike, text: str) -> None:
    """Replace ``path`` by ``text`` atomically: readers see the old file or the new one.

    Temp file in the same folder (so ``os.replace`` is a rename on one file
    system), fsync, replace. On any failure the temp file is removed and the
    previous file is left untouched.
    """
    target = Path(path)
    try:
        atomic_write_bytes(target, text)
    except OSError as exc:
        if exc.errno in NO_SPACE:
            from .errors import WriteError

            raise WriteError(f"{target}: cannot write ({os.strerror(exc.errno)}); "
                             f"the previous file, if any, is unchanged") from None
        raise


#: errno values that mean "this file system cannot take the file": full, over quota, read-only.
NO_SPACE = (errno.ENOSPC, errno.EDQUOT, errno.EROFS)


def atomic_write_bytes(target: Path, data: bytes | str) -> None:
    """Temp file in the same folder, fsync, ``os.replace`` (text as UTF-8); on any failure the temp
    file is removed and the OSError propagates (:func:`atomic_write_text` names the file for a full disk)."""
    target = Path(target)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data.encode("utf-8") if isinstance(data, str) else data)
            fh.flush()
            os.fsync(fh.fileno())
        try:
            mode = stat.S_IMODE(target.stat().st_mode)
        except FileNotFoundError:
            mode = _new_file_mode()
        os.chmod(tmp, mode)  # mkstemp makes 0o600; keep the usual permissions
        os.replace(tmp, target)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise


# ---------------------------------------------------------------------------
# Declared schemas (DEVELOPERS.md, "Code habits"): one table per section,
# key -> Param, one message format, every problem of a file collected.


class _Required:
    def __repr__(self) -> str:
        return "REQUIRED"


#: Default of a key that must be given.
REQUIRED: Any = _Required()


@dataclass(frozen=True)
class Param:
    """Constraint of one key: kind, interval or options, default.

    ``kind`` is ``int``, ``real``, ``bool``, ``str``, ``choice``, ``choices``
    (a non-empty list of distinct options) or ``range`` (a pair ``[low, high]``
    of numbers with low <= high, each within the bounds). ``low`` and
    ``high`` bound numbers; ``closed`` says which ends are included
    (``both``, ``left``, ``right``, ``neither``). A ``None`` value in a file
    means "not given".
    """

    kind: str
    low: float | None = None
    high: float | None = None
    closed: str = "both"
    options: tuple[str, ...] = ()
    default: Any = None

    def describe(self) -> str:
        if self.kind == "choices":
            return "a list of distinct values from " + ", ".join(self.options)
        if self.kind == "range":
            inner = Param("real", low=self.low, high=self.high, closed=self.closed).describe()
            return f"a pair [low, high] with low <= high, each {inner}"
        if self.kind == "bool":
            return "true or false"
        if self.kind == "str":
            return "a non-empty string"
        if self.kind == "choice":
            return "one of " + ", ".join(self.options)
        noun = "an integer" if self.kind == "int" else "a number"
        lo_in, hi_in = self.closed in ("both", "left"), self.closed in ("both", "right")
        if self.low is not None and self.high is not None:
            return (f"{noun} in {'[' if lo_in else '('}{self.low:g}, "
                    f"{self.high:g}{']' if hi_in else ')'}")
        if self.low is not None:
            return f"{noun} {'>=' if lo_in else '>'} {self.low:g}"
        if self.high is not None:
            return f"{noun} {'<=' if hi_in else '<'} {self.high:g}"
        return noun

    def coerce(self, value: Any) -> tuple[bool, Any]:
        """``(True, normalised value)`` if ``value`` satisfies the constraint."""
        if self.kind == "choices":
            if isinstance(value, str):
                value = [value]
            ok = (isinstance(value, list) and len(value) > 0
                  and all(isinstance(v, str) and v in self.options for v in value)
                  and len(set(value)) == len(value))
            return ok, list(value) if ok else value
        if self.kind == "range":
            if not (isinstance(value, list) and len(value) == 2):
                return False, value
            inner = Param("real", low=self.low, high=self.high, closed=self.closed)
            (ok1, lo), (ok2, hi) = inner.coerce(value[0]), inner.coerce(value[1])
            ok = ok1 and ok2 and lo <= hi
            return ok, (lo, hi) if ok else value
        if self.kind == "bool":
            return isinstance(value, (bool, np.bool_)), bool(value)
        if self.kind in ("str", "choice"):
            if (isinstance(value, numbers.Integral) and not isinstance(value, (bool, np.bool_))
                    and abs(int(value)) < 10**18):
                value = str(value)  # a column named 2020 loads as an int
            ok = isinstance(value, str) and value.strip() != ""
            return ok and (self.kind == "str" or value in self.options), value
        number = _as_number(value)
        if number is None:
            return False, value
        if isinstance(number, int):  # exact: an int too large for a float stays an int here
            if self.kind != "int":
                if abs(number) > _FLOAT_MAX:
                    return False, value
                number = float(number)
        elif not math.isfinite(number) or (self.kind == "int" and not number.is_integer()):
            return False, value
        else:
            number = int(number) if self.kind == "int" else float(number)
        lo_in, hi_in = self.closed in ("both", "left"), self.closed in ("both", "right")
        if self.low is not None and (number < self.low or (number == self.low and not lo_in)):
            return False, value
        if self.high is not None and (number > self.high or (number == self.high and not hi_in)):
            return False, value
        return True, number


_FLOAT_MAX = int(np.finfo(np.float64).max)


def _as_number(value: Any) -> float | int | None:
    """Numbers, numpy numbers and numeric strings (``'1e-3'``); booleans are not numbers."""
    if isinstance(value, (bool, np.bool_)):
        return None
    if isinstance(value, numbers.Integral):
        return int(value)
    if isinstance(value, numbers.Real):
        return float(value)
    if isinstance(value, str):
        for convert in (int, float):
            try:
                return convert(value.strip())
            except ValueError:
                pass
    return None


class _ShortRepr(reprlib.Repr):
    """``reprlib`` bounds the work on huge or deeply shared values (a YAML alias
    bomb); integers past Python's int-to-string limit are described, not printed."""

    def repr_int(self, x: int, level: int) -> str:
        if x.bit_length() > 256:
            return f"<integer of {x.bit_length()} bits>"
        return super().repr_int(x, level)


_SHORT = _ShortRepr()
_SHORT.maxstring = _SHORT.maxother = _SHORT.maxlong = 80


def show(value: Any, limit: int = 60) -> str:
    """Short repr of a user's value for error messages."""
    text = _SHORT.repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


def key_text(key: Any) -> str:
    """A mapping key as it appears in a key path: strings as they are, anything else shown."""
    return key if isinstance(key, str) else show(key)


def unknown_key(path: str, key: Any, known: list[str]) -> str:
    """``workers.cout: unknown key (did you mean 'count'?)``."""
    text = key_text(key)
    close = difflib.get_close_matches(text, known, n=1) or [k for k in known if len(text) >= 3 and k.startswith(text)][:1]
    hint = f"did you mean {close[0]!r}?" if close else "expected one of " + ", ".join(known)
    return f"{path}: unknown key ({hint})"


def check_mapping(
    mapping: dict, schema: dict[str, Param], *, prefix: str, problems: list[str],
    allow_unknown: bool = False,
) -> dict[str, Any]:
    """Check ``mapping`` against ``schema``; append messages to ``problems``.

    Returns the valid values with defaults filled in; keys that are missing or
    invalid are left out (callers check ``problems`` before building anything).
    """
    values: dict[str, Any] = {}
    if not allow_unknown:
        problems.extend(unknown_key(prefix + key_text(k), k, list(schema))
                        for k in mapping if k not in schema)
    for key, param in schema.items():
        value = mapping.get(key)
        if value is None:
            if param.default is REQUIRED:
                problems.append(f"{prefix}{key}: required")
            else:
                values[key] = param.default
            continue
        ok, normalised = param.coerce(value)
        if ok:
            values[key] = normalised
        else:
            problems.append(f"{prefix}{key}: must be {param.describe()}, got {show(value)}"
                            + close_choices(param, value))
    return values


def close_choices(param: Param, value: Any) -> str:
    """`` (did you mean 'marina'?)`` for a misspelt name of a choice or choices key, else ''."""
    if param.kind not in ("choice", "choices"):
        return ""
    given = [value] if isinstance(value, str) else value if isinstance(value, list) else []
    hints = []
    for v in given:
        if isinstance(v, str) and v not in param.options:
            close = difflib.get_close_matches(v, param.options, n=1)
            hints += [(v, close[0])] if close else []
    if not hints:
        return ""
    if isinstance(value, str):
        return f" (did you mean {hints[0][1]!r}?)"
    return " (did you mean " + ", ".join(f"{c!r} for {v!r}" for v, c in hints) + "?)"
