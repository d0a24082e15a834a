"""Broken configs and options through the CLI: a clear message naming the file, key or flag, exit 2, no
traceback, nothing created; models that cannot be checked appear in the JSON with verdict ``error``, the
run records them and the exit status is 4 (common practice, no source; invented data from
tests/test_cli_end_to_end.py).
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import pytest
from click.testing import CliRunner

from drift.cli import cli
from drift.config import load_config
from drift.exceptions import ConfigError
from tests.test_cli_end_to_end import kiosk_data, run
from tests.test_config import MINIMUM

SOURCES = MINIMUM[MINIMUM.index("sources:"):MINIMUM.index("models:")]
MODELS = MINIMUM[MINIMUM.index("models:"):]
# the same kiosk three times; the middle one with its reference end past the data (the reported case)
THREE = SOURCES + MODELS + MODELS[len("models:\n"):].replace("name: k000", "name: k000-late").replace(
    "end: 2023-12-25", "end: 2027-12-27") + MODELS[len("models:\n"):].replace("name: k000", "name: k000-b")


def invoke(*args: str, cwd: Path) -> tuple[int, str, str]:
    """The CLI in-process (no interpreter start-up): exit code, stdout, stderr."""
    old = os.getcwd()
    os.chdir(cwd)
    try:
        r = CliRunner().invoke(cli, list(args), catch_exceptions=False)
    finally:
        os.chdir(old)
    return r.exit_code, r.stdout, r.stderr


@pytest.fixture(scope="module")
def three(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp("three")
    kiosk_data(folder / "data")
    (folder / "drift.yaml").write_text(THREE, encoding="utf-8")
    r = run("ingest", "--config", "drift.yaml", cwd=folder)
    assert r.returncode == 0, r.stderr
    return folder


def test_one_bad_model_is_its_own_entry_and_exit_4(three: Path) -> None:
    r = run("check", "--config", "drift.yaml", "--as-of", "2025-12-31", "--json", "--no-deliver", cwd=three)
    assert r.returncode == 4, r.stderr
    assert "Traceback" not in r.stderr
    out = json.loads(r.stdout)
    assert [m["name"] for m in out["models"]] == ["k000", "k000-late", "k000-b"]
    assert [m["verdict"] for m in out["models"]][1] == "error"
    assert out["models"][0]["verdict"] == out["models"][2]["verdict"] == "refit"
    assert "reference period ends 2027-12-27" in out["models"][1]["reason"]
    assert (out["checked"], out["failed"]) == (2, 1)
    # the run records it and drift status shows it
    _, out, _ = invoke("status", "--config", "drift.yaml", "--json", cwd=three)
    check = json.loads(out)["jobs"]["check"]
    assert check["outcome"] == "partial" and check["failed_models"] == 1
    assert "k000-late" in check["error"]
    _, out, _ = invoke("status", "--config", "drift.yaml", cwd=three)
    assert "1 of 3 model(s) could not be checked: k000-late" in out


def test_as_of_before_any_data_lists_every_model(three: Path) -> None:
    r = run("check", "--config", "drift.yaml", "--as-of", "2000-01-01", "--json", "--no-deliver", cwd=three)
    assert r.returncode == 4 and "Traceback" not in r.stderr
    out = json.loads(r.stdout)
    assert [m["verdict"] for m in out["models"]] == ["error"] * 3
    for m in out["models"]:
        assert "has a value available by the end of 2000-01-01" in m["reason"]
    code, out, _ = invoke("check", "--config", "drift.yaml", "--as-of", "2000-01-01", "--model", "k000",
                          "--no-deliver", cwd=three)
    assert code == 4 and "not checked" in out


@pytest.mark.parametrize("value, words", [
    ("9999-12-31", "--as-of 9999-12-31 is out of range"),
    ("0001-01-01", "--as-of 0001-01-01 is out of range"),
    ("31/12/2025", "--as-of expects a date as YYYY-MM-DD"),
    ("yesterday", "--as-of expects a date as YYYY-MM-DD"),
])
def test_as_of_not_usable_is_exit_2(three: Path, value: str, words: str) -> None:
    code, out, err = invoke("check", "--config", "drift.yaml", "--as-of", value, "--json", cwd=three)
    assert code == 2 and words in err and "Traceback" not in err, err
    assert out == ""


@pytest.mark.parametrize("text, command, words", [
    ("", "check", "the config file is empty"),
    ("# nothing but a comment\n", "ingest", "the config file is empty"),
    ("{}\n", "check", "the config file is empty"),
    (SOURCES, "check", "key 'models': the config has no models"),
    (SOURCES + "models: []\n", "check", "key 'models': the config has no models"),
    (SOURCES, "shock", "key 'models': the config has no models"),
    (MODELS, "ingest", "key 'sources': the config has no sources"),
], ids=["empty", "comment-only", "empty-mapping", "no-models", "models-empty-list", "shock-no-models",
        "ingest-no-sources"])
def test_missing_sections_are_config_errors(tmp_path: Path, text: str, command: str, words: str) -> None:
    (tmp_path / "drift.yaml").write_text(text, encoding="utf-8")
    extra = ["--date", "2024-11-04"] if command == "shock" else []
    code, out, err = invoke(command, "--config", "drift.yaml", *extra, cwd=tmp_path)
    assert code == 2, (code, out, err)
    assert words in err and "drift.yaml" in err and "Traceback" not in err, err
    assert not (tmp_path / "drift.db").exists()  # refused before a store is created beside it


def test_models_without_sources_still_check(three: Path, tmp_path: Path) -> None:
    """Sources are needed to ingest, not to check a store that already holds the data."""
    cfg = MODELS.replace("models:", f"store: sqlite:///{three / 'drift.db'}\nmodels:", 1)
    (tmp_path / "drift.yaml").write_text(cfg, encoding="utf-8")
    code, _, err = invoke("check", "--config", "drift.yaml", "--as-of", "2025-12-31", "--no-deliver", cwd=tmp_path)
    assert code == 0, err


# ------------------------------------------------------------------------------------------ YAML limits
def _write(tmp_path: Path, text: str) -> Path:
    p = tmp_path / "drift.yaml"
    p.write_text(text, encoding="utf-8")
    return p


def alias_bomb(levels: int = 12, width: int = 9) -> str:
    """Nested anchors: each level repeats the previous one ``width`` times (``width ** levels`` nodes)."""
    lines = ["a0: &a0 [x, x, x, x, x, x, x, x, x]"]
    for i in range(1, levels):
        lines.append(f"a{i}: &a{i} [" + ", ".join([f"*a{i - 1}"] * width) + "]")
    return "\n".join(lines) + "\nmodels: *a" + str(levels - 1) + "\n"


def test_alias_bomb_is_refused(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="expands to more than .* YAML nodes through its aliases"):
        load_config(_write(tmp_path, alias_bomb()))
    code, _, err = invoke("check", "--config", "drift.yaml", cwd=tmp_path)
    assert code == 2 and "aliases" in err and "Traceback" not in err


def test_a_few_aliases_are_fine(tmp_path: Path) -> None:
    text = MINIMUM.replace("    drivers:\n", "    drivers: &drv\n") + MODELS[len("models:\n"):].replace(
        "name: k000", "name: k001").split("    drivers:")[0] + "    drivers: *drv\n" \
        + "    reference: {start: 2021-01-04, end: 2023-12-25}\n"
    cfg = load_config(_write(tmp_path, text))
    assert cfg.models[1].drivers == cfg.models[0].drivers


@pytest.mark.parametrize("text, words", [
    ("models: &m [*m]\n", "refers to itself through an alias"),
    ("models: " + "[" * 5000 + "]" * 5000 + "\n", "nested too deeply"),
    (MINIMUM + "models: []\n", "key 'models' is written twice in the same mapping (lines 7 and 15)"),
    (MINIMUM.replace("    frequency: W", "    frequency: W\n    frequency: D"), "key 'frequency' is written twice"),
    ("models: [\n", "not valid YAML"),
    ("? [a, b]\n: 1\n", "not valid YAML"),
    ("- just\n- a list\n", "must be a mapping"),
], ids=["recursive-alias", "deep-nesting", "duplicate-top-key", "duplicate-model-key", "unclosed", "list-key",
        "not-a-mapping"])
def test_hostile_yaml_is_a_config_error(tmp_path: Path, text: str, words: str) -> None:
    with pytest.raises(ConfigError) as err:
        load_config(_write(tmp_path, text))
    assert words in str(err.value) and "drift.yaml" in str(err.value), str(err.value)


def test_config_file_size_is_limited(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import drift.config

    monkeypatch.setattr(drift.config, "MAX_CONFIG_BYTES", 100)
    with pytest.raises(ConfigError, match="larger than"):
        load_config(_write(tmp_path, MINIMUM))


def test_byte_order_mark_is_accepted(tmp_path: Path) -> None:
    p = tmp_path / "drift.yaml"
    p.write_bytes("\ufeff".encode() + MINIMUM.encode())
    assert load_config(p).models[0].name == "k000"


@pytest.mark.parametrize("url, words", [
    ("nonsense", "not a store URL"),
    ("nonsense://x", "not 'nonsense'"),
    ("mysql://u:secret@db/x", "not 'mysql'"),
])
def test_store_url_is_checked_at_load(tmp_path: Path, url: str, words: str) -> None:
    code, _, err = invoke("check", "--config", str(_write(tmp_path, f"store: '{url}'\n" + MODELS)), cwd=tmp_path)
    assert code == 2 and "key 'store'" in err and words in err and "secret" not in err, err


def test_a_model_that_fails_replaces_its_earlier_verdict(three: Path, tmp_path: Path) -> None:
    """The newest verdict of a model that could not be checked is that error, with its reason, not the
    verdict of an earlier check: the digest and status read the newest verdicts."""
    from drift.delivery.digest import build_digest
    from drift.store import open_store

    folder = tmp_path / "again"
    kiosk_data(folder / "data")
    (folder / "drift.yaml").write_text(SOURCES + MODELS, encoding="utf-8")
    assert run("ingest", "--config", "drift.yaml", cwd=folder).returncode == 0
    r = run("check", "--config", "drift.yaml", "--as-of", "2025-12-31", "--no-deliver", cwd=folder)
    assert r.returncode == 0, r.stderr
    # the same model, now with its reference end past the data: it cannot be checked
    (folder / "drift.yaml").write_text(SOURCES + MODELS.replace("end: 2023-12-25", "end: 2027-12-27"),
                                       encoding="utf-8")
    r = run("check", "--config", "drift.yaml", "--as-of", "2025-12-31", "--no-deliver", cwd=folder)
    assert r.returncode == 4, r.stderr
    cfg = load_config(folder / "drift.yaml")
    store = open_store(cfg.store_url())
    try:
        newest = {v["model"]: v for v in store.latest_verdicts()}
        assert newest["k000"]["verdict"] == "error"
        assert "reference period ends 2027-12-27" in newest["k000"]["payload"]["reason"]
        digest = build_digest(cfg, store)
    finally:
        store.dispose()
    line = next(m for m in digest.models if m.name == "k000")
    assert line.verdict == "error" and "reference period ends 2027-12-27" in line.reason
    assert "reference period ends 2027-12-27" in digest.text
