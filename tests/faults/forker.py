"""A fork server for the kill trials: imports drift once, then starts each command as a forked child.

``python -m tests.faults.forker`` reads JSON commands on stdin, one per line, and answers one JSON line each:

- ``{"run": [argv...], "cwd": DIR, "env": {...}, "out": FILE}`` -> ``{"pid": PID}``: a child runs
  ``drift <argv>`` (the CLI's ``main``) in DIR with the extra environment, stdout and stderr to FILE;
- ``{"wait": PID}`` -> ``{"pid": PID, "code": N}``: waits for that child; N is its exit code, or minus the
  signal that ended it (-9 after a kill -9).

A child is a whole process of its own (the test kills it with SIGKILL); forking from a process that has
already imported pandas, SQLAlchemy, statsmodels and matplotlib saves a second or two per trial. This
process starts no thread and opens no store, so forking it is safe.
"""

from __future__ import annotations

import importlib
import json
import os
import sys


def _child(argv: list[str], cwd: str, env: dict[str, str], out: str) -> None:
    code = 1
    try:
        os.chdir(cwd)
        os.environ.update(env)
        fd = os.open(out, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
        os.dup2(fd, 1)
        os.dup2(fd, 2)
        os.close(fd)
        sys.stdout = open(1, "w", buffering=1, closefd=False)  # noqa: SIM115 - lives as long as the child
        sys.stderr = open(2, "w", buffering=1, closefd=False)  # noqa: SIM115
        from drift.cli import cli

        try:
            cli.main(args=argv, prog_name="drift", standalone_mode=True)
            code = 0
        except SystemExit as exc:
            code = exc.code if isinstance(exc.code, int) else (0 if exc.code is None else 1)
    except BaseException:  # noqa: BLE001 - report and leave with a failure code
        import traceback

        traceback.print_exc()
    finally:
        try:
            sys.stdout.flush()
            sys.stderr.flush()
        finally:
            os._exit(code)  # never run the server's own exit handlers in the child


def main() -> None:
    # the whole library the commands use, imported once before any fork
    for name in ("drift.check", "drift.cli", "drift.delivery.alerts", "drift.delivery.charts",
                 "drift.delivery.digest", "drift.delivery.email", "drift.delivery.folder", "drift.executor",
                 "drift.ingest", "drift.pipeline", "drift.report", "drift.status"):
        importlib.import_module(name)

    print(json.dumps({"ready": os.getpid()}), flush=True)
    for line in sys.stdin:
        cmd = json.loads(line)
        if "run" in cmd:
            pid = os.fork()
            if pid == 0:
                _child(cmd["run"], cmd["cwd"], cmd.get("env") or {}, cmd["out"])
            print(json.dumps({"pid": pid}), flush=True)
        elif "wait" in cmd:
            _, status = os.waitpid(int(cmd["wait"]), 0)
            code = -os.WTERMSIG(status) if os.WIFSIGNALED(status) else os.WEXITSTATUS(status)
            print(json.dumps({"pid": cmd["wait"], "code": code}), flush=True)


if __name__ == "__main__":
    main()
