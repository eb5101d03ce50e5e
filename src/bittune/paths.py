"""Output paths checked before anything runs: never overwrite an input or a file that is not ours.

``check_output`` refuses (exit 2, the path named) an output that resolves
(symlinks followed) to one of the command's inputs, an existing file that is
not a bittune file of the expected kind (recognised by its marker key, e.g.
``bittune_config: 1``), a folder, a path whose parent folder is missing or is
a file (missing folders are not created), and a folder we cannot write in
(read-only file system). ``check_folder`` does the same for folders bittune
creates (run folder, report folder): an existing file there is refused, and
the nearest existing parent must be a writable folder.
"""

from __future__ import annotations

import errno
import os
import tempfile
from pathlib import Path

from .errors import InputError

__all__ = ["check_output", "check_folder", "job_inputs", "MARKERS"]

#: Output kind -> the top-level key every file of that kind starts with.
MARKERS = {"config": "bittune_config", "constants": "bittune_constants"}


def job_inputs(job) -> list[Path]:
    """The files a job reads: the job itself, its data, a plugin file, a start file."""
    out = [Path(job.path), Path(job.data.path)]
    module = str(job.model_options.get("plugin", "")).rpartition(":")[0]
    if module.endswith(".py"):
        out.append(Path(job.path).parent / module if not Path(module).is_absolute() else Path(module))
        out.append(Path(module))
    if getattr(job.start, "path", None):
        out.append(Path(job.start.path))
    return out


def _same(a: Path, b: Path) -> bool:
    try:
        if a.exists() and b.exists():
            return os.path.samefile(a, b)
    except OSError:
        pass
    return a.resolve() == b.resolve()


def check_output(path, *, key: str, kind: str, inputs=(), allow=()) -> Path:
    """Refuse an unsafe output path (see the module docstring); returns it as a Path.

    ``allow`` lists inputs that may also be the output (retune's ``--previous``).
    """
    p = Path(path)
    for src in inputs:
        if src is not None and _same(p, Path(src)) and not any(_same(p, Path(a)) for a in allow):
            raise InputError(f"{key}: {p} is also an input of this command ({src}); "
                             f"write the output elsewhere")
    if p.is_dir():
        raise InputError(f"{key}: {p} is a folder; give a file name")
    if os.path.lexists(p) and not p.exists():
        raise InputError(f"{key}: {p} is a broken symbolic link")
    if p.exists() and not any(_same(p, Path(a)) for a in allow) and not _is_ours(p, kind):
        raise InputError(f"{key}: {p} exists and is not a bittune {kind} file (no {MARKERS[kind]} key); "
                         f"refusing to overwrite it")
    parent = p.absolute().parent
    if not parent.exists():
        raise InputError(f"{key}: the folder {parent} does not exist (bittune creates no missing folders "
                         f"for an output file)")
    if not parent.is_dir():
        raise InputError(f"{key}: {parent} is not a folder")
    _check_writable(parent, key)
    return p


def check_folder(path, *, key: str) -> Path:
    """A folder bittune will create or reuse: not a file, under a writable existing folder."""
    p = Path(path)
    if p.exists() and not p.is_dir():
        raise InputError(f"{key}: {p} exists and is not a folder")
    probe = p.absolute()
    while not probe.exists():
        probe = probe.parent
    if not probe.is_dir():
        raise InputError(f"{key}: {probe} is not a folder")
    _check_writable(probe, key)
    return p


def _check_writable(folder: Path, key: str) -> None:
    try:
        fd, tmp = tempfile.mkstemp(prefix=".bittune-check.", dir=folder)
    except OSError as exc:
        why = "read-only file system" if exc.errno == errno.EROFS else os.strerror(exc.errno or 0)
        raise InputError(f"{key}: cannot write in {folder} ({why})") from None
    os.close(fd)
    os.unlink(tmp)


def _is_ours(p: Path, kind: str) -> bool:
    import yaml

    try:
        with open(p, "rb") as fh:
            head = fh.read(1 << 20)
        doc = yaml.safe_load(head)
    except Exception:  # unreadable or not YAML: not ours
        return False
    return isinstance(doc, dict) and MARKERS[kind] in doc
