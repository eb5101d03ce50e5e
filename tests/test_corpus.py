"""The corpus of malformed inputs (tests/corpus/cases.yaml), run through the CLI.

Each case names its command, its job / config files (in tests/corpus/files/,
or made here: the binary ones) and what must come out: the exit code and
fragments of stderr. For a failing case nothing may be written: stdout stays
empty, no file of the case folder appears, changes or disappears, and the
output file (`-o`) and the run folder beside it do not exist. Adding a case is
one entry in cases.yaml, plus a file in files/ when it needs a new one.

The CLI runs in-process (``bittune.cli.main``), so pytest's
``filterwarnings = error`` also applies: a case that warns fails unless its
entry says which warning to expect.
"""

from __future__ import annotations

import io
import re
import shutil
from pathlib import Path

import numpy as np
import pytest
import yaml

from bittune.cli import main

CORPUS = Path(__file__).resolve().parent / "corpus"
FILES = CORPUS / "files"
COMMANDS = ("probe", "theory", "replay", "tune")
CASE_KEYS = {"name", "command", "job", "config", "args", "exit", "stderr", "stdout", "bug", "warns"}


def _npz(**arrays) -> bytes:
    buf = io.BytesIO()
    np.savez(buf, **arrays)
    return buf.getvalue()


def _npy(array) -> bytes:
    buf = io.BytesIO()
    np.save(buf, np.asarray(array))
    return buf.getvalue()


def generated_files() -> dict[str, bytes]:
    """Binary and non-UTF-8 files of the corpus, made from a seeded generator (invented data)."""
    rng = np.random.default_rng(20240611)
    X = np.round(rng.normal(size=(12, 3)), 3)
    y = np.tile([1.0, 0.0], 6)
    groups = np.repeat([0, 1, 2], 4)
    good = _npz(X=X, y=y, groups=groups)
    X_nan = X.copy()
    X_nan[2, 1] = np.nan
    y_inf = y.copy()
    y_inf[5] = np.inf
    return {
        "good.npz": good,
        "nogroups.npz": _npz(X=X, y=y),
        "nan.npz": _npz(X=X_nan, y=y),
        "inf_y.npz": _npz(X=X, y=y_inf),
        "missing_y.npz": _npz(X=X),
        "not_zip.npz": b"this is plain text, not an archive\n",
        "truncated.npz": good[: len(good) // 2],
        "rows_mismatch.npz": _npz(X=X, y=y[:10]),
        "complex_x.npz": _npz(X=X + 1j, y=y),
        "empty_rows.npz": _npz(X=np.zeros((0, 3)), y=np.zeros(0)),
        "latin1.csv": "station,temp,wind,frost\nnorth,0.8,-0.3,1\nh\u00f6he,-0.5,0.9,0\n".encode("latin-1"),
        "x0_good.npy": _npy(np.zeros(3)),
        "x0_short.npy": _npy(np.ones(2)),
        "x0_nan.npy": _npy([0.0, np.nan, 0.0]),
        "x0.npz": _npz(x0=np.zeros(3)),
    }


def load_cases() -> list[dict]:
    cases = yaml.safe_load((CORPUS / "cases.yaml").read_text())
    names = [c["name"] for c in cases]
    assert len(names) == len(set(names)), "case names must be unique"
    for c in cases:
        assert set(c) <= CASE_KEYS, (c["name"], set(c) - CASE_KEYS)
        assert c["command"] in COMMANDS, c["name"]
        assert "job" in c and (c["command"] != "replay" or "config" in c), c["name"]
    return cases


CASES = load_cases()


def _param(case: dict):
    marks = [pytest.mark.xfail(reason=case["bug"], strict=True)] if case.get("bug") else []
    return pytest.param(case, id=case["name"], marks=marks)


def _snapshot(folder: Path) -> dict[str, tuple[int, int]]:
    return {str(p.relative_to(folder)): (p.stat().st_size, p.stat().st_mtime_ns)
            for p in sorted(folder.rglob("*"))}


def _argv(case: dict, folder: Path, out: Path) -> list[str]:
    job = str(folder / case["job"])
    cmd = case["command"]
    if cmd == "probe":
        argv = ["probe", job, "-o", str(out)]
    elif cmd == "theory":
        argv = ["theory", job]
    elif cmd == "replay":
        argv = ["replay", str(folder / case["config"]), "--job", job, "--seeds", "1"]
    else:
        argv = ["tune", job, "-o", str(out), "--trials", "2", "--jobs", "1"]
    return argv + [str(a) for a in case.get("args", [])]


def _run(argv: list[str]) -> int:
    try:
        return main(argv)
    except SystemExit as exc:  # argparse usage errors
        return int(exc.code)


@pytest.fixture(scope="module")
def corpus_copy(tmp_path_factory) -> Path:
    """files/ plus the generated files, once per module; each case copies it again."""
    folder = tmp_path_factory.mktemp("corpus") / "files"
    shutil.copytree(FILES, folder)
    for name, data in generated_files().items():
        (folder / name).write_bytes(data)
    return folder


def test_corpus_is_large_and_covers_every_command():
    assert len(CASES) >= 40
    assert {c["command"] for c in CASES} == set(COMMANDS)
    failing = [c for c in CASES if c["exit"] == 2]
    assert len(failing) >= 40
    # every file of files/ is used by some case (a stale file is a forgotten case)
    used = set()
    for c in CASES:
        used.update(c.get(k) for k in ("job", "config"))
    for job_name in {c["job"] for c in CASES}:
        text = (FILES / job_name).read_text(errors="replace")
        used.update(n for n in (p.name for p in FILES.iterdir()) if n in text)
    unused = sorted(p.name for p in FILES.iterdir() if p.name not in used)
    assert unused == [], f"files not used by any case: {unused}"


@pytest.mark.parametrize("case", [_param(c) for c in CASES])
def test_case(case: dict, corpus_copy: Path, tmp_path: Path, capsys) -> None:
    folder = tmp_path / "files"
    shutil.copytree(corpus_copy, folder)
    out = tmp_path / "out.yaml"
    before = _snapshot(tmp_path)
    argv = _argv(case, folder, out)
    if case.get("warns"):
        with pytest.warns(UserWarning, match=case["warns"]):
            code = _run(argv)
    else:
        code = _run(argv)
    captured = capsys.readouterr()
    assert code == case["exit"], captured.err
    for fragment in case.get("stderr", []):
        assert fragment in captured.err, f"{fragment!r} not in stderr:\n{captured.err}"
    for fragment in case.get("stdout", []):
        assert fragment in captured.out, f"{fragment!r} not in stdout:\n{captured.out}"
    assert "internal error" not in captured.err and "Traceback" not in captured.err
    if code == 0:
        if case["command"] in ("probe", "tune"):
            assert out.is_file()
        return
    assert re.search(r"^bittune( \w+)?: error: ", captured.err, re.MULTILINE), captured.err
    assert captured.out == ""
    assert not out.exists() and not (tmp_path / "out.run").exists()
    assert _snapshot(tmp_path) == before, "a failing command changed the case folder"
