"""A stand-in worker for the supervisor tests: speaks the supervisor link of
``stateworth.server.peers`` (JSON lines on stdin/stdout) without gRPC or JAX.

Usage: ``python fake_worker.py INDEX MODE OUT``. Every worker reports ready; worker 0, on a first
line from its supervisor (the test sends it once every worker is ready), asks for one
``reload`` to be run on every worker and writes the supervisor's answer to OUT. How a
worker runs a load depends on MODE: ``ok`` (serves m@1 after it), ``fail`` (refuses it),
``other`` (serves m@2 after it: the directory changed under the load), ``die`` (exits).
"""

import json
import sys

index, mode, out = int(sys.argv[1]), sys.argv[2], sys.argv[3]


def send(doc: dict) -> None:
    sys.stdout.write(json.dumps(doc) + "\n")
    sys.stdout.flush()


send({"event": "ready", "port": 0, "worker_port": 0, "metrics_port": None})
if index == 0 and mode == "ok":
    input_line = sys.stdin.readline()  # the test's go-ahead, once every worker is ready
    send({"event": "coordinate", "id": "k1", "op": "reload", "artifact": ""})
for line in sys.stdin:
    doc = json.loads(line)
    if doc.get("op") == "reload":
        if mode == "die":
            sys.exit(3)
        if mode == "fail":
            send({"event": "done", "id": doc["id"], "ok": False, "code": "FAILED_PRECONDITION", "error": "bad artifact"})
        else:
            send({"event": "done", "id": doc["id"], "ok": True, "versions": ["m@2" if mode == "other" else "m@1"]})
    elif doc.get("op") == "result":
        with open(out + ".tmp", "w") as f:
            json.dump(doc["results"], f)
        import os
        os.replace(out + ".tmp", out)
