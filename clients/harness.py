"""``stateworth serve`` as a subprocess on a free loopback port: the one harness the demo and the
tests start their servers with.

The server writes one JSON object a line on stderr; ``listening`` carries the port it bound
(``--port 0``: a free one) and ``metrics_port``, ``serving`` says its models are loaded. A
reader thread keeps every line (``lines``) and every parsed object (``events``), and, when a log
file is given, writes each line there as it comes. Imports no JAX: the server's own process
pays for that.

::

    from stateworth.clients.harness import ServerProcess
    with ServerProcess("demo-out/models", "--metrics-port", "0") as srv:
        with Client(srv.target) as c: ...
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path
from typing import IO, Callable, Mapping

from stateworth.errors import StateworthError

#: seconds to wait for ``listening`` and for the event asked for (loading and solving included)
START_TIMEOUT = 240.0


class ServerStartError(StateworthError):
    """The server exited, or did not report an event in time; the message says where its log is
    (or carries its last lines when it was not written to a file)."""


class ServerProcess:
    """``stateworth serve MODEL_DIR --port 0 ARGS...`` in a subprocess.

    Returns once the server reported ``listening`` (``port``, ``metrics_port``) and then
    ``wait`` (default ``serving``; ``""``: do not wait). ``env`` is added to this process's
    environment; ``log_path`` receives every log line; ``cwd`` is the server's working folder.
    :class:`ServerStartError` when it exits or stays silent for ``timeout`` seconds first."""

    def __init__(self, model_dir: str | Path, *args: str, env: Mapping[str, str] | None = None, wait: str = "serving",
                 log_path: str | Path | None = None, cwd: str | Path | None = None,
                 timeout: float = START_TIMEOUT) -> None:
        cmd = [sys.executable, "-m", "stateworth", "serve", str(model_dir), "--port", "0", *args]
        full_env = dict(os.environ, PYTHONUNBUFFERED="1", **(env or {}))
        self.log_path = None if log_path is None else Path(log_path)
        self._log: IO[str] | None = None if self.log_path is None else open(self.log_path, "w", encoding="utf-8")
        self.lines: list[str] = []
        self.events: list[dict] = []
        self.timeout = timeout
        self._cv = threading.Condition()
        self.proc = subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                                     text=True, env=full_env, cwd=cwd)
        self._reader = threading.Thread(target=self._read, name="stateworth-server-log", daemon=True)
        self._reader.start()
        try:
            listening = self.wait_for("listening")
            self.port: int = int(listening["port"])
            self.metrics_port: int | None = listening.get("metrics_port")
            if wait:
                self.wait_for(wait)
        except BaseException:
            self.stop()
            raise

    def _read(self) -> None:
        assert self.proc.stderr is not None
        for line in self.proc.stderr:
            with self._cv:
                if self._log is not None and not self._log.closed:
                    self._log.write(line)
                    self._log.flush()
                self.lines.append(line)
                try:
                    doc = json.loads(line)
                except ValueError:
                    doc = None
                if isinstance(doc, dict):
                    self.events.append(doc)
                self._cv.notify_all()
        with self._cv:
            self._cv.notify_all()

    def _where(self) -> str:
        if self.log_path is not None:
            return f"see {self.log_path}"
        return "its last log lines:\n" + "".join(self.lines[-40:])

    def wait_for(self, event: str, timeout: float | None = None) -> dict:
        """The first log object whose ``event`` is ``event``, once the server has written it."""
        end = time.monotonic() + (self.timeout if timeout is None else timeout)
        exited: float | None = None
        with self._cv:
            while True:
                for ev in self.events:
                    if ev.get("event") == event:
                        return ev
                if exited is None and self.proc.poll() is not None:
                    exited = time.monotonic()
                # its last lines may still be in the pipe; a worker it started may hold the pipe open
                if exited is not None and (not self._reader.is_alive() or time.monotonic() - exited > 2.0):
                    raise ServerStartError(f"the server exited (status {self.proc.returncode}) before '{event}'; "
                                           + self._where())
                left = end - time.monotonic()
                if left <= 0:
                    raise ServerStartError(f"the server did not report '{event}' within "
                                           f"{self.timeout if timeout is None else timeout:.0f} s; " + self._where())
                self._cv.wait(min(left, 0.2))

    def wait_until(self, ready: Callable[[list[dict]], bool], timeout: float = 10.0) -> list[dict]:
        """The events once ``ready(events)`` holds (access lines are written by the server's log
        writer up to --log-flush-ms after their call); TimeoutError with the log if never."""
        end = time.monotonic() + timeout
        with self._cv:
            while not ready(list(self.events)):
                left = end - time.monotonic()
                if left <= 0:
                    raise TimeoutError("the server's log never showed what was waited for; " + self._where())
                self._cv.wait(min(left, 0.1))
            return list(self.events)

    @property
    def target(self) -> str:
        return f"127.0.0.1:{self.port}"

    def stop(self, timeout: float = 60.0) -> int:
        """SIGTERM (the server drains its calls in flight), wait ``timeout`` seconds, else kill;
        the exit status."""
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
        try:
            rc = self.proc.wait(timeout)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            rc = self.proc.wait()
        self._reader.join(5.0)  # the rest of its log, before the file closes
        with self._cv:
            if self._log is not None and not self._log.closed:
                self._log.close()
        return rc

    def __enter__(self) -> "ServerProcess":
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()
