"""Config stage: YAML validated into one typed object, paths resolved, overrides applied."""

from __future__ import annotations

from pathlib import Path

import pytest

from leanset.config import Config, load_config
from leanset.errors import ConfigError

BASE = "input:\n  path: data/table.parquet\n  label: fault\n"


def write(tmp_path: Path, text: str, name: str = "leanset.yaml") -> Path:
    path = tmp_path / name
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text)
    return path


def test_minimal_config_loads_with_defaults(tmp_path):
    cfg = load_config(write(tmp_path, BASE))
    assert isinstance(cfg, Config)
    assert cfg.input.label == "fault"
    assert cfg.selection.fraction == 0.3
    assert cfg.proxy.family == "gbdt"


@pytest.mark.parametrize("text, key", [
    (BASE + "sede: 3\n", "sede"),                                  # top level
    (BASE + "proxy:\n  foldz: 3\n", "proxy.foldz"),                # nested
    (BASE.replace("  label: fault\n", "  label: fault\n  lable: x\n"), "input.lable"),
], ids=["top", "proxy", "input"])
def test_unknown_key_is_refused_by_name(tmp_path, text, key):
    path = write(tmp_path, text)
    with pytest.raises(ConfigError) as err:
        load_config(path)
    msg = str(err.value)
    assert f"'{key}'" in msg and "unknown key" in msg
    assert str(path) in msg
    assert "\n" not in msg


def test_unknown_key_in_override_is_refused_by_name(tmp_path):
    with pytest.raises(ConfigError, match=r"unknown key 'selection\.fractoin'"):
        load_config(write(tmp_path, BASE), {"selection.fractoin": 0.2})


@pytest.mark.parametrize("value", [0, -0.1, 1.0001, 2])
def test_selection_fraction_outside_unit_interval_is_refused(tmp_path, value):
    path = write(tmp_path, BASE + f"selection:\n  fraction: {value}\n")
    with pytest.raises(ConfigError) as err:
        load_config(path)
    assert "selection.fraction" in str(err.value)
    with pytest.raises(ConfigError, match=r"selection\.fraction"):
        load_config(write(tmp_path, BASE, "plain.yaml"), {"selection.fraction": value})


@pytest.mark.parametrize("value", [1e-6, 0.5, 1])
def test_selection_fraction_inside_unit_interval_is_accepted(tmp_path, value):
    cfg = load_config(write(tmp_path, BASE + f"selection:\n  fraction: {value}\n"))
    assert cfg.selection.fraction == value


def test_relative_paths_resolve_against_the_config_folder(tmp_path, monkeypatch):
    path = write(tmp_path / "project" / "configs", BASE + "store: ../runs\n")
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    cfg = load_config(path)
    folder = (tmp_path / "project" / "configs").resolve()
    assert cfg.input.path == folder / "data" / "table.parquet"
    assert cfg.store.resolve() == (folder / ".." / "runs").resolve()


def test_absolute_input_path_is_kept(tmp_path):
    target = (tmp_path / "abs" / "t.parquet").resolve()
    cfg = load_config(write(tmp_path / "cfg", f"input:\n  path: {target}\n  label: y\n"))
    assert cfg.input.path == target


def test_dotted_overrides_apply_and_none_is_ignored(tmp_path):
    path = write(tmp_path, BASE + "seed: 3\nproxy:\n  folds: 4\n")
    cfg = load_config(path, {
        "selection.fraction": 0.2, "proxy.family": "linear", "seed": 7,
        "verify.metric": "macro_f1", "proxy.folds": None,
    })
    assert cfg.selection.fraction == 0.2
    assert cfg.proxy.family == "linear"
    assert cfg.seed == 7
    assert cfg.verify.metric == "macro_f1"
    assert cfg.proxy.folds == 4  # None override ignored, file value kept
    # the file itself is untouched by overrides
    assert load_config(path).selection.fraction == 0.3


def test_override_with_invalid_value_is_refused(tmp_path):
    with pytest.raises(ConfigError, match=r"proxy\.family"):
        load_config(write(tmp_path, BASE), {"proxy.family": "forest"})


def test_missing_config_file_errors_naming_it(tmp_path):
    path = tmp_path / "nope.yaml"
    with pytest.raises(ConfigError) as err:
        load_config(path)
    assert str(path) in str(err.value) and "not found" in str(err.value)


def test_missing_required_key_is_named(tmp_path):
    with pytest.raises(ConfigError, match=r"missing key 'input\.label'"):
        load_config(write(tmp_path, "input:\n  path: t.parquet\n"))


@pytest.mark.parametrize("text", ["input: [unclosed\n", "- just\n- a list\n"], ids=["bad-yaml", "not-a-mapping"])
def test_malformed_yaml_is_a_config_error(tmp_path, text):
    path = write(tmp_path, text)
    with pytest.raises(ConfigError) as err:
        load_config(path)
    assert str(path) in str(err.value)


def test_section_hash_tracks_only_the_named_sections(tmp_path):
    path = write(tmp_path, BASE)
    a = load_config(path)
    b = load_config(path, {"selection.fraction": 0.2})
    assert a.section_hash("proxy") == b.section_hash("proxy")
    assert a.section_hash("selection") != b.section_hash("selection")
    assert a.section_hash() != b.section_hash()


def test_override_into_empty_section_fills_it(tmp_path):
    assert load_config(write(tmp_path, BASE + "proxy:\n"), {"proxy.folds": 3}).proxy.folds == 3


def test_override_into_scalar_is_a_config_error(tmp_path):
    with pytest.raises(ConfigError, match="seed.value"):
        load_config(write(tmp_path, BASE + "seed: 1\n"), {"seed.value": 3})
