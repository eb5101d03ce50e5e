"""Job spec: YAML loading traps, schema defaults, path resolution, every error kind."""

from __future__ import annotations

import hashlib
import textwrap
from pathlib import Path

import pytest
import yaml

from bittune._yaml import load_yaml, parse_yaml
from bittune.errors import InputError
from bittune.job import (
    BudgetSpec, DataSpec, StartSpec, TargetSpec, WorkersSpec, load_job, parse_job,
)

MINIMAL = """\
data: stations.svm
model: logistic_nonconvex
workers:
  count: 12
  split: iid
target:
  grad_norm_sq: 1e-3
budget:
  max_rounds: 5000
"""


def _valid(**sections) -> dict:
    """A valid job mapping (data file name only) with sections replaced or removed (None)."""
    base = {
        "data": "stations.svm",
        "model": "logistic_nonconvex",
        "workers": {"count": 12, "split": "iid"},
        "target": {"grad_norm_sq": 1e-3},
        "budget": {"max_rounds": 5000},
    }
    for key, value in sections.items():
        if value is None:
            base.pop(key)
        else:
            base[key] = value
    return base


@pytest.fixture
def folder(tmp_path: Path) -> Path:
    (tmp_path / "stations.svm").write_text("1 1:0.5\n")
    return tmp_path


def _problems(mapping: object, folder: Path) -> list[str]:
    with pytest.raises(InputError) as info:
        parse_job(mapping, base_dir=folder, source="job.yaml")
    assert info.value.source == "job.yaml"
    return info.value.problems


# --- YAML loading -----------------------------------------------------------


def test_yaml12_floats_are_floats_where_plain_yaml11_gives_strings(tmp_path):
    # YAML 1.2.2 spec, 10.3.2 core schema float:
    #   [-+]? ( \. [0-9]+ | [0-9]+ ( \. [0-9]* )? ) ( [eE] [-+]? [0-9]+ )?
    # PyYAML follows YAML 1.1 (from memory: its float needs a dot and, if there
    # is an exponent, a signed one), so plain safe_load keeps 1e-3, 1E5 and
    # 3.0e2 as strings -- the reason the strict loader adds a resolver.
    text = "a: 1e-3\nb: 1E5\nc: .5e-2\nd: -2.5e+3\ne: 3.0e2\n"
    plain = yaml.safe_load(text)
    assert plain["a"] == "1e-3" and plain["b"] == "1E5" and plain["e"] == "3.0e2"
    path = tmp_path / "x.yaml"
    path.write_text(text + "i: 12\nj: -7\nf: 1.5\ns: '1e-3'\nt: 1e-3x\nu: 0x1F\n")
    got = load_yaml(path)
    expected = {"a": 1e-3, "b": 1e5, "c": 0.5e-2, "d": -2500.0, "e": 300.0}
    for key, value in expected.items():
        assert type(got[key]) is float and got[key] == value, key
    # integers stay integers, quoted and malformed values stay strings, 1.1 ints unchanged
    assert type(got["i"]) is int and got["i"] == 12 and got["j"] == -7
    assert got["f"] == 1.5 and got["s"] == "1e-3" and got["t"] == "1e-3x" and got["u"] == 31
    # the strict loader does not change plain yaml.safe_load for anyone else
    assert yaml.safe_load("a: 1e-3")["a"] == "1e-3"


def test_duplicate_key_rejected_with_line(tmp_path):
    path = tmp_path / "dup.yaml"
    path.write_text("model: least_squares\nworkers:\n  count: 2\n  split: iid\n  count: 3\n")
    with pytest.raises(InputError) as info:
        load_yaml(path)
    assert str(info.value) == f"{path}:5: duplicate key 'count' (first at line 3)"


def test_merge_keys_may_be_overridden():
    # YAML merge keys ('<<') are not duplicates: explicit keys override merged ones.
    got = parse_yaml("base: &b {count: 2, split: iid}\nw:\n  <<: *b\n  count: 4\n", source="m")
    assert got["w"] == {"count": 4, "split": "iid"}


def test_syntax_error_names_line(tmp_path):
    path = tmp_path / "bad.yaml"
    path.write_text("model: least_squares\nworkers:\n  count: [1, 2\n  split: iid\n")
    with pytest.raises(InputError) as info:
        load_yaml(path)
    message = str(info.value)
    assert message.startswith(f"{path}:") and "invalid YAML" in message
    line = int(message[len(str(path)) + 1:].split(":")[0])
    assert 3 <= line <= 5  # the unclosed flow sequence opened on line 3


def test_unsafe_tag_rejected():
    with pytest.raises(InputError, match=r"^m:1: invalid YAML.*python/object"):
        parse_yaml("x: !!python/object/apply:os.system ['true']\n", source="m")


def test_missing_file_named(tmp_path):
    with pytest.raises(InputError, match="file not found: .*nothere.yaml"):
        load_job(tmp_path / "nothere.yaml")


# --- a valid job -------------------------------------------------------------


def test_minimal_job_gets_defaults(folder, monkeypatch, tmp_path_factory):
    (folder / "job.yaml").write_text(MINIMAL)
    monkeypatch.chdir(tmp_path_factory.mktemp("elsewhere"))  # paths follow the job file, not cwd
    job = load_job(folder / "job.yaml")
    assert job.path == folder / "job.yaml"
    assert job.data == DataSpec(path=folder / "stations.svm", format="svmlight",
                                label_column=None, group_column=None)
    assert job.model == "logistic_nonconvex" and job.regularization == 0.1
    assert job.workers == WorkersSpec(count=12, split="iid", seed=0, dirichlet_alpha=1.0)
    assert job.target == TargetSpec(grad_norm_sq=1e-3, relative=True)
    assert job.budget == BudgetSpec(max_rounds=5000, max_bits_per_worker=None)
    assert job.start == StartSpec(kind="zeros", seed=None, scale=1.0, path=None)
    assert job.raw == yaml.safe_load(MINIMAL) | {"target": {"grad_norm_sq": 1e-3}}
    # sha256 of the file bytes, checked against hashlib directly
    assert job.digest == hashlib.sha256(MINIMAL.encode()).hexdigest()


def test_full_job_round_trips(folder):
    sub = folder / "in"
    sub.mkdir()
    (sub / "frost.csv").write_text("frost,station,t\n1,a,0.5\n")
    (folder / "x0.npy").write_bytes(b"")
    text = textwrap.dedent("""\
        data: {path: in/frost.csv, label_column: frost, group_column: station}
        model: least_squares
        regularization: 0          # an integer where a number is expected
        workers: {count: 3, split: column, seed: 7}
        target: {grad_norm_sq: '1e-6', relative: false}   # quoted number
        budget: {max_rounds: 1e4, max_bits_per_worker: 2.5e6}
        start: {file: ./x0.npy}
    """)
    (folder / "job.yaml").write_text(text)
    job = load_job(folder / "job.yaml")
    assert job.data == DataSpec(path=sub / "frost.csv", format="csv",
                                label_column="frost", group_column="station")
    assert job.model == "least_squares" and job.regularization == 0.0
    assert type(job.regularization) is float
    assert job.workers == WorkersSpec(count=3, split="column", seed=7, dirichlet_alpha=1.0)
    assert job.target == TargetSpec(grad_norm_sq=1e-6, relative=False)
    assert job.budget == BudgetSpec(max_rounds=10000, max_bits_per_worker=2.5e6)
    assert type(job.budget.max_rounds) is int
    assert job.start == StartSpec(kind="file", seed=None, scale=1.0, path=folder / "x0.npy")


def test_defaults_by_model_and_random_start(folder):
    job = parse_job(_valid(model="least_squares", start={"seed": 3, "scale": 0.5},
                           workers={"count": 4, "split": "dirichlet", "dirichlet_alpha": 0.5}),
                    base_dir=folder, source="job.yaml")
    assert job.regularization == 0.0
    assert job.start == StartSpec(kind="random", seed=3, scale=0.5, path=None)
    assert job.workers.dirichlet_alpha == 0.5
    # start: null or {} means zeros
    assert parse_job(_valid(start={}), base_dir=folder, source="j").start.kind == "zeros"


@pytest.mark.parametrize("name, fmt", [("a.svm", "svmlight"), ("a.LIBSVM", "svmlight"),
                                       ("a.txt", "svmlight"), ("a.npz", "npz")])
def test_format_inferred_from_extension(folder, name, fmt):
    (folder / name).write_bytes(b"")
    job = parse_job(_valid(data=name), base_dir=folder, source="j")
    assert job.data.format == fmt


def test_explicit_format_overrides_extension(folder):
    (folder / "d.dat").write_bytes(b"")
    job = parse_job(_valid(data={"path": "d.dat", "format": "svmlight"}), base_dir=folder, source="j")
    assert job.data.format == "svmlight"


def test_ignored_option_warns(folder):
    with pytest.warns(UserWarning, match="workers.dirichlet_alpha: ignored unless workers.split"):
        parse_job(_valid(workers={"count": 2, "split": "iid", "dirichlet_alpha": 0.3}),
                  base_dir=folder, source="j")


def test_front_defaults_prefer_to_balanced_and_warns_of_its_ignored_search_keys(folder):
    job = parse_job(_valid(objective="front"), base_dir=folder, source="j")
    assert (job.objective, job.prefer) == ("front", "balanced")
    assert parse_job(_valid(), base_dir=folder, source="j").prefer is None
    with pytest.warns(UserWarning, match="search.pruner: ignored unless objective is bits or seconds"):
        parse_job(_valid(objective="front", search={"pruner": "median"}), base_dir=folder, source="j")


def test_digest_of_a_mapping_is_stable(folder):
    a = parse_job(_valid(), base_dir=folder, source="j").digest
    assert a == parse_job(_valid(), base_dir=folder, source="j").digest
    assert a != parse_job(_valid(model="least_squares"), base_dir=folder, source="j").digest


def test_digest_covers_a_plugin_file(folder):
    """A changed user model is another job: its study must not be resumed with the new code."""
    (folder / "model.py").write_text("def make(X, y):\n    return None\n")
    (folder / "job.yaml").write_text(MINIMAL.replace("model: logistic_nonconvex",
                                                     "model: plugin\nplugin: model.py:make"))
    first = load_job(folder / "job.yaml").digest
    assert first == load_job(folder / "job.yaml").digest
    (folder / "model.py").write_text("def make(X, y):\n    return 1\n")
    assert load_job(folder / "job.yaml").digest != first


# --- errors --------------------------------------------------------------------

ERRORS = [
    (dict(workers={"count": 0, "split": "iid"}), "workers.count: must be an integer >= 1, got 0"),
    (dict(workers={"count": True, "split": "iid"}), "workers.count: must be an integer >= 1, got True"),
    (dict(workers={"count": 2.5, "split": "iid"}), "workers.count: must be an integer >= 1, got 2.5"),
    (dict(target={"grad_norm_sq": "abc"}), "target.grad_norm_sq: must be a number > 0, got 'abc'"),
    (dict(target={"grad_norm_sq": 0}), "target.grad_norm_sq: must be a number > 0, got 0"),
    (dict(target={"grad_norm_sq": float("nan")}), "target.grad_norm_sq: must be a number > 0, got nan"),
    (dict(target={"grad_norm_sq": 1, "relative": "yes"}), "target.relative: must be true or false, got 'yes'"),
    (dict(model="logreg"), "model: must be one of logistic_nonconvex, least_squares, softmax, mlp, plugin, got 'logreg'"),
    (dict(model=None), "model: required"),
    (dict(data=None), "data: required"),
    (dict(data={"format": "csv"}), "data.path: required"),
    (dict(data=5), "data: must be a mapping, got 5"),
    (dict(workers={"cout": 3, "split": "iid"}), "workers.cout: unknown key (did you mean 'count'?)"),
    (dict(workers={"cout": 3, "split": "iid"}), "workers.count: required"),
    (dict(workers={"count": 3}), "workers.split: required"),
    (dict(workers=None), "workers.count: required"),
    (dict(workers={"count": 3, "split": "random"}),
     "workers.split: must be one of iid, by_label, dirichlet, column, got 'random'"),
    (dict(workers={"count": 3, "split": "dirichlet", "dirichlet_alpha": -1}),
     "workers.dirichlet_alpha: must be a number > 0, got -1"),
    (dict(workers={"count": 3, "split": "iid", "seed": -1}), "workers.seed: must be an integer >= 0, got -1"),
    (dict(target={}), "target.grad_norm_sq: required"),
    (dict(budget={}), "budget.max_rounds: required"),
    (dict(budget={"max_rounds": 10, "max_bits_per_worker": 0}),
     "budget.max_bits_per_worker: must be a number > 0, got 0"),
    (dict(regularization=-0.5), "regularization: must be a number >= 0, got -0.5"),
    (dict(modle="least_squares"), "modle: unknown key (did you mean 'model'?)"),
    (dict(probe={"safety": 0.5}), "probe.safety: must be a number >= 1, got 0.5"),
    (dict(probe={"runs": 0}), "probe.runs: must be an integer in [1, 100], got 0"),
    (dict(probe={"power_iters": 10**23}), "probe.power_iters: must be an integer in [1, 10000], got 100000000000000000000000"),
    (dict(zzz=1), "zzz: unknown key (expected one of model, regularization, objective, prefer, plugin, minibatch, data, workers, "
                  "target, budget, mlp, network, assume, engine, probe, search, start, downlink)"),
    (dict(objective="joules"), "objective: must be one of bits, seconds, front, got 'joules'"),
    (dict(prefer="bits"), "prefer: only used with objective: front (it picks a point of the bits-seconds front), "
                          "but the objective is bits; remove prefer or set objective: front"),
    (dict(objective="front", prefer="joules"), "prefer: must be one of bits, seconds, balanced, got 'joules'"),
    (dict(network={"uplink_bandwidth": 0}), "network.uplink_bandwidth: must be a number > 0, got 0"),
    (dict(search={"methods": ["marina", "sgd"]}),
     "search.methods: must be a list of distinct values from gd, dcgd, diana, marina, pp_marina, vr_marina, ef21, got ['marina', 'sgd'] "
     "(did you mean 'gd' for 'sgd'?)"),
    # A misspelt name gets the closest known one (difflib.get_close_matches).
    (dict(search={"methods": ["marnia", "ef21"]}),
     "search.methods: must be a list of distinct values from gd, dcgd, diana, marina, pp_marina, vr_marina, ef21, "
     "got ['marnia', 'ef21'] (did you mean 'marina' for 'marnia'?)"),
    (dict(search={"compressors": ["rand_k", "topk"]}),
     "search.compressors: must be a list of distinct values from identity, rand_k, top_k, dither, natural, "
     "natural_dither, perm_k, got ['rand_k', 'topk'] (did you mean 'top_k' for 'topk'?)"),
    (dict(workers={"count": 3, "split": "by_lable"}),
     "workers.split: must be one of iid, by_label, dirichlet, column, got 'by_lable' (did you mean 'by_label'?)"),
    (dict(search={"step_range": [8, 2]}),
     "search.step_range: must be a pair [low, high] with low <= high, each a number > 0, got [8, 2]"),
    (dict(data="nope.svm"), "data.path: file not found: {folder}/nope.svm"),
    (dict(data="."), "data.path: not a file: {folder}"),
    (dict(data={"path": "stations.svm", "format": "parquet"}),
     "data.format: must be one of svmlight, csv, npz, got 'parquet'"),
    (dict(data={"path": "stations.svm", "label_column": "y"}),
     "data.label_column: only used for csv data, but the format is svmlight"),
    (dict(workers={"count": 3, "split": "column"}),
     "workers.split: column needs group ids, which svmlight data cannot hold (use csv with "
     "data.group_column, or npz with an array 'groups')"),
    (dict(start={"seed": 1, "file": "stations.svm"}),
     "start: give either seed (random start) or file, not both"),
    (dict(start={"file": "x0.npy"}), "start.file: file not found: {folder}/x0.npy"),
    (dict(start={"seed": 1, "scale": 0}), "start.scale: must be a number > 0, got 0"),
    (dict(start={"seeds": 1}), "start.seeds: unknown key (did you mean 'seed'?)"),
]


@pytest.mark.parametrize("change, message", ERRORS)
def test_each_error_is_reported_with_its_key_path(folder, change, message):
    assert message.format(folder=folder) in _problems(_valid(**change), folder)


def test_csv_needs_label_column_and_unknown_extension(folder):
    (folder / "d.csv").write_text("y,x\n1,2\n")
    assert "data.label_column: required for csv data" in _problems(_valid(data="d.csv"), folder)
    csv_column = _valid(data="d.csv", workers={"count": 2, "split": "column"})
    csv_column["data"] = {"path": "d.csv", "label_column": "y"}
    assert "data.group_column: required for workers.split: column" in _problems(csv_column, folder)
    (folder / "d.parquet").write_bytes(b"")
    assert ("data.format: cannot infer the format from the extension '.parquet' of d.parquet; "
            "set it to one of svmlight, csv, npz") in _problems(_valid(data="d.parquet"), folder)


@pytest.mark.parametrize("top", [["a", "b"], "text", None, 3])
def test_top_level_must_be_a_mapping(folder, top):
    (message,) = _problems(top, folder)
    assert message.startswith("top level: must be a mapping")


def test_empty_file_is_reported(folder):
    (folder / "job.yaml").write_text("# nothing yet\n")
    with pytest.raises(InputError, match="top level: must be a mapping"):
        load_job(folder / "job.yaml")


def test_all_problems_of_a_file_reported_together(folder):
    (folder / "job.yaml").write_text(textwrap.dedent("""\
        data: {path: missing.svm}
        model: logreg
        workers: {cout: 12, split: iid, seed: true}
        target: {grad_norm_sq: abc}
        budget: {max_rounds: 0}
        start: {seed: 1, file: x0.npy}
    """))
    with pytest.raises(InputError) as info:
        load_job(folder / "job.yaml")
    err = info.value
    assert err.source == str(folder / "job.yaml") and err.exit_code == 2
    expected = {
        f"data.path: file not found: {folder}/missing.svm",
        "model: must be one of logistic_nonconvex, least_squares, softmax, mlp, plugin, got 'logreg'",
        "workers.cout: unknown key (did you mean 'count'?)",
        "workers.count: required",
        "workers.seed: must be an integer >= 0, got True",
        "target.grad_norm_sq: must be a number > 0, got 'abc'",
        "budget.max_rounds: must be an integer >= 1, got 0",
        "start: give either seed (random start) or file, not both",
        f"start.file: file not found: {folder}/x0.npy",
    }
    assert set(err.problems) == expected
    assert f"{len(expected)} problems" in str(err)
    # every message starts with its key path
    heads = {p.split(":")[0] for p in err.problems}
    assert heads == {"data.path", "model", "workers.cout", "workers.count", "workers.seed",
                     "target.grad_norm_sq", "budget.max_rounds", "start", "start.file"}
