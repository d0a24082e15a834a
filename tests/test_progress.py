"""Progress bars of long checks and ingests: drawn on stderr when someone watches, silent otherwise.

Silent under ``--json``, when stderr is not a terminal (pytest's and click's captured streams are not) and
for short runs; drawn when stderr is a terminal (faked here) or when forced. The data are the invented kiosk
scenario of ``tests/test_cli_end_to_end.py``. Expected behaviour: common practice, no source.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from click.testing import CliRunner

import drift.ingest.base as ingest_base
from drift import progress as bars
from drift.cli import cli
from drift.progress import Progress
from tests.test_cli_end_to_end import kiosk_data
from tests.test_config import MINIMUM


def drawn(text: str) -> bool:
    """Whether a rich bar was drawn: its description and the terminal control codes of a live display."""
    return "\x1b[" in text and ("checking" in text or "kiosks" in text)


def run_bar(enabled: bool | None, total: int, **kw: int) -> None:
    with Progress(enabled, "checking", total, **kw) as bar:
        for _ in range(total):
            bar.advance(1)


@pytest.fixture()
def terminal(monkeypatch: pytest.MonkeyPatch) -> None:
    """stderr taken for a terminal (the bar's only question about where it draws)."""
    monkeypatch.setattr(bars, "stderr_is_terminal", lambda: True)


def test_silent_when_stderr_is_not_a_terminal(capsys: pytest.CaptureFixture[str]) -> None:
    assert not bars.stderr_is_terminal()  # pytest captures stderr: not a terminal
    run_bar(None, 5_000)
    assert capsys.readouterr() == ("", "")


def test_drawn_on_a_terminal_for_a_long_run_only(terminal: None, capsys: pytest.CaptureFixture[str]) -> None:
    run_bar(None, bars.AUTO_MODELS)
    out, err = capsys.readouterr()
    assert out == "" and drawn(err), err[:200]
    run_bar(None, bars.AUTO_MODELS - 1)  # a short check: no bar
    assert capsys.readouterr() == ("", "")
    run_bar(False, 5_000)  # --json, the daemon: never
    assert capsys.readouterr() == ("", "")


def test_forced_bar_is_drawn_even_off_a_terminal(capsys: pytest.CaptureFixture[str]) -> None:
    run_bar(True, 3)
    out, err = capsys.readouterr()
    assert out == "" and drawn(err), repr(err[:200])
    run_bar(True, 0)  # nothing to count: nothing drawn
    assert capsys.readouterr() == ("", "")


@pytest.fixture()
def project(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    kiosk_data(tmp_path / "data")
    (tmp_path / "drift.yaml").write_text(MINIMUM, encoding="utf-8")
    monkeypatch.chdir(tmp_path)
    monkeypatch.setattr(bars, "AUTO_MODELS", 1)  # the one-model check counts as long here
    monkeypatch.setattr(ingest_base, "PROGRESS_FILES", 1)  # and the two-file ingest
    return tmp_path


def invoke(*args: str) -> tuple[str, str]:
    r = CliRunner().invoke(cli, list(args), catch_exceptions=False)
    assert r.exit_code == 0, (r.stdout, r.stderr)
    return r.stdout, r.stderr


def test_cli_silent_when_not_a_terminal(project: Path) -> None:
    _, err = invoke("ingest", "--config", "drift.yaml")
    assert not drawn(err), err
    out, err = invoke("check", "--config", "drift.yaml", "--as-of", "2025-12-31", "--no-deliver")
    assert "k000" in out and not drawn(err) and "\x1b[" not in out + err


def test_cli_draws_on_a_terminal_but_never_with_json(project: Path, terminal: None) -> None:
    _, err = invoke("ingest", "--config", "drift.yaml")
    assert drawn(err), err[:200]
    out, err = invoke("check", "--config", "drift.yaml", "--as-of", "2025-12-31", "--no-deliver")
    assert drawn(err) and "\x1b[" not in out
    out, err = invoke("check", "--config", "drift.yaml", "--as-of", "2025-12-31", "--no-deliver", "--json")
    assert "\x1b[" not in out + err
    assert json.loads(out)["models"][0]["name"] == "k000"  # stdout: the JSON object and nothing else
