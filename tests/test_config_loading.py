"""Loading the config: names no store keeps are refused at load, the YAML is parsed once (with the C loader
when PyYAML has one), line numbers are found only for an error, and an alias bomb is refused by every command
with exit 2 (common practice, no source; invented configs). Speed is measured in benchmarks/bench_config.py,
not here.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import pytest
import yaml

import drift.config
from drift.config import MAX_NAME_LENGTH, load_config
from drift.exceptions import ConfigError
from tests.test_cli_robustness import MODELS, invoke
from tests.test_config import MINIMUM

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))
from bench_config import BOMB, COMMANDS  # the benchmark's bomb and command list

LONG = "m" * (MAX_NAME_LENGTH + 1)
CHANNELS = "alerts:\n  channels:\n    - {kind: folder, name: NAME, path: out/}\n"


def _write(tmp_path: Path, text: str) -> Path:
    p = tmp_path / "drift.yaml"
    p.write_text(text, encoding="utf-8")
    return p


# ------------------------------------------------------------------------------------------- names
@pytest.mark.parametrize("text, key, words", [
    (MINIMUM.replace("name: k000", f"name: {LONG}"), "models[0].name",
     f"is {MAX_NAME_LENGTH + 1} characters long"),
    (MINIMUM.replace("name: k000", 'name: "k0\\0"'), "models[0].name", "contains a NUL byte"),
    (MINIMUM.replace("target: k000_units", 'target: "k000_\\x00units"'), "models[0].target", "contains a NUL byte"),
    (MINIMUM.replace("series: k000_promo", f"series: {LONG}"), "models[0].drivers[0].series",
     f"at most {MAX_NAME_LENGTH} characters"),
    (MINIMUM.replace("name: kiosks", f"name: {LONG}"), "sources[0].name", "characters long"),
    (MINIMUM.replace("path: data/*.csv", 'path: "data/\\0.csv"'), "sources[0].path", "contains a NUL byte"),
    (MINIMUM + CHANNELS.replace("NAME", LONG), "alerts.channels[0].name", "characters long"),
    (MINIMUM.replace("name: k000", "name: !!binary azAAMA=="), "models[0].name", "contains a NUL byte"),
], ids=["long-model", "nul-model", "nul-target", "long-driver", "long-source", "nul-path", "long-channel",
        "nul-from-binary"])
def test_names_no_store_keeps_are_refused_at_load(tmp_path: Path, text: str, key: str, words: str) -> None:
    p = _write(tmp_path, text)
    with pytest.raises(ConfigError) as err:
        load_config(p)
    msg = str(err.value)
    assert f"key '{key}'" in msg and words in msg and "drift.yaml:" in msg, msg
    assert "\x00" not in msg
    code, _, err_text = invoke("check", "--config", "drift.yaml", cwd=tmp_path)
    assert code == 2 and key in err_text and "Traceback" not in err_text, err_text
    assert not (tmp_path / "drift.db").exists()


def test_a_name_of_200_characters_is_fine(tmp_path: Path) -> None:
    name = "m" * MAX_NAME_LENGTH
    assert load_config(_write(tmp_path, MINIMUM.replace("name: k000", f"name: {name}"))).models[0].name == name


# ------------------------------------------------------------------------------------------- the loader
def test_the_c_loader_parses_once_and_lines_are_found_only_for_an_error(tmp_path: Path,
                                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    if yaml.__with_libyaml__:
        assert drift.config._LOADER is yaml.CSafeLoader
    made: list[str] = []

    class Counting(drift.config._LOADER):  # type: ignore[misc, name-defined]
        def __init__(self, stream: str) -> None:
            made.append(stream[:10])
            super().__init__(stream)

    monkeypatch.setattr(drift.config, "_LOADER", Counting)
    real = drift.config._line_map
    monkeypatch.setattr(drift.config, "_line_map", lambda *a: pytest.fail("line numbers found without an error"))
    cfg = load_config(_write(tmp_path, MINIMUM))
    assert cfg.models[0].name == "k000" and len(made) == 1
    # an error: its line is found then
    monkeypatch.setattr(drift.config, "_line_map", real)
    with pytest.raises(ConfigError, match=r"drift.yaml:10, key 'models\[0\].frequency'"):
        load_config(_write(tmp_path, MINIMUM.replace("frequency: W", "frequency: X")))


@pytest.mark.parametrize("loader", ["C", "pure Python"])
def test_both_loaders_give_the_same_config_and_lines(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                     loader: str) -> None:
    if loader == "C" and not yaml.__with_libyaml__:
        pytest.skip("PyYAML without libyaml")
    monkeypatch.setattr(drift.config, "_LOADER", yaml.CSafeLoader if loader == "C" else yaml.SafeLoader)
    cfg = load_config(_write(tmp_path, MINIMUM))
    assert json.dumps(cfg.model_dump(mode="json"), sort_keys=True) == json.dumps(
        _reference(tmp_path), sort_keys=True)
    bad = MINIMUM.replace("    reference: {start: 2021-01-04, end: 2023-12-25}",
                          "    reference: {start: 2021-01-04, end: 2020-12-28}")
    with pytest.raises(ConfigError, match=r"drift.yaml:14, key 'models\[0\].reference'"):
        load_config(_write(tmp_path, bad))
    with pytest.raises(ConfigError, match="written twice in the same mapping"):
        load_config(_write(tmp_path, MINIMUM.replace("    frequency: W", "    frequency: W\n    frequency: D")))


def _reference(tmp_path: Path) -> dict:
    """The config as plain PyYAML reads it (pure-Python safe_load), validated."""
    data = yaml.safe_load(MINIMUM)
    return drift.config.Config.model_validate(
        {**data, "base_dir": tmp_path.resolve(), "file": tmp_path / "drift.yaml"}).model_dump(mode="json")


@pytest.mark.parametrize("command", [c[0] for c in COMMANDS])
def test_alias_bomb_is_refused_by_every_command(tmp_path: Path, command: str) -> None:
    assert len(BOMB.encode()) <= 320
    _write(tmp_path, BOMB)
    args = next(c for c in COMMANDS if c[0] == command)
    code, out, err = invoke(args[0], "--config", "drift.yaml", *args[1:], cwd=tmp_path)
    assert code == 2, (code, out, err)
    assert "aliases" in err and "Traceback" not in err, err
    assert not (tmp_path / "drift.db").exists()


def test_many_models_with_unique_names(tmp_path: Path) -> None:
    block = MODELS[len("models:\n"):]
    text = MINIMUM + "".join(block.replace("name: k000", f"name: k{i:04d}") for i in range(1, 300))
    assert len(load_config(_write(tmp_path, text)).models) == 300
    with pytest.raises(ConfigError, match=r"model names must be unique; repeated: \['k0007'\]"):
        load_config(_write(tmp_path, text + block.replace("name: k000", "name: k0007")))


RICH = """\
base: &base {frequency: W, horizon: 2, unit: "units", ratio: 0.5, on: yes, off: false, none: ~, empty: null}
dates: [2021-01-04, 2021-01-04 10:30:00, "2021-01-04"]
numbers: [1, -2, 0x1f, 1_000, 3.5, .inf, -.inf, 1e3, "7", '8']
text:
  - plain
  - "double \\u00e9 \\t"
  - 'single'
  - |
    block
    text
  - >
    folded
    text
merged:
  <<: *base
  horizon: 3
list_alias: &l [a, b]
again: *l
1: integer key
null: null key
nested: {a: [{b: [{c: [1, 2]}]}]}
"""


@pytest.mark.parametrize("loader", ["C", "pure Python"])
def test_construction_matches_pyyaml_safe_load(loader: str) -> None:
    """Oracle: the data built from the checked nodes equal ``yaml.safe_load`` (PyYAML 6.0), merge keys, tags,
    aliases (one shared object) and non-string keys included."""
    if loader == "C" and not yaml.__with_libyaml__:
        pytest.skip("PyYAML without libyaml")
    cls = yaml.CSafeLoader if loader == "C" else yaml.SafeLoader
    ld = cls(RICH)
    try:
        root = ld.get_single_node()
        assert drift.config._inspect(root, "x.yaml") is True  # the aliases share nodes
        data = drift.config._construct(ld, root)
    finally:
        ld.dispose()
    assert data == yaml.safe_load(RICH)
    assert data["list_alias"] is data["again"]
    assert data["merged"]["frequency"] == "W" and data["merged"]["horizon"] == 3


@pytest.mark.parametrize("args", [["snooze", "--model", "k000", "--until", "2030-01-01"],
                                  ["accept", "--model", "k000", "--action", "refit"]])
def test_who_decided_is_a_name_the_store_keeps(tmp_path: Path, args: list[str]) -> None:
    """Reproduced: ``--by`` of 250 characters aborted the command on PostgreSQL with a database error (the
    column holds 200); it is a usage error (exit 2) before anything is opened, on every store."""
    _write(tmp_path, MINIMUM)
    code, _, err = invoke(*args, "--config", "drift.yaml", "--by", "b" * 250, cwd=tmp_path)
    assert code == 2 and "--by" in err and "250 characters long" in err and "Traceback" not in err, err
    assert not (tmp_path / "drift.db").exists()
