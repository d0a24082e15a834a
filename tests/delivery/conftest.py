"""Fixtures for the delivery tests: a temporary store, configs, hand-made payloads, and real loopback
servers (aiosmtpd for SMTP, http.server for the webhook). Every server binds 127.0.0.1 only."""

from __future__ import annotations

import asyncio
import datetime as dt
import http.server
import ipaddress
import json
import socket
import ssl
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import pytest
from aiosmtpd.controller import Controller
from aiosmtpd.smtp import AuthResult, LoginPassword

from drift.config import Config
from drift.store import open_store

AS_OF = "2025-12-29"
T0 = dt.datetime(2025, 12, 29, 6, 0, tzinfo=dt.timezone.utc)


# ----------------------------------------------------------------------------------------- store, config


@pytest.fixture
def store(tmp_path: Path) -> Iterator[Any]:
    st = open_store("sqlite:///" + str(tmp_path / "drift.db"))
    yield st
    st.dispose()


def make_cfg(tmp_path: Path, channels: list[dict[str, Any]], **alerts: Any) -> Config:
    """A Config whose base_dir is ``tmp_path`` (folder paths resolve there)."""
    return Config.model_validate({"alerts": {"channels": channels, **alerts}, "base_dir": tmp_path})


# ----------------------------------------------------------------------------------------- payloads


def action(name: str, severity: str = "act", **kw: Any) -> dict[str, Any]:
    reasons = {"refit": "The CUSUM of recursive residuals crossed its 5% boundary.",
               "drop-driver": "The driver's coefficient is no longer distinguishable from zero.",
               "relag": "The lag profile now peaks at another lag.",
               "data-late": "The driver's latest value is overdue.",
               "watch": "Residuals are drifting but no test has crossed its boundary."}
    return {"action": name, "severity": severity, "reason": reasons.get(name, "invented"), **kw}


def payload(name: str, actions: list[dict[str, Any]] | None, *, as_of: str = AS_OF,
            charts: bool = True) -> dict[str, Any]:
    """An invented check payload in the documented shape (numbers are made up)."""
    periods = [(dt.date(2024, 1, 1) + dt.timedelta(weeks=i)).isoformat() for i in range(8)]
    p: dict[str, Any] = {
        "name": name, "verdict": actions[0]["action"] if actions else "keep", "as_of": as_of,
        "target": f"{name}_units", "unit": "units", "frequency": "W",
        "reference": {"start": "2021-01-04", "end": "2023-12-25"}, "monitor_start": "2024-01-01",
        "actions": actions,
        "alarms": [{"test": "cusum", "date": "2024-11-18", "statistic": 1.9, "threshold": 1.7, "level": 0.05}],
        "tests": [{"test": "cusum", "statistic": 1.2, "pvalue": 0.03, "threshold": 0.948, "level": 0.05,
                   "date": "2024-11-18"}],
        "drivers": [{"series": f"{name}_promo", "lag": 1, "form": "lagged", "coef_reference": 2.01,
                     "coef_recent": 1.2, "ci_recent": [0.8, 1.6], "last_period": "2025-12-22",
                     "next_due": "2026-01-05T00:00:00+00:00", "late": False},
                    {"series": f"{name}_temp", "lag": 0, "form": "lagged", "coef_reference": 0.5,
                     "coef_recent": 0.02, "ci_recent": [-0.3, 0.34], "last_period": "2025-11-24",
                     "next_due": "2025-12-01T00:00:00+00:00", "late": True}],
        "accuracy": {"model": {"mae": 4.1, "rmse": 5.0, "mase": 0.8, "bias": 0.2, "n": 52},
                     "baseline": {"mae": 4.5, "rmse": 5.6, "mase": 0.9, "bias": 0.1, "n": 52}},
    }
    if charts:
        p["charts"] = {"periods": periods, "monitor_start_index": 4,
                       "cusum": {"path": [None] * 4 + [0.1, 0.5, 1.2, 1.9],
                                 "bounds": {"0.05": [1.0] * 8}, "alarm_date": "2024-11-18"},
                       "forecast": {"actual": [1.0] * 8, "forecast": [None] * 4 + [1.1] * 4,
                                    "baseline": [None] * 4 + [0.9] * 4}}
    return p


def outcome(*models: dict[str, Any], run_id: int = 1, as_of: str = AS_OF) -> SimpleNamespace:
    return SimpleNamespace(run_id=run_id, as_of=dt.date.fromisoformat(as_of), models=list(models))


# the tiny valid PNG a fake chart renderer returns (1x1 pixel)
PNG_1PX = bytes.fromhex(
    "89504e470d0a1a0a0000000d4948445200000001000000010806000000"
    "1f15c4890000000d49444154789c6360000002000154a24f5d0000000049454e44ae426082")


@contextmanager
def folder_outbox(tmp_path: Path, models: tuple[str, ...], status: str, last_error: str) -> Iterator[tuple[Any, str]]:
    """A store whose outbox holds one refit notice per model for a folder channel ``x`` (``out/``), every row
    set to ``status`` with ``last_error``, and a ``drift.yaml`` naming that store and channel: yields
    (store, config file) for a test of an operator's ``drift deliver`` decisions."""
    from drift.delivery.alerts import process_alerts

    (tmp_path / "drift.yaml").write_text(
        f"store: sqlite:///{tmp_path / 'd.db'}\nalerts:\n  channels:\n    - {{kind: folder, path: out, name: x}}\n",
        encoding="utf-8")
    st = open_store(f"sqlite:///{tmp_path / 'd.db'}")
    try:
        cfg = make_cfg(tmp_path, [{"kind": "folder", "path": "out", "name": "x"}])
        process_alerts(cfg, st, outcome(*(payload(m, [action("refit")]) for m in models)), now=T0)
        from drift.store import outbox

        with st.begin() as conn:
            conn.execute(outbox.update().values(status=status, last_error=last_error))
        yield st, str(tmp_path / "drift.yaml")
    finally:
        st.dispose()


def fake_renderer(model_payload: dict[str, Any], kinds: Any = None) -> dict[str, bytes]:
    """Stands in for drift.delivery.charts.render_model_charts: a PNG for every kind with chart data."""
    charts = model_payload.get("charts") or {}
    return {k: PNG_1PX for k in (kinds or ["cusum", "forecast"]) if charts.get(k)}


# ----------------------------------------------------------------------------------------- SMTP


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class RecordingHandler:
    """Records envelopes. ``mode``: "ok", "reject" (421 to DATA), "refuse" (554 to DATA, permanent),
    "drop-rcpt" (close at RCPT), "drop-after-data" (take the message, then close without replying).
    ``refuse_rcpt`` maps an address to the reply its RCPT gets instead of 250."""

    def __init__(self) -> None:
        self.mode = "ok"
        self.messages: list[SimpleNamespace] = []
        self.dropped_after_data = 0
        self.refuse_rcpt: dict[str, str] = {}

    async def handle_RCPT(self, server: Any, session: Any, envelope: Any, address: str, options: Any) -> str:
        if self.mode == "drop-rcpt":
            server.transport.close()
            return "421 closing"
        if address in self.refuse_rcpt:
            return self.refuse_rcpt[address]
        envelope.rcpt_tos.append(address)
        return "250 OK"

    async def handle_DATA(self, server: Any, session: Any, envelope: Any) -> str:
        if self.mode == "reject":
            return "421 4.3.0 try again later"
        if self.mode == "refuse":
            return "554 5.6.0 message refused"
        if self.mode == "drop-after-data":
            self.dropped_after_data += 1
            server.transport.close()
            await asyncio.sleep(0)
            return "250 OK"
        self.messages.append(SimpleNamespace(mail_from=envelope.mail_from, rcpt_tos=list(envelope.rcpt_tos),
                                             content=bytes(envelope.original_content or envelope.content),
                                             login=getattr(session, "login_data", None)))
        return "250 Message accepted"


class SmtpServer:
    """A restartable aiosmtpd server on 127.0.0.1 (same port across restarts)."""

    def __init__(self, **smtp_kwargs: Any) -> None:
        self.handler = RecordingHandler()
        self.port = free_port()
        self.kwargs = smtp_kwargs
        self.controller: Controller | None = None

    def start(self) -> None:
        self.controller = Controller(self.handler, hostname="127.0.0.1", port=self.port,
                                     server_hostname="127.0.0.1", **self.kwargs)
        self.controller.start()

    def stop(self) -> None:
        if self.controller is not None:
            self.controller.stop()
            self.controller = None

    @property
    def messages(self) -> list[SimpleNamespace]:
        return self.handler.messages


@pytest.fixture
def smtp_server() -> Iterator[SmtpServer]:
    srv = SmtpServer()
    srv.start()
    yield srv
    srv.stop()


USER, PASSWORD = "drift-bot", "s3cret-pw"


def authenticator(server: Any, session: Any, envelope: Any, mechanism: str, auth_data: Any) -> AuthResult:
    ok = (isinstance(auth_data, LoginPassword) and auth_data.login == USER.encode()
          and auth_data.password == PASSWORD.encode())
    return AuthResult(success=ok, handled=False)


@pytest.fixture
def smtp_auth_server() -> Iterator[SmtpServer]:
    srv = SmtpServer(authenticator=authenticator, auth_required=True, auth_require_tls=False)
    srv.start()
    yield srv
    srv.stop()


@pytest.fixture(scope="session")
def tls_files(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    """A self-signed certificate for 127.0.0.1 (generated with the cryptography package)."""
    crypto = pytest.importorskip("cryptography")
    del crypto
    from cryptography import x509
    from cryptography.hazmat.primitives import hashes, serialization
    from cryptography.hazmat.primitives.asymmetric import ec
    from cryptography.x509.oid import NameOID

    key = ec.generate_private_key(ec.SECP256R1())
    name = x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, "127.0.0.1")])
    now = dt.datetime.now(dt.timezone.utc)
    cert = (x509.CertificateBuilder().subject_name(name).issuer_name(name).public_key(key.public_key())
            .serial_number(x509.random_serial_number())
            .not_valid_before(now - dt.timedelta(days=1)).not_valid_after(now + dt.timedelta(days=2))
            .add_extension(x509.SubjectAlternativeName([x509.IPAddress(ipaddress.ip_address("127.0.0.1"))]),
                           critical=False)
            .add_extension(x509.BasicConstraints(ca=True, path_length=None), critical=True)
            .sign(key, hashes.SHA256()))
    d = tmp_path_factory.mktemp("tls")
    cert_path, key_path = d / "cert.pem", d / "key.pem"
    cert_path.write_bytes(cert.public_bytes(serialization.Encoding.PEM))
    key_path.write_bytes(key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8,
                                           serialization.NoEncryption()))
    return cert_path, key_path


@pytest.fixture
def smtp_tls_server(tls_files: tuple[Path, Path], monkeypatch: pytest.MonkeyPatch) -> Iterator[SmtpServer]:
    """STARTTLS required, AUTH only after TLS; the client trusts the test certificate."""
    cert, key = tls_files
    server_ctx = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    server_ctx.load_cert_chain(str(cert), str(key))
    import drift.delivery.email as email_mod

    monkeypatch.setattr(email_mod, "tls_context", lambda: ssl.create_default_context(cafile=str(cert)))
    srv = SmtpServer(tls_context=server_ctx, require_starttls=True, authenticator=authenticator,
                     auth_required=True)
    srv.start()
    yield srv
    srv.stop()


# ----------------------------------------------------------------------------------------- HTTP


class HttpSink:
    """A loopback HTTP server recording POST bodies; ``status`` is the answer it gives."""

    def __init__(self) -> None:
        self.status = 200
        self.requests: list[SimpleNamespace] = []
        sink = self

        class Handler(http.server.BaseHTTPRequestHandler):
            def do_POST(self) -> None:
                n = int(self.headers.get("Content-Length") or 0)
                body = self.rfile.read(n)
                status = sink.status
                if 200 <= status < 300:
                    sink.requests.append(SimpleNamespace(path=self.path, headers=dict(self.headers),
                                                         body=json.loads(body)))
                self.send_response(status)
                self.send_header("Content-Type", "text/plain")
                self.end_headers()
                self.wfile.write(b"ok" if status < 300 else b"server error")

            def log_message(self, *args: Any) -> None:
                pass

        self.server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.port = int(self.server.server_address[1])
        self.thread = threading.Thread(target=self.server.serve_forever, daemon=True)
        self.thread.start()

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}/hook"

    def close(self) -> None:
        self.server.shutdown()
        self.server.server_close()
        self.thread.join(timeout=5)


@pytest.fixture
def http_sink() -> Iterator[HttpSink]:
    sink = HttpSink()
    yield sink
    sink.close()
