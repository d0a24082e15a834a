"""A loopback SMTP server that misbehaves on request, one step at a time (tests only; binds 127.0.0.1).

Steps: ``greeting`` (on connect), ``ehlo`` (EHLO and HELO), ``mail``, ``rcpt``, ``data`` (the DATA command),
``eod`` (the reply after the message data). A fault at a step is one of

- a reply line such as ``"451 4.3.0 try again later"`` given instead of the good one (a ``421`` reply also
  closes the connection, as RFC 5321 section 3.8 has it);
- ``"drop"``: close the connection without a reply;
- ``"stall"``: say nothing for :attr:`ScriptedSmtp.stall` seconds, then close.

At ``eod`` a refusal discards the message; a drop or a stall happens *after* the server took it (the
message is recorded), which is the case a client cannot tell from a lost one. :attr:`messages` holds the raw
messages taken, in order. Stopping the server makes the port refuse connections (the server "down").
"""

from __future__ import annotations

import email
import socket
import socketserver
import threading
import time

from typing_extensions import Self

STEPS = ("greeting", "ehlo", "mail", "rcpt", "data", "eod")
_GOOD = {"greeting": b"220 127.0.0.1 scripted ESMTP", "ehlo": b"250-127.0.0.1\r\n250 8BITMIME",
         "helo": b"250 127.0.0.1", "mail": b"250 2.1.0 OK", "rcpt": b"250 2.1.5 OK",
         "data": b"354 end with <CRLF>.<CRLF>", "eod": b"250 2.0.0 queued"}


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class _Server(socketserver.ThreadingTCPServer):
    daemon_threads = True
    allow_reuse_address = True
    owner: ScriptedSmtp


class _Session(socketserver.StreamRequestHandler):
    server: _Server

    def _reply(self, step: str, good: bytes) -> bool:
        """Answer ``step``; False when the session is over (dropped, stalled, or closed after 421)."""
        fault = self.server.owner.fault
        if fault is None or fault[0] != step:
            self.wfile.write(good + b"\r\n")
            return True
        action = fault[1]
        if action == "drop":
            return False
        if action == "stall":
            time.sleep(self.server.owner.stall)
            return False
        self.wfile.write(action.encode("ascii") + b"\r\n")
        return not action.startswith("421")

    def handle(self) -> None:
        owner = self.server.owner
        owner.connections += 1
        if not self._reply("greeting", _GOOD["greeting"]):
            return
        while True:
            line = self.rfile.readline(4096)
            if not line:
                return
            cmd = line.split(b" ", 1)[0].strip().upper()
            if cmd in (b"EHLO", b"HELO"):
                if not self._reply("ehlo", _GOOD["ehlo" if cmd == b"EHLO" else "helo"]):
                    return
            elif cmd == b"MAIL":
                if not self._reply("mail", _GOOD["mail"]):
                    return
            elif cmd == b"RCPT":
                if not self._reply("rcpt", _GOOD["rcpt"]):
                    return
            elif cmd == b"DATA":
                fault = owner.fault
                if fault is not None and fault[0] == "data":
                    if not self._reply("data", _GOOD["data"]):
                        return
                    continue
                self.wfile.write(_GOOD["data"] + b"\r\n")
                chunks = []
                while True:
                    part = self.rfile.readline(1 << 20)
                    if not part:
                        return  # the client went away mid-message: nothing taken
                    if part == b".\r\n":
                        break
                    chunks.append(part[1:] if part.startswith(b"..") else part)
                raw = b"".join(chunks)
                fault = owner.fault
                refused = fault is not None and fault[0] == "eod" and fault[1] not in ("drop", "stall")
                if not refused:
                    owner.take(raw)
                if not self._reply("eod", _GOOD["eod"]):
                    return
            elif cmd == b"QUIT":
                self.wfile.write(b"221 bye\r\n")
                return
            elif cmd in (b"RSET", b"NOOP"):
                self.wfile.write(b"250 OK\r\n")
            else:
                self.wfile.write(b"502 5.5.1 not implemented\r\n")


class ScriptedSmtp:
    """See the module docstring. ``fault`` is ``None`` (behave) or ``(step, action)``."""

    def __init__(self, stall: float = 2.0) -> None:
        self.port = free_port()
        self.stall = stall
        self.fault: tuple[str, str] | None = None
        self.messages: list[bytes] = []
        self.connections = 0
        self._lock = threading.Lock()
        self._server: _Server | None = None
        self._thread: threading.Thread | None = None

    def take(self, raw: bytes) -> None:
        with self._lock:
            self.messages.append(raw)

    def keys(self) -> list[str]:
        """The ``X-Drift-Key`` of every message taken, in order (repeats included)."""
        with self._lock:
            return [str(email.message_from_bytes(m)["X-Drift-Key"]) for m in self.messages]

    @property
    def running(self) -> bool:
        return self._server is not None

    def start(self) -> None:
        if self._server is not None:
            return
        srv = _Server(("127.0.0.1", self.port), _Session)
        srv.owner = self
        self._server = srv
        self._thread = threading.Thread(target=srv.serve_forever, kwargs={"poll_interval": 0.05}, daemon=True)
        self._thread.start()

    def stop(self) -> None:
        if self._server is None:
            return
        self._server.shutdown()
        self._server.server_close()
        assert self._thread is not None
        self._thread.join(timeout=10)
        self._server = self._thread = None

    def __enter__(self) -> Self:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()
