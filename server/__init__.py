"""The stateworth gRPC service (package stateworth.v1: ValuationService, ModelAdminService).

Serves the models of a directory of compiled artifacts from memory: values of states and of
moves, cohort contrasts, exact transition changes, marginal transition values and experiment
read-outs, plus the standard health service and server reflection. Start it with
``stateworth serve MODEL_DIR`` or from Python::

    from stateworth.server import Server, ServerConfig
    server = Server(ServerConfig("models/", port=0)).start()
    print(server.port); ...; server.stop()

See :mod:`stateworth.server.app` for the options and :mod:`stateworth.server.interceptors` for
the token rules. Figures served are model-based estimates under the model's causal
assumptions, not accounting figures.
"""

from stateworth.server.app import ConfigError, Server, ServerConfig, read_secret, run
from stateworth.server.store import ModelStore, Served, Snapshot

__all__ = ["ConfigError", "ModelStore", "Served", "Server", "ServerConfig", "Snapshot", "read_secret", "run"]
