"""Secrets stay secret: an SMTP password set in the environment never appears in logs, the store, reports,
alert files, the digest, ``drift status`` (text and JSON) or error messages, whether the mail server is
down, refuses the login or accepts it; a password written into the YAML is refused without being echoed.
Invented scenario (drift.demo); common practice, no source.
"""

from __future__ import annotations

import base64
import os
import subprocess
import sys
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import pytest
from aiosmtpd.smtp import AuthResult, LoginPassword

from drift.demo import generate
from tests.delivery.conftest import SmtpServer

pytestmark = pytest.mark.network

ROOT = Path(__file__).resolve().parents[2]
USER = "drift-mailer"
MARKER = "Pw-7f3c1d9e-MARKER-q8"  # the secret we hunt for
CEILING = 300


class Gate:
    """The server's accepted password, switchable (the environment always holds the marker)."""

    def __init__(self) -> None:
        self.accepts = "something-else"
        self.logins = 0

    def __call__(self, server: Any, session: Any, envelope: Any, mechanism: str, auth_data: Any) -> AuthResult:
        ok = (isinstance(auth_data, LoginPassword) and auth_data.login == USER.encode()
              and auth_data.password == self.accepts.encode())
        self.logins += ok
        return AuthResult(success=ok, handled=False)


def _forms(secret: str) -> list[bytes]:
    """The secret as it could leak: raw, and base64 the way AUTH PLAIN and AUTH LOGIN send it."""
    raw = secret.encode()
    return [raw, base64.b64encode(raw), base64.b64encode(b"\0" + USER.encode() + b"\0" + raw)]


ENV = {"DRIFT_T_SMTP_USER": USER, "DRIFT_T_SMTP_PASSWORD": MARKER}


def _cli(tmp_path: Path, *args: str) -> subprocess.CompletedProcess[bytes]:
    """The CLI as a real process (its own logging set-up, stderr as an operator sees it)."""
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]), **ENV}
    return subprocess.run([sys.executable, "-m", "drift.cli", "--log-level", "debug", *args], capture_output=True,
                          cwd=tmp_path, env=env, timeout=CEILING, check=False)


@pytest.mark.filterwarnings("ignore:Requiring AUTH while not requiring TLS:UserWarning")
def test_smtp_password_never_leaks(tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    from click.testing import CliRunner

    from drift.cli import cli

    gate = Gate()
    srv = SmtpServer(authenticator=gate, auth_required=True, auth_require_tls=False)
    cfg = generate(tmp_path)
    text = cfg.read_text(encoding="utf-8").replace(
        "  channels:\n",
        f"  channels:\n    - kind: email\n      host: 127.0.0.1\n      port: {srv.port}\n      timeout: 5\n"
        "      sender: drift@example.org\n      to: [planning@example.org]\n"
        "      username_env: DRIFT_T_SMTP_USER\n      password_env: DRIFT_T_SMTP_PASSWORD\n", 1)
    text = text.replace("  digest_path: digests/\n", "  digest_path: digests/\n  retry_backoff: 1s\n"
                                                     "  retry_max_backoff: 1s\n")
    cfg.write_text(text, encoding="utf-8")
    c = str(cfg)
    outputs: list[bytes] = []

    caplog.set_level("DEBUG")

    def run(*args: str) -> Any:
        # in-process (the commands are the same; a process each would cost seconds of imports); the log
        # records at DEBUG are collected by caplog
        res = CliRunner().invoke(cli, ["--log-level", "debug", *args], env=ENV)
        outputs.extend([res.stdout_bytes, res.stderr_bytes, repr(res.exception).encode()])
        return SimpleNamespace(returncode=res.exit_code, stdout=res.stdout_bytes, stderr=res.stderr_bytes)

    assert run("ingest", "--config", c).returncode == 0
    # the server is down: the check records pending notices
    res = run("check", "--config", c, "--as-of", "2025-12-31")
    assert res.returncode == 0 and "cannot reach" in caplog.text
    srv.start()
    try:
        # up, but refusing the login
        import time

        time.sleep(1.1)  # past the one-second backoff
        res = run("deliver", "--config", c)  # exit 5: notices still owed
        assert res.returncode == 5 and b"login" in res.stdout and b"DRIFT_T_SMTP_PASSWORD" in res.stdout, res.stdout
        assert srv.messages == []
        # accepting it: everything goes
        gate.accepts = MARKER
        time.sleep(1.1)
        res = run("deliver", "--config", c)
        assert res.returncode == 0 and srv.messages, res.stdout + res.stderr
        assert run("digest", "--config", c, "--send").returncode == 0
        assert run("status", "--config", c).returncode == 0
        assert run("status", "--config", c, "--json").returncode == 0
        assert gate.logins >= len(srv.messages)  # the server requires the login: it really happened
    finally:
        srv.stop()
    # in-process: the messages of the errors a channel raises
    from drift.config import load_config
    from drift.delivery.email import EmailSender
    from drift.delivery.outbox import OutboxMessage, configured_channels
    from drift.exceptions import DeliveryError

    os.environ["DRIFT_T_SMTP_USER"], os.environ["DRIFT_T_SMTP_PASSWORD"] = USER, MARKER
    try:
        loaded = load_config(cfg)
        name, spec = next((n, s) for n, s in configured_channels(loaded) if s.kind == "email")
        msg = OutboxMessage(1, "k" * 64, name, "subject", {"model": "east"}, 1, None)
        for up in (False, True):
            if up:
                srv.start()
                gate.accepts = "another"
            try:
                with pytest.raises(DeliveryError) as err:
                    EmailSender(loaded, spec, name).send(msg)
            finally:
                srv.stop()
            outputs.append(repr(err.value).encode() + str(err.value).encode())
    finally:
        del os.environ["DRIFT_T_SMTP_USER"], os.environ["DRIFT_T_SMTP_PASSWORD"]
    # every file drift wrote: the store (and its WAL), reports, alert files, digests
    files = [p for p in tmp_path.rglob("*") if p.is_file() and p.parent != tmp_path / "data"]
    assert any(p.name == "drift.db" for p in files) and any(p.suffix == ".html" for p in files)
    haystacks = ([("the log", caplog.text.encode())] + [(f"output {i}", o) for i, o in enumerate(outputs)]
                 + [(str(p), p.read_bytes()) for p in files])
    for form in _forms(MARKER):
        leaks = [where for where, data in haystacks if form in data]
        assert not leaks, f"the password ({form!r}) shows in {leaks}"
    assert "DEBUG" in caplog.text  # the logs were as verbose as they get


def test_password_in_the_yaml_is_refused_without_echo(tmp_path: Path) -> None:
    cfg = generate(tmp_path)
    text = cfg.read_text(encoding="utf-8").replace(
        "  channels:\n",
        "  channels:\n    - kind: email\n      host: 127.0.0.1\n      sender: a@example.org\n      to: [b@example.org]\n"
        f"      password: {MARKER}\n", 1)
    cfg.write_text(text, encoding="utf-8")
    res = _cli(tmp_path, "check", "--config", str(cfg))
    assert res.returncode == 2 and b"unknown key 'password'" in res.stderr and b"password_env" in res.stderr
    assert MARKER.encode() not in res.stderr + res.stdout


def test_sqlite_store_is_created_owner_only(tmp_path: Path) -> None:
    import stat

    from drift.store import open_store

    old = os.umask(0o022)
    try:
        st = open_store(f"sqlite:///{tmp_path / 'd.db'}")
        st.start_run("check")  # writes: the WAL and shared-memory files exist now
    finally:
        os.umask(old)
    try:
        files = {p.name: stat.S_IMODE(p.stat().st_mode) for p in tmp_path.iterdir()}
        assert set(files) >= {"d.db", "d.db-wal", "d.db-shm"}
        assert files == {n: 0o600 for n in files}
    finally:
        st.dispose()
