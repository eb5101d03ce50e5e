"""Output config: round trip through the file, atomic write, validation messages."""

from __future__ import annotations

import os
import stat

import numpy as np
import pytest
import yaml

from bittune import _yaml
from bittune.config import (
    Config, check_config_fits, config_to_dict, load_config, parse_config, write_config,
)
from bittune.errors import InputError


def _valid(**changes) -> dict:
    """A valid MARINA config mapping with keys replaced or removed (None)."""
    base = {
        "bittune_config": 1,
        "method": "marina",
        "compressor": {"name": "rand_k", "k": 6},
        "step_size": 0.25,
        "sync_probability": 0.05,
        "problem": {"dimension": 123, "workers": 12},
    }
    for key, value in changes.items():
        if value is None:
            base.pop(key)
        else:
            base[key] = value
    return base


def _problems(mapping: object) -> list[str]:
    with pytest.raises(InputError) as info:
        parse_config(mapping, source="cfg.yaml")
    assert info.value.source == "cfg.yaml" and info.value.exit_code == 2
    return info.value.problems


def test_round_trip_with_numpy_values(tmp_path):
    rng = np.random.default_rng(0)
    step = np.float64(rng.uniform(0.1, 1.0))
    curve = rng.normal(size=3)
    data = {
        "bittune_config": np.int64(1),
        "method": "marina",
        "compressor": {"name": "rand_k", "k": np.int64(6)},
        "step_size": step,
        "sync_probability": np.float64(0.05),
        "problem": {"dimension": np.int64(123), "workers": np.int32(12)},
        "expected": {"bits": np.float64(1.5e9), "curve": curve, "ok": np.bool_(True)},
        "provenance": {"tool": "bittune", "seeds": (1, 2)},
    }
    path = tmp_path / "cfg.yaml"
    write_config(path, data)
    cfg = load_config(path)
    assert cfg == Config(method="marina", compressor={"name": "rand_k", "k": 6},
                         step_size=float(step), sync_probability=0.05, shift_rate=None,
                         dimension=123, workers=12,
                         extra={"expected": {"bits": 1.5e9, "curve": curve.tolist(), "ok": True},
                                "provenance": {"tool": "bittune", "seeds": [1, 2]}})
    # exact float round trip: PyYAML writes repr(float), which round-trips exactly
    assert type(cfg.step_size) is float and cfg.step_size == step
    assert type(cfg.compressor["k"]) is int and type(cfg.dimension) is int
    # a launcher reading it with plain yaml.safe_load sees the same values, in documented order
    plain = yaml.safe_load(path.read_text())
    assert list(plain) == ["bittune_config", "method", "compressor", "step_size",
                           "sync_probability", "problem", "expected", "provenance"]
    assert plain == config_to_dict(cfg)
    # and writing the loaded Config again gives the same file
    again = tmp_path / "again.yaml"
    write_config(again, cfg)
    assert again.read_text() == path.read_text()


def test_config_to_dict_leaves_out_unset_keys():
    cfg = parse_config(_valid(method="gd", compressor="identity", sync_probability=None,
                              problem=None), source="c")
    assert cfg.compressor == {"name": "identity"}
    assert config_to_dict(cfg) == {"bittune_config": 1, "method": "gd",
                                   "compressor": {"name": "identity"}, "step_size": 0.25}


def test_diana_shift_rate_is_optional():
    cfg = parse_config(_valid(method="diana", sync_probability=None), source="c")
    assert cfg.shift_rate is None
    cfg = parse_config(_valid(method="diana", sync_probability=None, shift_rate=0.1), source="c")
    assert cfg.shift_rate == 0.1


@pytest.mark.parametrize("fail_at", ["replace", "fsync"])
def test_atomic_write_keeps_previous_file_on_failure(tmp_path, monkeypatch, fail_at):
    path = tmp_path / "cfg.yaml"
    write_config(path, _valid())
    before = path.read_bytes()

    def boom(*args, **kwargs):
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(_yaml.os, fail_at, boom)
    with pytest.raises(OSError, match="simulated"):
        write_config(path, _valid(step_size=0.5))
    monkeypatch.undo()
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["cfg.yaml"]  # no temp file left


def test_atomic_write_keeps_or_sets_the_usual_mode(tmp_path):
    # A new file gets the mode a plain open() gives (0o666 minus the umask) ...
    reference = tmp_path / "plain.txt"
    reference.write_text("x")
    _yaml.atomic_write_text(tmp_path / "new.txt", "y")
    assert stat.S_IMODE((tmp_path / "new.txt").stat().st_mode) == stat.S_IMODE(reference.stat().st_mode)
    # ... and a replaced file keeps its own mode.
    os.chmod(reference, 0o640)
    _yaml.atomic_write_text(reference, "z")
    assert stat.S_IMODE(reference.stat().st_mode) == 0o640 and reference.read_text() == "z"


def test_invalid_dict_is_not_written(tmp_path):
    path = tmp_path / "cfg.yaml"
    with pytest.raises(InputError, match="step_size: must be a number > 0, got -1"):
        write_config(path, _valid(step_size=-1))
    assert not path.exists() and list(tmp_path.iterdir()) == []


ERRORS = [
    (dict(bittune_config=None), "bittune_config: required (the format version)"),
    (dict(bittune_config=2), "bittune_config: unsupported format version 2 (this bittune reads version 1)"),
    (dict(bittune_config=True), "bittune_config: unsupported format version True (this bittune reads version 1)"),
    (dict(method="adam"), "method: must be one of gd, dcgd, diana, marina, pp_marina, vr_marina, ef21, got 'adam'"),
    (dict(method=None), "method: required"),
    (dict(step_size=0), "step_size: must be a number > 0, got 0"),
    (dict(step_size="fast"), "step_size: must be a number > 0, got 'fast'"),
    (dict(step_size=None), "step_size: required"),
    (dict(sync_probability=None), "sync_probability: required for method marina"),
    (dict(sync_probability=1.5), "sync_probability: must be a number in (0, 1], got 1.5"),
    (dict(sync_probability=0), "sync_probability: must be a number in (0, 1], got 0"),
    (dict(method="gd"), "sync_probability: not used by method gd"),
    (dict(shift_rate=0.1), "shift_rate: not used by method marina"),
    (dict(method="ef21", sync_probability=None, shift_rate=0.1), "shift_rate: not used by method ef21"),
    (dict(compressor=None), "compressor: required"),
    (dict(compressor=[1]), "compressor: must be a mapping with a name, got [1]"),
    (dict(compressor={"k": 3}), "compressor.name: required"),
    (dict(compressor={"name": "randk", "k": 3}),
     "compressor.name: must be one of identity, rand_k, top_k, dither, natural, natural_dither, perm_k, got 'randk' (did you mean 'rand_k'?)"),
    (dict(compressor={"name": "rand_k"}), "compressor.k: required"),
    (dict(compressor={"name": "top_k", "k": 0}), "compressor.k: must be an integer >= 1, got 0"),
    (dict(compressor={"name": "top_k", "k": True}), "compressor.k: must be an integer >= 1, got True"),
    (dict(compressor={"name": "dither", "levels": 2.5}), "compressor.levels: must be an integer >= 1, got 2.5"),
    (dict(compressor={"name": "dither"}), "compressor.levels: required"),
    (dict(compressor={"name": "identity", "k": 3}), "compressor.k: not used by compressor identity"),
    (dict(compressor={"name": "rand_k", "k": 3, "kk": 1}), "compressor.kk: unknown key (did you mean 'k'?)"),
    (dict(problem=[123]), "problem: must be a mapping, got [123]"),
    (dict(problem={"dimension": 0}), "problem.dimension: must be an integer >= 1, got 0"),
    (dict(problem={"dimesion": 3}), "problem.dimesion: unknown key (did you mean 'dimension'?)"),
    (dict(problem={"d": 3}), "problem.d: unknown key (expected one of dimension, workers)"),
    (dict(step_sise=0.1), "step_sise: unknown key (did you mean 'step_size'?)"),
    (dict(provenence={}), "provenence: unknown key (did you mean 'provenance'?)"),
]


@pytest.mark.parametrize("change, message", ERRORS)
def test_each_error_is_reported_with_its_key_path(change, message):
    assert message in _problems(_valid(**change))


def test_all_problems_reported_together(tmp_path):
    path = tmp_path / "cfg.yaml"
    path.write_text("bittune_config: 1\nmethod: dcgd\ncompressor: {name: top_k, k: 0}\n"
                    "step_size: 1e-3\nsync_probability: 0.5\nproblem: {dimension: -1}\n")
    with pytest.raises(InputError) as info:
        load_config(path)
    assert info.value.source == str(path)
    assert sorted(info.value.problems) == sorted([
        "sync_probability: not used by method dcgd",
        "compressor.k: must be an integer >= 1, got 0",
        "problem.dimension: must be an integer >= 1, got -1",
    ])


def test_unrelated_sections_are_kept_verbatim():
    cfg = parse_config(_valid(notes={"owner": "ops"}, retune={"every": "1d"}), source="c")
    assert cfg.extra == {"notes": {"owner": "ops"}, "retune": {"every": "1d"}}


def test_top_level_must_be_a_mapping():
    assert _problems(["method", "gd"]) == ["top level: must be a mapping, got ['method', 'gd']"]


def test_check_config_fits():
    cfg = parse_config(_valid(), source="c")
    check_config_fits(cfg, dimension=123, workers=12, source="c")  # tuned for exactly this
    with pytest.raises(InputError) as info:
        check_config_fits(cfg, dimension=5, workers=12, source="c")
    assert info.value.problems == [
        "problem.dimension: the config was tuned for dimension 123, this problem has dimension 5",
        "compressor.k: must be <= the dimension 5, got 6",
    ]
    free = parse_config(_valid(problem=None), source="c")  # no recorded dimension: only k checked
    with pytest.raises(InputError, match=r"^c: compressor.k: must be <= the dimension 4, got 6$"):
        check_config_fits(free, dimension=4, workers=12, source="c")
    with pytest.warns(UserWarning, match="problem.workers: the config was tuned for 12 workers"):
        check_config_fits(cfg, dimension=123, workers=20, source="c")


def test_configs_written_before_the_baseline_gains_and_units_sections_still_load():
    from pathlib import Path

    old = load_config(Path(__file__).resolve().parents[1] / "configs" / "frost-marina.yaml")
    assert old.method == "marina" and "gains" not in old.extra
    doc = {"bittune_config": 1, "method": "gd", "compressor": "identity", "step_size": 0.5,
           "baseline": {"method": "gd"}, "gains": {"over_tuned_gd": {"ratio": 2.0}}, "units": {"step_size": "x"}}
    assert set(parse_config(doc, source="c.yaml").extra) == {"baseline", "gains", "units"}
    with pytest.raises(InputError, match="gain: unknown key \\(did you mean 'gains'\\?\\)"):
        parse_config({**doc, "gain": {}}, source="c.yaml")


def test_unicode_line_breaks_in_free_sections_round_trip():
    """A config key or value with NEL, LS or PS loads back unchanged (hypothesis once found
    ``{'target': {'\\x85': None}}`` coming back as ``{' ': None}``). Reference: PyYAML's own
    safe_load of the written text, and the document itself."""
    from bittune._yaml import dump_yaml, parse_yaml

    doc = {"bittune_config": 1, "method": "gd", "step_size": 1.0, "compressor": {"name": "identity"},
           "target": {"\x85": None, "a\u2028b": "c\u2029", "é": "plain"}}
    text = dump_yaml(doc)
    assert yaml.safe_load(text) == doc
    assert parse_yaml(text, source="c.yaml") == doc
    assert "é: plain" in text  # other non-ASCII text stays readable, not escaped
