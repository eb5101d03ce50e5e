"""Never lose a user's file, check everything before simulating, bounded resources, name the culprit.

Each test creates the situation for real (a real symlink, a real full or read-only tmpfs, a real
non-journal file) and checks the exit code, the message and that no user file changed (sha256)."""

from __future__ import annotations

import hashlib
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
import yaml

from bittune.cli import main
from bittune.errors import EXIT

ROOT = Path(__file__).resolve().parents[1]

JOB = """
data: st.svm
model: logistic_nonconvex
regularization: 0.01
workers: {count: 4, split: iid, seed: 0}
target: {grad_norm_sq: 1e-3, relative: true}
budget: {max_rounds: 2000}
probe: {runs: 1, run_rounds: 5, points_per_run: 2, power_iters: 5}
search: {methods: [marina], compressors: [rand_k], trials: 4, seeds: 1, validation_seeds: 2}
"""


@pytest.fixture(scope="module")
def data_file(tmp_path_factory):
    folder = tmp_path_factory.mktemp("safety-data")
    subprocess.run([sys.executable, str(ROOT / "examples/frost/make_data.py"), "--out", str(folder / "st.svm"),
                    "--nights", "20"], check=True, capture_output=True)
    return folder / "st.svm"


@pytest.fixture
def job(tmp_path, data_file):
    (tmp_path / "st.svm").write_bytes(data_file.read_bytes())
    path = tmp_path / "job.yaml"
    path.write_text(JOB)
    return path


def _digest(folder: Path) -> dict:
    """sha256 of every file under ``folder`` (symlinks as their targets' text)."""
    out = {}
    for p in sorted(folder.rglob("*")):
        if p.is_symlink():
            out[str(p)] = "link:" + os.readlink(p)
        elif p.is_file():
            out[str(p)] = hashlib.sha256(p.read_bytes()).hexdigest()
        else:
            out[str(p)] = "dir"
    return out


def _run(argv, capsys):
    code = main([str(a) for a in argv])
    cap = capsys.readouterr()
    return code, cap.out + cap.err


# ------------------------------------------------------------------ item 1: outputs


def test_output_onto_an_input_or_a_foreign_file_is_refused(job, tmp_path, capsys):
    link = tmp_path / "link.yaml"
    link.symlink_to(job)  # a real symlink to the job file
    foreign = tmp_path / "notes.yaml"
    foreign.write_text("shopping: [apples]\n")
    prev = tmp_path / "prev.yaml"
    prev.write_text("bittune_config: 1\nmethod: gd\ncompressor: {name: identity}\nstep_size: 0.01\n")
    (tmp_path / "model.py").write_text("def make(X, y):\n    raise RuntimeError('never imported')\n")
    plugin_job = tmp_path / "plugin_job.yaml"
    plugin_job.write_text(JOB.replace("model: logistic_nonconvex", "model: plugin\nplugin: model.py:make"))
    before = _digest(tmp_path)
    cases = [
        (["tune", job, "-o", job], "is also an input"),
        (["tune", job, "-o", tmp_path / "st.svm"], "is also an input"),
        (["tune", job, "-o", link], "is also an input"),
        (["probe", job, "-o", job], "is also an input"),
        (["probe", job, "-o", link], "is also an input"),
        (["tune", job, "-o", foreign], "is not a bittune config file"),
        (["retune", job, "-o", job, "--previous", prev], "is also an input"),
        (["retune", job, "-o", tmp_path / "st.svm", "--previous", prev], "is also an input"),
        (["tune", plugin_job, "-o", tmp_path / "model.py", "--allow-code"], "is also an input"),
        (["probe", job, "-o", foreign], "is not a bittune constants file"),
    ]
    for argv, message in cases:
        code, text = _run(argv, capsys)
        assert code == EXIT["input"], (argv, text)
        assert message in text and str(argv[3]) in text, text
        assert _digest(tmp_path) == before  # nothing changed, no run folder left behind


def test_output_folder_problems_are_refused_up_front(job, tmp_path, capsys):
    (tmp_path / "adir").mkdir()
    (tmp_path / "afile").write_text("x")
    before = _digest(tmp_path)
    cases = [
        (tmp_path / "adir", "is a folder"),
        (tmp_path / "afile" / "c.yaml", "is not a folder"),
        (tmp_path / "missing" / "c.yaml", "does not exist"),
    ]
    for out, message in cases:
        for cmd in ("tune", "probe"):
            code, text = _run([cmd, job, "-o", out], capsys)
            assert code == EXIT["input"] and message in text, text
            assert _digest(tmp_path) == before  # missing folders are not created


def test_report_folder_problems_are_refused_up_front(tmp_path, capsys):
    """`bittune report RUN -o X`: a file or a folder under a file is exit 2 naming -o, nothing written."""
    (tmp_path / "run").mkdir()
    (tmp_path / "afile").write_text("x")
    before = _digest(tmp_path)
    for out, message in ((tmp_path / "afile", "exists and is not a folder"),
                         (tmp_path / "afile" / "rep", "is not a folder")):
        code, text = _run(["report", tmp_path / "run", "-o", out], capsys)
        assert code == EXIT["input"] and "-o:" in text and message in text, text
        assert _digest(tmp_path) == before


def test_our_own_previous_output_is_replaced(job, tmp_path, capsys):
    out = tmp_path / "constants.yaml"
    code, _ = _run(["probe", job, "-o", out], capsys)
    assert code == 0 and out.read_text().startswith("bittune_constants: 1")
    first = out.stat().st_mtime_ns
    code, text = _run(["probe", job, "-o", out], capsys)  # ours (marker key): overwritten
    assert code == 0, text
    assert out.read_text().startswith("bittune_constants: 1") and out.stat().st_mtime_ns >= first


@pytest.fixture
def tmpfs(tmp_path):
    """A real tmpfs of 64 KiB mounted in a temp folder (needs root; skipped otherwise)."""
    mnt = tmp_path / "mnt"
    mnt.mkdir()
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=64k", "tmpfs", str(mnt)], capture_output=True)
    if r.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here: {r.stderr.decode().strip()}")
    try:
        yield mnt
    finally:
        subprocess.run(["umount", "-l", str(mnt)], capture_output=True)


def test_read_only_file_system_is_refused_up_front(job, tmpfs, tmp_path, capsys):
    prev = tmpfs / "c.yaml"
    prev.write_text("bittune_config: 1\n")
    r = subprocess.run(["mount", "-o", "remount,ro", str(tmpfs)], capture_output=True)
    if r.returncode != 0:
        pytest.skip(f"cannot remount read-only: {r.stderr.decode().strip()}")
    before = _digest(tmp_path)
    for argv in (["tune", job, "-o", prev], ["probe", job, "-o", tmpfs / "k.yaml"],
                 ["tune", job, "-o", tmp_path / "c.yaml", "--run-dir", tmpfs / "run"]):
        code, text = _run(argv, capsys)
        assert code == EXIT["input"] and "read-only file system" in text and str(tmpfs) in text, text
    assert _digest(tmp_path) == before


def test_full_disk_names_the_path_and_keeps_the_previous_file(job, tmpfs, capsys):
    out = tmpfs / "constants.yaml"
    out.write_text("bittune_constants: 1\nkept: yes\n")
    _fill(tmpfs)
    before = out.read_bytes()
    code, text = _run(["probe", job, "-o", out], capsys)
    assert code == EXIT["disk"] and code != EXIT["internal"], text
    assert str(out) in text and "No space left on device" in text, text
    assert out.read_bytes() == before
    assert sorted(p.name for p in tmpfs.iterdir()) == ["constants.yaml", "filler"]  # no temp file left


def _fill(folder: Path) -> None:
    try:  # fill the file system to the last block
        with open(folder / "filler", "wb") as fh:
            while True:
                fh.write(b"\0" * 4096)
                fh.flush()
    except OSError:
        pass


def test_full_run_folder_names_the_file(job, tmpfs, tmp_path, capsys):
    out = tmp_path / "c.yaml"
    code, text = _run(["tune", job, "-o", out, "--run-dir", tmpfs / "run"], capsys)  # 64 KiB: the report fills it
    assert code == EXIT["disk"], text
    assert f"{tmpfs / 'run' / 'report'}: cannot write the report (No space left" in text, text
    assert yaml.safe_load(out.read_text())["expected"]  # written before the report, and complete
    shutil.rmtree(tmpfs / "run")
    _fill(tmpfs)  # now full before the first journal record
    code, text = _run(["tune", job, "-o", tmp_path / "d.yaml", "--run-dir", tmpfs / "run"], capsys)
    assert code == EXIT["disk"], text
    assert f"{tmpfs / 'run'}/" in text and ": cannot write the " in text and "(No space left" in text, text
    assert not (tmp_path / "d.yaml").exists()


# ------------------------------------------------------------------ item 4: storage checked first


def test_bad_storage_is_input_before_the_probe(job, tmp_path, capsys):
    not_journal = tmp_path / "notes.journal"
    not_journal.write_text("this is not a journal\n")
    (tmp_path / "sdir").mkdir()
    before = _digest(tmp_path)
    cases = [
        ("nosuchdb://user@host/db", "unknown database kind"),
        ("postgresql://user@host:notaport/db", "malformed storage URL"),
        (str(not_journal), "is not an Optuna journal file"),
        (str(tmp_path / "sdir"), "is a folder"),
    ]
    for url, message in cases:
        code, text = _run(["tune", job, "-o", tmp_path / "c.yaml", "--storage", url], capsys)
        assert code == EXIT["input"], text
        assert message in text, text
        assert "probe:" not in text  # refused before the probe ran
        assert _digest(tmp_path) == before  # no run folder, the file untouched


def test_worker_on_a_missing_study_creates_no_file(job, tmp_path, capsys):
    before = _digest(tmp_path)
    for url in (str(tmp_path / "none.journal"), f"sqlite:///{tmp_path / 'none.db'}"):
        code, text = _run(["worker", "--job", job, "--storage", url, "--study", "s"], capsys)
        assert code == EXIT["input"] and "start the coordinator first" in text, text
    assert _digest(tmp_path) == before


# ------------------------------------------------------------------ item 5: bounded resources


def test_jobs_are_capped(job, tmp_path, capsys):
    code, text = _run(["tune", job, "-o", tmp_path / "c.yaml", "--jobs", "65"], capsys)
    assert code == EXIT["input"] and "--jobs" in text and "64" in text, text
    job.write_text(JOB.replace("trials: 4,", "trials: 4, jobs: 1000,"))
    code, text = _run(["tune", job, "-o", tmp_path / "c.yaml"], capsys)
    assert code == EXIT["input"] and "search.jobs" in text, text
    assert not (tmp_path / "c.run").exists()
    from bittune.job import load_job
    from bittune.tune import apply_overrides

    job.write_text(JOB)  # 4 trials: 8 processes would sit idle, so 4 run
    assert apply_overrides(load_job(job), {"jobs": 8}).search.jobs == 4


# ------------------------------------------------------------------ item 6: redaction (unit level)


def test_redact_hides_every_spelling_of_a_password():
    from bittune.storage import redact

    cases = {
        "postgresql://bob:pa%40ss@db/x": ("pa%40ss", "pa@ss"),
        "postgresql://bob@db/x?password=pa%26ss%21&sslmode=disable": ("pa%26ss%21", "pa&ss!"),
        "postgresql://bob@db/x?sslmode=disable&PASSWORD=plain": ("plain",),
    }
    for url, secrets in cases.items():
        text = f"failed: {url} ({' '.join(secrets)})"
        out = redact(text, url)
        for s in secrets:
            assert s not in out, out
        assert "bob" in out and "db" in out  # the rest stays readable


# ------------------------------------------------------------------ item 7: the real culprit


def test_huge_svmlight_index_names_its_line(job, tmp_path, capsys):
    (tmp_path / "st.svm").write_text("1 1:0.5 2:1\n-1 3:0.25\n1 1:1 1000000000000:2\n-1 2:1\n")
    code, text = _run(["probe", job], capsys)
    assert code == EXIT["input"], text
    assert f"{tmp_path / 'st.svm'}:3:" in text and "1000000000000" in text and "too large" in text, text


def test_plugin_with_non_finite_gradient_names_the_plugin(job, tmp_path, capsys):
    (tmp_path / "bad_model.py").write_text(
        "import numpy as np\n\n"
        "def make(X, y):\n"
        "    def loss_and_grad(w):\n"
        "        return float(np.mean((X @ w - y) ** 2)), np.full_like(w, np.nan)\n"
        "    return loss_and_grad\n")
    job.write_text(JOB.replace("model: logistic_nonconvex", "model: plugin\nplugin: bad_model.py:make"))
    code, text = _run(["probe", job, "--allow-code"], capsys)
    assert code == EXIT["input"], text
    assert "bad_model.py:make" in text and "gradient" in text and "start.scale" not in text, text
