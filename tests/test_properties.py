"""Property tests: the readers and loaders answer any input with a result or InputError.

Hypothesis feeds arbitrary bytes, mutations of valid files (they get past the
first byte and reach deeper code than random bytes do) and arbitrary YAML
documents to the job loader, the config loader, the three data readers and the
start-point reader. Anything raised that is not ``bittune.errors.InputError``
is a bug, and so is any warning except the job loader's documented "ignored
unless" one. A result that comes back must be usable: finite data of matching
shapes, a job or config that parses again to itself.

The minimal failing examples Hypothesis found are kept as plain tests at the end.
"""

from __future__ import annotations

import io
import warnings
import zipfile
from pathlib import Path

import numpy as np
import pytest
import scipy.sparse as sp
import yaml
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from bittune import config as config_mod
from bittune import job as job_mod
from bittune._yaml import REQUIRED, Param, dump_yaml, key_text, parse_yaml, show
from bittune.config import Config, config_to_dict, load_config, parse_config
from bittune.data import Dataset, load_data
from bittune.errors import InputError
from bittune.job import Job, load_job, parse_job
from bittune.workspace import Workspace, open_job

# ~200 examples per property keeps the file well under a minute on 2 cores.
PROPERTY = settings(max_examples=200, deadline=None,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])

GOOD_SVM = b"".join(b"%d 1:%.1f 2:%.1f 3:%.1f\n" % (i % 2, 0.1 * i - 0.5, 0.3 - 0.05 * i, (-1) ** i * 0.2)
                    for i in range(12))
GOOD_CSV = b"site,a,b,label\n" + b"".join(b"s%d,%.2f,%.2f,%d\n" % (i % 3, 0.1 * i, -0.2 * i, i % 2)
                                         for i in range(12))
GOOD_JOB = b"""data: d.svm
model: logistic_nonconvex
regularization: 0.1
workers: {count: 3, split: dirichlet, dirichlet_alpha: 2.0, seed: 1}
target: {grad_norm_sq: 1e-3, relative: true}
budget: {max_rounds: 100, max_bits_per_worker: 1e6}
start: {seed: 2, scale: 0.5}
probe: {runs: 2, safety: 1.5}
search: {methods: [diana, marina], compressors: [rand_k, dither], step_range: [0.5, 64], trials: 5}
"""
GOOD_CONFIG = b"""bittune_config: 1
method: marina
compressor: {name: rand_k, k: 2}
step_size: 0.25
sync_probability: 0.1
problem: {dimension: 3, workers: 3}
expected: {mean_bits_per_worker: 1200.5, note: '1e-3'}
"""


def _npz_bytes(*, compressed: bool = False, **arrays) -> bytes:
    buf = io.BytesIO()
    (np.savez_compressed if compressed else np.savez)(buf, **arrays)
    return buf.getvalue()


def _good_arrays() -> dict:
    rng = np.random.default_rng(11)
    return {"X": rng.normal(size=(12, 3)), "y": np.tile([0.0, 1.0], 6), "groups": np.repeat([4, 5, 6], 4)}


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    """Files a job may point at: every data format and a start point."""
    d = tmp_path_factory.mktemp("props")
    (d / "d.svm").write_bytes(GOOD_SVM)
    (d / "d.csv").write_bytes(GOOD_CSV)
    (d / "d.npz").write_bytes(_npz_bytes(**_good_arrays()))
    np.save(d / "x0.npy", np.zeros(3))
    return d


def _expect_input_error_or(fn, *, allowed_warning: str | None = None, allow_numeric_warnings: bool = False):
    """Run ``fn``; return its result, or the InputError it raised. Anything else fails the test."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            result = fn()
        except InputError as exc:
            assert exc.problems and all(isinstance(p, str) and p for p in exc.problems)
            assert str(exc)  # the message can be formatted
            result = exc
    for w in caught:
        if allowed_warning is not None and issubclass(w.category, UserWarning) and allowed_warning in str(w.message):
            continue
        if allow_numeric_warnings and issubclass(w.category, RuntimeWarning):
            continue  # numpy overflow while evaluating an absurd start point; rejected right after
        raise AssertionError(f"unexpected warning {w.category.__name__}: {w.message}")
    return result


def _names_where(exc: InputError, *, source: str, heads: tuple[str, ...] = ()) -> None:
    """What any InputError from a reader must say, whatever the input: the file (or the
    job's source) it came from, and for every problem where it is: a line of that file
    (``path:3: ...``), a key path starting with one of ``heads``, or ``top level``."""
    text = str(exc)
    assert source in text, f"the message does not name {source!r}: {text!r}"
    for problem in exc.problems:
        assert ": " in problem, f"no 'where: what' form: {problem!r}"
        assert problem.startswith((source, "top level", *heads)), f"names neither a line nor a key: {problem!r}"


def _unknown_keys_named(exc, doc, known, *, prefix: str = "") -> int:
    """Every key of ``doc`` outside ``known`` is named as ``prefix + key: unknown key``; returns how many."""
    if not isinstance(doc, dict):
        return 0
    missing = [k for k in doc if not (isinstance(k, str) and k in known)]
    for k in missing:
        head = f"{prefix}{key_text(k)}: unknown key ("
        assert isinstance(exc, InputError), f"unknown key {head!r} accepted"
        assert any(p.startswith(head) for p in exc.problems), (head, exc.problems)
    return len(missing)


def _job_heads(doc) -> tuple[str, ...]:
    """Key paths a job error may start with: the schema's names and the document's own keys."""
    own = [key_text(k) for k in doc] if isinstance(doc, dict) else []
    return tuple(JOB_KEYS + own)


# ---------------------------------------------------------------------------
# Strategies

YAML_TOKENS = [b": ", b"- ", b"[", b"]", b"{", b"}", b", ", b"#", b"&a ", b"*a", b"!!int ", b"!!float ",
               b"!!binary ", b"!!timestamp ", b"!!str ", b"!!set ", b"? ", b"|\n", b">\n", b"'", b'"',
               b"\n", b"\t", b"  ", b"1e-3", b"0x" + b"F" * 40, b"9" * 30, b"~", b"<<: ", b".nan",
               b"-1", b"0", b"yes", b"~nobody-here/x.svm", b"\x00", b"\xff\xfe", b"---\n", b"%YAML 1.1\n",
               b"2020-13-45", b"1:30:00", b"!python/object ", b"workers", b"count", b"data: ", b"\xc3\xa9"]
SVM_TOKENS = [b"1", b"0", b"-1", b"+1", b"2", b" ", b"\t", b"\n", b"\r", b"#", b":", b"1:0.5", b" 2:1e-3",
              b" 3:-4", b" 0:1", b" 2:nan", b" 1:inf", b"qid:1", b"9" * 19 + b":1", b"1e999", b" 7:.5",
              b"\xff", b"\x0b", b"-", b".", b"e"]
CSV_TOKENS = [b",", b"\n", b"\r\n", b'"', b"a", b"b", b"label", b"site", b"1", b"0", b"-2.5", b"1e-3",
              b"nan", b"inf", b"x", b" ", b"\xef\xbb\xbf", b"\x00", b"\xff", b"s1", b"9" * 25, b'""']


def mutations(base: bytes, tokens: list[bytes]) -> st.SearchStrategy[bytes]:
    """``base`` after 1-4 random edits: insert a token or random bytes, delete, overwrite, truncate."""

    @st.composite
    def strategy(draw) -> bytes:
        data = bytearray(base)
        for _ in range(draw(st.integers(1, 4))):
            op = draw(st.sampled_from(["insert", "delete", "overwrite", "truncate"]))
            pos = draw(st.integers(0, len(data)))
            if op == "insert":
                data[pos:pos] = draw(st.one_of(st.sampled_from(tokens), st.binary(min_size=1, max_size=4)))
            elif op == "delete":
                del data[pos:pos + draw(st.integers(1, 16))]
            elif op == "overwrite" and pos < len(data):
                data[pos] = draw(st.integers(0, 255))
            elif op == "truncate":
                del data[pos:]
        return bytes(data)

    return strategy()


def token_soup(tokens: list[bytes], *, max_size: int = 60) -> st.SearchStrategy[bytes]:
    return st.lists(st.sampled_from(tokens), max_size=max_size).map(b"".join)


def any_bytes(base: bytes, tokens: list[bytes]) -> st.SearchStrategy[bytes]:
    return st.one_of(st.binary(max_size=400), token_soup(tokens), mutations(base, tokens))


JOB_KEYS = sorted({*job_mod.TOP, *job_mod.SECTIONS, *(k for s in job_mod.SECTIONS.values() for k in s)})
CONFIG_KEYS = sorted({"bittune_config", "name", *config_mod.TOP, "compressor", "problem", *config_mod.PROBLEM,
                      *config_mod.FREE_SECTIONS, *(k for c in config_mod.COMPRESSORS.values() for k in c)})
TRAP_TEXT = ["1e-3", "1E5", ".5", "-0", "inf", "-.inf", ".nan", "0x1F", "1_000", "0o17", "1:30", "yes", "off",
             "~", "", " ", "2020-13-45", "null", "d.svm", "d.csv", "d.npz", "x0.npy", "rand_k", "marina", "iid"]
#: Scalars safe_dump can write (Python refuses to print ints over 4300 digits).
SCALARS = st.one_of(
    st.none(), st.booleans(), st.integers(), st.integers(min_value=-10**400, max_value=10**400),
    st.floats(), st.text(max_size=12), st.sampled_from(TRAP_TEXT),
)
#: What only a mapping built in Python (not from a file) can hold.
#: (The huge ones are built lazily: Hypothesis prints its strategies, and repr() of
#: an int over 4300 digits raises.)
RAW_SCALARS = st.one_of(SCALARS, st.builds(pow, st.just(16), st.just(5000)),
                        st.builds(pow, st.just(-10), st.just(5001)),
                        st.sampled_from([2 ** 64, b"bytes", ("t", 1), np.float64("nan"), np.int64(3), np.bool_(True)]))


def keys(known: list[str]) -> st.SearchStrategy:
    return st.one_of(st.sampled_from(known), st.text(max_size=8), st.integers(-3, 3), st.booleans(), st.none())


def documents(known: list[str], scalars=SCALARS) -> st.SearchStrategy:
    """Any tree of lists and mappings, with keys mostly from the schema's own names."""
    return st.recursive(scalars, lambda kids: st.one_of(st.lists(kids, max_size=4),
                                                        st.dictionaries(keys(known), kids, max_size=5)),
                        max_leaves=25)


def mostly(good: st.SearchStrategy, junk: st.SearchStrategy = SCALARS, *, one_in: int = 8) -> st.SearchStrategy:
    """``good`` most of the time, ``junk`` about once in ``one_in`` draws."""
    return st.integers(1, one_in).flatmap(lambda i: junk if i == 1 else good)


def param_values(p: Param, *, one_in: int = 20) -> st.SearchStrategy:
    """Values of a key declared by ``p``: valid ones from its declared bounds, now and
    then anything at all (``SCALARS``) or the value just outside a bound."""
    lo_open = p.closed in ("right", "neither")
    if p.kind in ("int", "real", "range"):
        lo = p.low if p.low is not None else -50.0
        hi = p.high if p.high is not None else lo + 100.0
        if p.kind == "int":
            good = st.integers(int(lo) + (1 if lo_open else 0), int(hi))
        else:
            good = st.floats(lo, hi, exclude_min=lo_open, exclude_max=p.closed in ("left", "neither"))
            good = st.one_of(good, good.map(lambda v: f"{v:e}"))  # also as text: '1.5e-03'
        if p.kind == "range":
            good = st.lists(good, min_size=2, max_size=2).map(lambda pair: sorted(pair, key=float))
        edge = st.sampled_from([v for v in (p.low, p.high, -1, 0) if v is not None])
        return mostly(good, st.one_of(SCALARS, edge), one_in=one_in)
    if p.kind == "bool":
        good = st.booleans()
    elif p.kind == "choice":
        good = st.sampled_from(p.options)
    elif p.kind == "choices":
        good = st.lists(st.sampled_from(p.options), min_size=1, unique=True)
    else:
        good = st.sampled_from(["label", "site", "a", "b"])
    return mostly(good, one_in=one_in)


@st.composite
def sections(draw, schema: dict[str, Param], known: list[str], **special) -> dict:
    """A mapping of some of the schema's keys, sometimes with an unknown key too."""
    out = {k: draw(special.get(k, param_values(p))) for k, p in schema.items()
           if draw(st.integers(1, 16 if p.default is REQUIRED else 2)) > 1}
    if draw(st.integers(1, 20)) == 1:
        out[draw(keys(known))] = draw(SCALARS)
    return out


DATA_PATHS = ["d.svm", "d.csv", "d.npz", "missing.svm", ".", "/", "d.SVM", "~nobody-here/x.svm",
              "a" * 300 + ".svm", "x\x00.svm", "", "d.svm/"]
X0_PATHS = ["x0.npy", "missing.npy", "d.npz", "d.svm", "~nobody-here/x0.npy", "a" * 300]


@st.composite
def data_sections(draw):
    path = draw(mostly(st.sampled_from(["d.svm", "d.csv", "d.npz"]), st.sampled_from(DATA_PATHS), one_in=10))
    if draw(st.integers(1, 4)) == 1:
        return path  # the shorthand form
    out = {"path": path}
    if path.endswith(".csv") or draw(st.integers(1, 20)) == 1:
        out["label_column"] = draw(mostly(st.just("label"), st.sampled_from(["site", "nope", 3]), one_in=20))
    if path.endswith(".csv") and draw(st.booleans()):
        out["group_column"] = draw(mostly(st.just("site"), st.sampled_from(["label", "a"])))
    if draw(st.integers(1, 6)) == 1:
        out["format"] = draw(param_values(job_mod.SECTIONS["data"]["format"], one_in=3))
    return out


@st.composite
def job_documents(draw):
    """Job-shaped mappings (every section, values mostly plausible), or any tree at all."""
    if draw(st.integers(1, 6)) == 1:
        return draw(documents(JOB_KEYS))
    doc = {"data": draw(data_sections())}
    doc.update({k: draw(param_values(p)) for k, p in job_mod.TOP.items() if k == "model" or draw(st.booleans())})
    for name, schema in job_mod.SECTIONS.items():
        if name == "data" or (name not in ("workers", "target", "budget") and draw(st.booleans())):
            continue
        special = {"file": mostly(st.just("x0.npy"), st.sampled_from(X0_PATHS), one_in=3)} if name == "start" else {}
        doc[name] = draw(mostly(sections(schema, JOB_KEYS, **special), one_in=30))
    if isinstance(doc.get("start"), dict) and "seed" in doc["start"] and "file" in doc["start"] \
            and draw(st.integers(1, 8)) > 1:
        del doc["start"][draw(st.sampled_from(["seed", "file"]))]  # both at once: an error, now and then
    if draw(st.integers(1, 20)) == 1:
        doc[draw(keys(JOB_KEYS))] = draw(SCALARS)
    return doc


@st.composite
def config_documents(draw):
    """Config-shaped mappings (method-specific keys mostly right), or any tree at all."""
    if draw(st.integers(1, 6)) == 1:
        return draw(documents(CONFIG_KEYS))
    T = config_mod.TOP
    method = draw(param_values(T["method"]))
    doc = {"bittune_config": draw(mostly(st.just(1))), "method": method,
           "step_size": draw(param_values(T["step_size"]))}
    name = draw(mostly(st.sampled_from(list(config_mod.COMPRESSORS))))
    compressor = {"name": name}
    for key in config_mod.COMPRESSORS.get(name, {}) if isinstance(name, str) else ():
        compressor[key] = draw(mostly(st.integers(-1, 5)))
    if draw(st.integers(1, 8)) == 1:
        compressor[draw(st.sampled_from(["k", "levels", "kk"]))] = draw(SCALARS)
    doc["compressor"] = name if isinstance(name, str) and len(compressor) == 1 and draw(st.booleans()) \
        else compressor
    for key, by_method in config_mod.METHOD_KEYS.items():
        if (method in by_method and (by_method[method] or draw(st.booleans()))) or draw(st.integers(1, 8)) == 1:
            doc[key] = draw(param_values(T[key]) if key in T else SCALARS)
    if draw(st.booleans()):
        doc["problem"] = draw(sections(config_mod.PROBLEM, CONFIG_KEYS))
    if draw(st.booleans()):  # one free-form section: kept verbatim
        doc[draw(st.sampled_from([*config_mod.FREE_SECTIONS, "notes"]))] = draw(documents(CONFIG_KEYS))
    if draw(st.integers(1, 8)) == 1:
        doc[draw(st.sampled_from(["expectd", "step", "methd", "sync_probabilty"]))] = draw(SCALARS)
    return doc


# ---------------------------------------------------------------------------
# Checks of a result


def _check_job(job: Job, folder: Path) -> None:
    assert job.workers.count >= 1 and job.budget.max_rounds >= 1 and (job.target.grad_norm_sq or job.target.loss_gap) > 0
    assert job.data.path.is_file() and job.data.format in job_mod.DATA_FORMATS
    lo, hi = job.search.step_range
    assert 0 < lo <= hi
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # the "ignored unless" warning, seen by the caller
        again = parse_job(job.raw, base_dir=folder, source="again", digest=job.digest)
    assert dump_yaml(_job_fields(again)) == dump_yaml(_job_fields(job))


def _job_fields(job: Job) -> dict:
    from dataclasses import asdict

    fields = asdict(job)
    fields.pop("path")
    return fields


def _check_config(cfg: Config) -> None:
    assert cfg.method in config_mod.METHODS and cfg.step_size > 0
    text = dump_yaml(config_to_dict(cfg))
    again = parse_config(parse_yaml(text, source="again"), source="again")
    assert dump_yaml(config_to_dict(again)) == text  # NaN-proof comparison: the written text


def _check_dataset(ds: Dataset) -> None:
    n, d = ds.X.shape
    assert n == ds.y.shape[0] >= 1 and d >= 1
    values = ds.X.data if sp.issparse(ds.X) else ds.X
    assert np.isfinite(values).all() and np.isfinite(ds.y).all()
    assert ds.groups is None or ds.groups.shape == (n,)


# ---------------------------------------------------------------------------
# Properties: bytes


@PROPERTY
@given(data=any_bytes(GOOD_JOB, YAML_TOKENS))
@example(data=GOOD_JOB)
def test_job_file_bytes(folder: Path, data: bytes) -> None:
    path = folder / "job.yaml"
    path.write_bytes(data)
    result = _expect_input_error_or(lambda: load_job(path), allowed_warning="ignored unless")
    assert isinstance(result, (Job, InputError))
    if isinstance(result, Job):
        _check_job(result, folder)
    else:  # the file is named, each problem by its line or key path
        try:
            doc = parse_yaml(data.decode("utf-8"), source=str(path))
        except (InputError, UnicodeDecodeError):
            doc = None
        _names_where(result, source=str(path), heads=_job_heads(doc))


@PROPERTY
@given(data=any_bytes(GOOD_CONFIG, YAML_TOKENS))
@example(data=GOOD_CONFIG)
def test_config_file_bytes(folder: Path, data: bytes) -> None:
    path = folder / "config.yaml"
    path.write_bytes(data)
    result = _expect_input_error_or(lambda: load_config(path))
    assert isinstance(result, (Config, InputError))
    if isinstance(result, Config):
        _check_config(result)
    else:
        try:
            doc = parse_yaml(data.decode("utf-8"), source=str(path))
        except (InputError, UnicodeDecodeError):
            doc = None
        own = tuple(key_text(k) for k in doc) if isinstance(doc, dict) else ()
        _names_where(result, source=str(path), heads=tuple(CONFIG_KEYS) + own)


@PROPERTY
@given(data=any_bytes(GOOD_SVM, SVM_TOKENS))
@example(data=GOOD_SVM)
def test_svmlight_file_bytes(folder: Path, data: bytes) -> None:
    path = folder / "fuzz.svm"
    path.write_bytes(data)
    result = _expect_input_error_or(lambda: load_data(path))
    assert isinstance(result, (Dataset, InputError))
    if isinstance(result, Dataset):
        _check_dataset(result)
    else:  # every problem starts with the file, most with its line: fuzz.svm:3: ...
        _names_where(result, source=str(path))


@PROPERTY
@given(data=any_bytes(GOOD_CSV, CSV_TOKENS), group=st.sampled_from([None, "site", "a"]))
@example(data=GOOD_CSV, group="site")
def test_csv_file_bytes(folder: Path, data: bytes, group: str | None) -> None:
    path = folder / "fuzz.csv"
    path.write_bytes(data)
    result = _expect_input_error_or(lambda: load_data(path, label_column="label", group_column=group))
    assert isinstance(result, (Dataset, InputError))
    if isinstance(result, Dataset):
        _check_dataset(result)
        assert (result.groups is None) == (group is None)
    else:  # the file, or the job key of a column that is not there (which names the file too)
        _names_where(result, source=str(path), heads=("data.label_column", "data.group_column"))
        for problem in result.problems:
            assert str(path) in problem, problem


@st.composite
def npz_files(draw) -> bytes:
    """An archive of X (n, 3), y (n,) and maybe groups, then maybe one array fault (dtype,
    shape, a missing or non-finite array) and maybe byte edits; or any bytes at all."""
    if draw(st.integers(1, 5)) == 1:
        return draw(st.binary(max_size=300))
    n = draw(st.integers(0, 6))
    finite = st.floats(-1e3, 1e3, width=32)
    arrays = {"X": np.array(draw(st.lists(finite, min_size=3 * n, max_size=3 * n))).reshape(n, 3),
              "y": np.array(draw(st.lists(st.sampled_from([0.0, 1.0]), min_size=n, max_size=n)))}
    if draw(st.booleans()):
        arrays["groups"] = np.array(draw(st.lists(st.integers(0, 2), min_size=n, max_size=n)), dtype=np.int64)
    if draw(st.booleans()):  # one fault in one array
        name = draw(st.sampled_from(sorted(arrays)))
        fault = draw(st.sampled_from(["dtype", "shape", "drop", "nonfinite", "rows"]))
        a = arrays[name]
        if fault == "dtype":
            dtype = draw(st.sampled_from(["f4", "i4", "u1", "?", "c16", "U3", "S2", "f2"]))
            arrays[name] = a.astype(dtype) if dtype not in ("U3", "S2") else np.array([str(v)[:3] for v in a.ravel()],
                                                                                      dtype=dtype)
        elif fault == "shape":
            arrays[name] = a.reshape(-1) if a.ndim == 2 else a.reshape(-1, 1)
        elif fault == "drop":
            del arrays[name]
        elif fault == "nonfinite" and a.size and a.dtype.kind == "f":
            a = a.copy()
            a.flat[draw(st.integers(0, a.size - 1))] = draw(st.sampled_from([np.nan, np.inf, -np.inf]))
            arrays[name] = a
        elif fault == "rows":
            arrays[name] = a[:-1] if len(a) else a
    data = bytearray(_npz_bytes(compressed=draw(st.booleans()), **arrays))
    for _ in range(draw(st.sampled_from([0, 0, 1, 3]))):
        pos = draw(st.integers(0, len(data) - 1))
        if draw(st.booleans()):
            data[pos] = draw(st.integers(0, 255))
        else:
            del data[pos:]
            break
    return bytes(data)


@PROPERTY
@given(data=npz_files())
def test_npz_file_bytes(folder: Path, data: bytes) -> None:
    path = folder / "fuzz.npz"
    path.write_bytes(data)
    result = _expect_input_error_or(lambda: load_data(path))
    assert isinstance(result, (Dataset, InputError))
    if isinstance(result, Dataset):
        _check_dataset(result)
    else:
        _names_where(result, source=str(path))


@st.composite
def npy_files(draw) -> bytes:
    """A .npy vector (any length, dtype, values) with 0-2 byte edits, or an archive, or any bytes."""
    kind = draw(st.integers(0, 5))
    if kind == 0:
        return draw(st.binary(max_size=200))
    if kind == 1:
        return _npz_bytes(x0=np.zeros(3))
    dtype = draw(st.sampled_from(["f8", "f4", "i8", "c16", "U2", "?"]))
    values = draw(st.lists(st.floats(allow_nan=True, allow_infinity=True), min_size=0, max_size=5))
    buf = io.BytesIO()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        np.save(buf, np.array(values, dtype="f8").astype(dtype) if dtype != "U2"
                else np.array([str(v)[:2] for v in values]))
    data = bytearray(buf.getvalue())
    for _ in range(draw(st.integers(0, 2))):
        data[draw(st.integers(0, len(data) - 1))] = draw(st.integers(0, 255))
    return bytes(data)


@settings(PROPERTY, max_examples=100)
@given(data=npy_files())
def test_start_file_bytes(folder: Path, data: bytes) -> None:
    (folder / "fuzz_x0.npy").write_bytes(data)
    job = parse_job({"data": "d.svm", "model": "least_squares", "workers": {"count": 2, "split": "iid"},
                     "target": {"grad_norm_sq": 1e-3}, "budget": {"max_rounds": 10},
                     "start": {"file": "fuzz_x0.npy"}}, base_dir=folder, source="job.yaml")
    result = _expect_input_error_or(lambda: open_job(job), allow_numeric_warnings=True)
    assert isinstance(result, (Workspace, InputError))
    if isinstance(result, Workspace):
        assert result.x0.shape == (3,) and np.isfinite(result.x0).all() and result.target > 0
    else:  # the job key that holds the file (or the start point it gave), and the job's source
        assert all(p.startswith(("start.file: ", "start: ")) for p in result.problems), result.problems
        assert str(result).startswith("job.yaml: "), str(result)


# ---------------------------------------------------------------------------
# Properties: YAML documents and mappings


@pytest.mark.slow
@PROPERTY
@given(doc=job_documents())
def test_yaml_job_documents(folder: Path, doc) -> None:
    text = yaml.safe_dump(doc)
    result = _expect_input_error_or(
        lambda: parse_job(parse_yaml(text, source="job.yaml"), base_dir=folder, source="job.yaml"),
        allowed_warning="ignored unless")
    assert isinstance(result, (Job, InputError))
    if isinstance(result, Job):
        _check_job(result, folder)
    else:
        _names_where(result, source="job.yaml", heads=_job_heads(parsed := parse_yaml(text, source="job.yaml")))
        # Predictable content: every unknown key is named with its path (DEVELOPERS.md: unknown
        # keys are errors with the closest known key suggested), at the top and in each section.
        _unknown_keys_named(result, parsed, [*job_mod.TOP, *job_mod.SECTIONS])
        if isinstance(parsed, dict):
            for name, schema in job_mod.SECTIONS.items():
                if isinstance(parsed.get(name), dict):
                    _unknown_keys_named(result, parsed[name], list(schema), prefix=f"{name}.")
    if isinstance(doc, dict) and any(not isinstance(k, str) or k not in JOB_KEYS for k in doc):
        assert isinstance(result, InputError)  # an unknown top-level key is never accepted


@pytest.mark.slow
@PROPERTY
@given(doc=config_documents())
def test_yaml_config_documents(doc) -> None:
    text = yaml.safe_dump(doc)
    result = _expect_input_error_or(lambda: parse_config(parse_yaml(text, source="c.yaml"), source="c.yaml"))
    assert isinstance(result, (Config, InputError))
    if isinstance(result, Config):
        _check_config(result)
    else:
        parsed = parse_yaml(text, source="c.yaml")
        own = tuple(key_text(k) for k in parsed) if isinstance(parsed, dict) else ()
        _names_where(result, source="c.yaml", heads=tuple(CONFIG_KEYS) + own)
    if isinstance(doc, dict):
        # The typos config_documents plants are close to a known key: always an error naming it
        # with the suggestion (config.py keeps other unknown text keys as free sections).
        for typo, meant in (("expectd", "expected"), ("step", "step_size"), ("methd", "method"),
                            ("sync_probabilty", "sync_probability")):
            if typo in doc:
                assert isinstance(result, InputError), typo
                assert f"{typo}: unknown key (did you mean {meant!r}?)" in result.problems, result.problems
        comp = doc.get("compressor")
        if isinstance(comp, dict) and "kk" in comp and comp.get("name") in config_mod.COMPRESSORS:
            # (with no usable name the parser cannot know the compressor's keys: only the name is reported)
            assert isinstance(result, InputError)
            assert any(p.startswith("compressor.kk: unknown key") for p in result.problems), result.problems


@PROPERTY
@given(doc=st.one_of(job_documents(), documents(JOB_KEYS, RAW_SCALARS)),
       where=st.sampled_from([None, *job_mod.SECTIONS]), key=st.one_of(st.sampled_from(JOB_KEYS), RAW_SCALARS),
       value=RAW_SCALARS)
def test_python_job_mappings(folder: Path, doc, where, key, value) -> None:
    """Mappings built in Python (not read from YAML) may hold what no file can: huge ints, bytes, tuples."""
    if isinstance(doc, dict):
        target = doc if where is None else doc.setdefault(where, {})
        if isinstance(target, dict):
            target[key] = value
    result = _expect_input_error_or(lambda: parse_job(doc, base_dir=folder, source="job"),
                                    allowed_warning="ignored unless")
    assert isinstance(result, (Job, InputError))
    if isinstance(result, InputError):
        _names_where(result, source="job", heads=_job_heads(doc))
        _unknown_keys_named(result, doc, [*job_mod.TOP, *job_mod.SECTIONS])


@PROPERTY
@given(doc=st.one_of(config_documents(), documents(CONFIG_KEYS, RAW_SCALARS)),
       where=st.sampled_from([None, "compressor", "problem"]), key=st.one_of(st.sampled_from(CONFIG_KEYS), RAW_SCALARS),
       value=RAW_SCALARS)
def test_python_config_mappings(doc, where, key, value) -> None:
    if isinstance(doc, dict):
        target = doc if where is None else doc.setdefault(where, {})
        if isinstance(target, dict):
            target[key] = value
    result = _expect_input_error_or(lambda: parse_config(doc, source="c"))
    assert isinstance(result, (Config, InputError))
    if isinstance(result, InputError):
        own = tuple(key_text(k) for k in doc) if isinstance(doc, dict) else ()
        _names_where(result, source="c", heads=tuple(CONFIG_KEYS) + own)


# ---------------------------------------------------------------------------
# Regressions: the minimal examples found by the properties above (each raised
# something other than InputError before its fix).


@pytest.mark.parametrize("text, fragment", [
    ("a: \x00", "invalid YAML: unacceptable character"),         # ReaderError from the loader's constructor
    (b"\xff\xfe\x00", "invalid YAML"),                              # bytes that are not UTF-16 either
    ("a: !!int xx", "y:1: invalid YAML: cannot read 'xx' as int"),  # ValueError from a scalar constructor
    ("a: !!float xx", "y:1: invalid YAML: cannot read 'xx' as float"),
    ("a: 2020-13-45", "y:1: invalid YAML: cannot read '2020-13-45' as timestamp"),
    # Python refuses int() of more than 4300 decimal digits (Python 3.11 docs, "Integer string
    # conversion length limitation"; sys.int_info.default_max_str_digits)
    ("\n\na: " + "1" * 5000, "y:3: invalid YAML: cannot read"),
    ("[" * 1000 + "]" * 1000, "y: invalid YAML: nested too deeply"),  # RecursionError
])
def test_yaml_reader_errors_are_input_errors(text, fragment) -> None:
    with pytest.raises(InputError) as info:
        parse_yaml(text, source="y")
    assert fragment in str(info.value)


def test_huge_integers_are_rejected_or_shown_not_crashed(folder: Path) -> None:
    # OverflowError (int -> float) in Param.coerce; ValueError from repr() of an int over 4300 digits.
    huge = 16 ** 5000  # a YAML file can hold it as hex: 0xFFF...
    assert parse_yaml("a: 0x" + "F" * 5000, source="y")["a"].bit_length() == 20000
    assert show(huge) == "<integer of 20001 bits>"
    with pytest.raises(InputError) as info:
        parse_config({"bittune_config": 1, "method": "gd", "compressor": "identity", "step_size": 10 ** 400,
                      huge: 1, "problem": {"dimension": huge}}, source="c")
    # (a dimension of 20001 bits is an integer >= 1: valid here)
    step, key = info.value.problems
    assert step == "step_size: must be a number > 0, got <integer of 1329 bits>"
    assert key.startswith("<integer of 20001 bits>: unknown key (expected one of bittune_config, method, ")
    with pytest.raises(InputError) as info:
        parse_job({"data": "d.svm", "model": "least_squares", "workers": {"count": 2, "split": "iid", huge: 1},
                   "target": {"grad_norm_sq": 1e-3}, "budget": {"max_rounds": 10},
                   "search": {"step_range": [1, 10 ** 400], "methods": [huge]}}, base_dir=folder, source="j")
    assert info.value.problems[0].startswith("workers.<integer of 20001 bits>: unknown key (expected one of count, ")
    assert any(p.startswith("search.step_range: must be a pair") for p in info.value.problems)
    assert any(p.startswith("search.methods: must be a list") for p in info.value.problems)
    # an integer count beyond any float is still an integer: valid for the job, rejected by the split
    job = parse_job({"data": "d.svm", "model": "least_squares", "workers": {"count": 10 ** 400, "split": "iid"},
                     "target": {"grad_norm_sq": 1e-3}, "budget": {"max_rounds": 10}}, base_dir=folder, source="j")
    with pytest.raises(InputError, match=r"workers.count: must be between 1 and the number of samples \(12\)"):
        open_job(job)


@pytest.mark.parametrize("path, fragment", [
    ("~nobody-here/x.svm", "data.path: cannot expand '~nobody-here/x.svm'"),  # RuntimeError from expanduser
    # OSError ENAMETOOLONG from exists(): a name over NAME_MAX = 255 bytes (Linux limits.h; from memory)
    ("a" * 300 + ".svm", "data.path: cannot use the path"),
    ("x\x00.svm", "data.path: a path cannot hold a NUL character, got 'x\\x00.svm'"),
])
def test_unusable_paths_are_input_errors(folder: Path, path: str, fragment: str) -> None:
    with pytest.raises(InputError) as info:
        parse_job({"data": path, "model": "least_squares", "workers": {"count": 2, "split": "iid"},
                   "target": {"grad_norm_sq": 1e-3}, "budget": {"max_rounds": 10}}, base_dir=folder, source="j")
    assert any(p.startswith(fragment) for p in info.value.problems), info.value.problems


def test_svmlight_index_over_the_int_digit_limit(folder: Path) -> None:
    path = folder / "long_index.svm"
    path.write_bytes(b"1 1:1\n0 " + b"7" * 5000 + b":1\n")  # int() refuses 5000 digits with ValueError
    with pytest.raises(InputError, match=r"long_index.svm:2: feature index '7777.*' is too large"):
        load_data(path)


def _corrupt_deflate() -> bytes:
    """A compressed archive whose first array's deflate stream is broken (zlib.error before the CRC check)."""
    good = _npz_bytes(compressed=True, X=np.arange(600.0).reshape(200, 3), y=np.ones(200))
    info = zipfile.ZipFile(io.BytesIO(good)).infolist()[0]
    start = info.header_offset + 30 + len(info.filename.encode()) + len(info.extra)
    for offset in range(8, info.compress_size):
        bad = bytearray(good)
        bad[start + offset] ^= 0xFF
        try:
            zipfile.ZipFile(io.BytesIO(bytes(bad))).read(info.filename)
        except zipfile.BadZipFile:
            continue  # caught by the CRC check: not the case we want
        except Exception as exc:  # noqa: BLE001 - we look for the zlib error itself
            if type(exc).__module__ == "zlib":
                return bytes(bad)
    raise AssertionError("no offset breaks the deflate stream")


def _huge_header() -> bytes:
    """An archive whose X header declares 10^12 x 3 float64 (24 TB) but holds 24 bytes."""
    head = io.BytesIO()
    np.lib.format.write_array_header_1_0(head, {"descr": "<f8", "fortran_order": False, "shape": (10**12, 3)})
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as z:
        z.writestr("X.npy", head.getvalue() + b"\0" * 24)
        z.writestr("y.npy", head.getvalue())
    return buf.getvalue()


@pytest.mark.parametrize("make", [_corrupt_deflate, _huge_header], ids=["zlib-error", "memory-error"])
def test_damaged_npz_is_an_input_error(folder: Path, make) -> None:
    path = folder / "damaged.npz"
    path.write_bytes(make())
    with pytest.raises(InputError, match="damaged.npz: not a readable .npz archive"):
        load_data(path)


@pytest.mark.parametrize("make, fragment", [
    (lambda p: np.savez(p, x0=np.zeros(3)), "an .npz archive; save the vector with numpy.save"),  # TypeError
    (lambda p: np.save(p, np.array(["a", "b", "c"])), "must hold real numbers, got dtype <U1"),  # ValueError
    (lambda p: np.save(p, np.ones(3) + 1j), "must hold real numbers, got dtype complex128"),  # ComplexWarning
    (lambda fh: fh.write(b"0.0 0.0 0.0\n"), "not a .npy file"),
])
def test_unusable_start_file_is_an_input_error(folder: Path, make, fragment: str) -> None:
    x0 = folder / "bad_x0.npy"
    with x0.open("wb") as fh:
        make(fh)
    job = parse_job({"data": "d.svm", "model": "least_squares", "workers": {"count": 2, "split": "iid"},
                     "target": {"grad_norm_sq": 1e-3}, "budget": {"max_rounds": 10},
                     "start": {"file": "bad_x0.npy"}}, base_dir=folder, source="job.yaml")
    with pytest.raises(InputError) as info:
        open_job(job)
    assert fragment in str(info.value)


def test_start_point_with_non_finite_gradient_is_an_input_error(folder: Path) -> None:
    # x0 ~ N(0, (1e308)^2): the regulariser overflows; before the fix the probe raised ValueError.
    job = parse_job({"data": "d.svm", "model": "logistic_nonconvex", "workers": {"count": 2, "split": "iid"},
                     "target": {"grad_norm_sq": 1e-3}, "budget": {"max_rounds": 10},
                     "start": {"seed": 1, "scale": 1e308}}, base_dir=folder, source="job.yaml")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # numpy's overflow warnings on the way
        with pytest.raises(InputError, match="start: the model's loss or gradient at the start point is not finite"):
            open_job(job)


def test_dimension_beyond_memory_is_an_input_error(folder: Path) -> None:
    # A typo'd svmlight index makes d = 10^17; building the problem raised MemoryError. The
    # reader now names the line of the offending index.
    (folder / "wide.svm").write_bytes(b"1 1:1\n0 100000000000000000:1\n")
    job = parse_job({"data": "wide.svm", "model": "logistic_nonconvex", "workers": {"count": 2, "split": "iid"},
                     "target": {"grad_norm_sq": 1e-3}, "budget": {"max_rounds": 10}}, base_dir=folder, source="j")
    with pytest.raises(InputError, match=r"wide.svm:2: feature index 100000000000000000 is too large"):
        open_job(job)


def test_dumped_strings_that_look_like_numbers_load_back_as_strings() -> None:
    # Found by the config round trip: dump_yaml wrote the string '1e-3' plain, and the
    # strict loader (YAML 1.2 floats) read it back as the number 0.001.
    doc = {"note": "1e-3", "big": "1E5", "number": 1e-3, "count": 12, "text": "12"}
    assert parse_yaml(dump_yaml(doc), source="d") == doc



def _damaged_npy_headers() -> list[bytes]:
    buf = io.BytesIO()
    np.save(buf, np.zeros(3))
    good = buf.getvalue()
    return [good.replace(b"{'descr'", b"\x00'descr'"),  # tokenize.TokenError inside numpy's header parser
            good.replace(b"'descr'", b"'\\escr'")]       # DeprecationWarning (invalid escape), then ValueError


@pytest.mark.parametrize("which", [0, 1], ids=["token-error", "escape-warning"])
def test_damaged_array_header_is_an_input_error(folder: Path, which: int) -> None:
    bad = _damaged_npy_headers()[which]
    (folder / "damaged_x0.npy").write_bytes(bad)
    job = parse_job({"data": "d.svm", "model": "least_squares", "workers": {"count": 2, "split": "iid"},
                     "target": {"grad_norm_sq": 1e-3}, "budget": {"max_rounds": 10},
                     "start": {"file": "damaged_x0.npy"}}, base_dir=folder, source="job.yaml")
    with pytest.raises(InputError, match="start.file: cannot read"):
        open_job(job)  # pytest turns any warning into an error: none may escape
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as z:
        z.writestr("X.npy", bad)
        y = io.BytesIO()
        np.save(y, np.ones(3))
        z.writestr("y.npy", y.getvalue())
    (folder / "damaged_header.npz").write_bytes(buf.getvalue())
    with pytest.raises(InputError, match="damaged_header.npz: not a readable .npz archive"):
        load_data(folder / "damaged_header.npz")


@pytest.mark.parametrize("text", ["!!int", "!!bool x", "!!timestamp x", "!!set (", "!!set :", "? !!set {a: 1}\n: 1"])
def test_odd_tags_are_yaml_errors(text: str) -> None:
    # IndexError, KeyError, AttributeError from PyYAML's constructors; ValueError and
    # TypeError from the duplicate-key check on a non-mapping or unhashable key.
    with pytest.raises(InputError, match="invalid YAML"):
        parse_yaml(text, source="y")


def test_dirichlet_alpha_near_the_float_limit_is_an_input_error() -> None:
    # Found by hand next to the properties: numpy's Dirichlet sampler returns all zeros for
    # alpha = 1.7e308, which used to surface as "left 2 of 3 workers with no samples".
    from bittune.data import partition

    ds = Dataset(X=np.ones((20, 2)), y=np.repeat([0.0, 1.0], 10), groups=None, source="s")
    assert [p.size for p in partition(ds, n_workers=3, split="dirichlet", seed=0, dirichlet_alpha=1e300)] \
        == [6, 8, 6]  # huge alpha: shares 1/3 each, so per label of 10 rows cuts at 3 and 7 -> 3, 4, 3
    with pytest.raises(InputError, match="workers.dirichlet_alpha: 1.7e.308 is too large"):
        partition(ds, n_workers=3, split="dirichlet", seed=0, dirichlet_alpha=1.7e308)
