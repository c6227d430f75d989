"""A worker's link to its supervisor (``stateworth serve --workers N``, see :mod:`.supervisor`).

Why workers: a Python gRPC server runs its handlers under one interpreter lock, so one process
answers single-value calls on about one core whatever the machine has. N processes listening on
one port (``SO_REUSEPORT``: the kernel spreads new connections over them) use N cores.

The link is two pipes, one JSON object per line: the worker's stdout carries its events to the
supervisor, its stdin carries the supervisor's commands. Events:

* ``{"event": "ready", "port": P, "worker_port": W, "metrics_port": M}``: models loaded and
  serving, on the shared port P and on its own port W;
* ``{"event": "coordinate", "id": ID, "op": "reload" | "load", "artifact": A}``: an admin call
  on this worker asks every worker to do the same load;
* ``{"event": "done", "id": ID, "ok": bool, "code": ..., "error": ..., "versions": [...]}``:
  this worker's outcome and, after a success, the ``name@version`` it now serves.

Commands: ``{"op": "reload" | "load", "id": ID, "artifact": A}`` (do it, answer ``done``) and
``{"op": "result", "id": ID, "results": [...]}`` (every worker's outcome, to the asking worker).

So an admin load or reload answers only once every worker has done it, and an answer of OK
means every worker now serves what the model directory holds. The asking worker's own outcome
(and its error, unchanged) comes from its own run of the command. Messages carry artifact names,
status codes and error texts (which name artifacts and files), never request contents.
When stdin closes (the supervisor is gone) the worker stops: no orphan keeps the port.
"""

from __future__ import annotations

import json
import threading
import uuid
from typing import IO, Any, Callable

OPS = ("reload", "load")


class PeerLink:
    """The worker side of the link. ``run_op(op, artifact)`` does a load in this process and
    returns its result (or raises); ``on_close()`` is called once when the supervisor is gone."""

    def __init__(self, index: int, commands: IO[str], events: IO[str]) -> None:
        self.index = index
        self._in = commands
        self._out = events
        self._lock = threading.Lock()
        self._waiting: dict[str, list] = {}  # id -> [event, results]
        self._local: dict[str, tuple[str, Any]] = {}  # id -> ("ok", result) | ("err", exception)
        self._state = threading.Lock()  # _waiting and _local
        self.run_op: Callable[[str, str], Any] | None = None
        self.versions: Callable[[], list[str]] | None = None  # what this worker serves, name@version
        self.on_close: Callable[[], None] | None = None

    def start(self) -> "PeerLink":
        threading.Thread(target=self._read, name="stateworth-peer-link", daemon=True).start()
        return self

    def send(self, doc: dict) -> None:
        line = json.dumps(doc, separators=(",", ":")) + "\n"
        with self._lock:
            try:
                self._out.write(line)
                self._out.flush()
            except (OSError, ValueError):  # the supervisor is gone; the reader sees EOF and stops us
                pass

    def ready(self, port: int, worker_port: int, metrics_port: int | None) -> None:
        self.send({"event": "ready", "port": port, "worker_port": worker_port, "metrics_port": metrics_port})

    def coordinate(self, op: str, artifact: str, timeout: float) -> tuple[tuple[str, Any] | None, list[dict] | None]:
        """Ask every worker (this one included) to run ``op``; wait for all outcomes.

        Returns (this worker's outcome or None, every worker's outcome as dicts, or None when
        they did not all answer within ``timeout`` seconds)."""
        key = uuid.uuid4().hex
        done = threading.Event()
        with self._state:
            self._waiting[key] = [done, None]
        self.send({"event": "coordinate", "id": key, "op": op, "artifact": artifact})
        done.wait(timeout)
        with self._state:
            results = self._waiting.pop(key)[1]
            return self._local.pop(key, None), results

    # ---- the command reader ----------------------------------------------------------------
    def _read(self) -> None:
        try:
            for line in self._in:
                try:
                    doc = json.loads(line)
                except ValueError:
                    continue
                if not isinstance(doc, dict):
                    continue
                op = doc.get("op")
                if op in OPS:
                    threading.Thread(target=self._do, args=(doc,), name="stateworth-peer-op", daemon=True).start()
                elif op == "result":
                    with self._state:
                        w = self._waiting.get(str(doc.get("id")))
                        if w is not None:
                            w[1] = list(doc.get("results") or [])
                            w[0].set()
        except (OSError, ValueError):
            pass
        if self.on_close is not None:
            self.on_close()

    def _do(self, doc: dict) -> None:
        key, op, artifact = str(doc.get("id")), str(doc["op"]), str(doc.get("artifact") or "")
        out: dict[str, Any] = {"event": "done", "id": key}
        try:
            result = self.run_op(op, artifact) if self.run_op is not None else None
            outcome: tuple[str, Any] = ("ok", result)
            out["ok"] = True
            if self.versions is not None:
                out["versions"] = self.versions()
        except Exception as e:  # noqa: BLE001 - every outcome goes back to the supervisor
            from stateworth.server.errors import to_status

            outcome = ("err", e)
            status, _field = to_status(e)
            out.update(ok=False, code=status.code.name, error=_message(e))
        with self._state:
            if key in self._waiting:  # this worker asked: its own outcome answers the call
                self._local[key] = outcome
        self.send(out)


def _message(e: BaseException) -> str:
    text = getattr(e, "message", None) or str(e) or e.__class__.__name__
    return text[:400]
