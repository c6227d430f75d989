"""Helpers for the server and client tests: tiny model artifacts and a server subprocess.

The model is the fitness-class scenario shrunk to a few hundred states (2 markets x 4 tenure
levels x 5 statuses x 3 engagement bands x 2 propensity bands = 240), with random but valid
tables; ``draws`` adds posterior draws (mixtures of two valid tables, so every draw keeps the
move rules) for intervals. Servers are started by the demo's harness
(``stateworth.clients.harness``); starting one costs a JAX import and compile, so test modules
share one server each.
"""

from __future__ import annotations

import urllib.request
from pathlib import Path

import numpy as np
from prometheus_client.parser import text_string_to_metric_families

from stateworth.clients.harness import ServerProcess as Harness

ROOT = Path(__file__).resolve().parents[1]
MODEL = "fitness-tiny"
STATE = {"market": "harbor", "tenure": "0", "status": "prospect", "engagement": "none", "band": "high"}


def spec_dict(name: str = MODEL) -> dict:
    return {
        "model": {"name": name, "currency": "EUR", "discount": {"annual_rate": 0.10, "cash": "start"}},
        "axes": {
            "market": {"kind": "fixed", "levels": ["harbor", "upland"]},
            "tenure": {"kind": "counter", "size": 4, "advance_while": "member", "reset_on": ["join", "lapse"]},
            "status": {"kind": "status", "levels": ["prospect", "lapsed", "solo", "duo", "studio"],
                       "members": ["solo", "duo", "studio"],
                       "given": ["market", "tenure", "status", "engagement", "band"],
                       "moves": {"prospect": ["prospect", "solo", "duo"],
                                 "lapsed": ["lapsed", "solo", "duo", "studio"],
                                 "solo": ["lapsed", "solo", "duo"],
                                 "duo": ["lapsed", "solo", "duo", "studio"],
                                 "studio": ["lapsed", "duo", "studio"]}},
            "engagement": {"kind": "chance", "levels": ["none", "light", "keen"],
                           "given": ["next.status", "engagement"]},
            "band": {"kind": "chance", "levels": ["low", "high"], "given": ["band"]},
        },
        "rewards": {"revenue": {"price": {"solo": 19.0, "duo": 29.0, "studio": 49.0}, "on_join": -10.0}},
    }


def tables(seed: int = 0) -> dict[str, np.ndarray]:
    """Random valid tables (churn a few per cent, joins about 1 %), persistent per seed."""
    rng = np.random.default_rng(seed)
    M, T, S, E, B = 2, 4, 5, 3, 2
    P = np.zeros((M, T, S, E, B, S))
    u = lambda lo, hi: rng.uniform(lo, hi, size=(M, T, E, B))  # noqa: E731
    join, rejoin, churn, up, down = u(0.005, 0.03), u(0.01, 0.04), u(0.02, 0.08), u(0.005, 0.02), u(0.005, 0.02)
    P[:, :, 0, :, :, 2], P[:, :, 0, :, :, 3] = 0.7 * join, 0.3 * join
    P[:, :, 0, :, :, 0] = 1 - join
    P[:, :, 1, :, :, 2], P[:, :, 1, :, :, 3], P[:, :, 1, :, :, 4] = 0.6 * rejoin, 0.3 * rejoin, 0.1 * rejoin
    P[:, :, 1, :, :, 1] = 1 - rejoin
    P[:, :, 2, :, :, 1], P[:, :, 2, :, :, 3] = churn, up
    P[:, :, 2, :, :, 2] = 1 - churn - up
    P[:, :, 3, :, :, 1], P[:, :, 3, :, :, 2], P[:, :, 3, :, :, 4] = churn, down, up
    P[:, :, 3, :, :, 3] = 1 - churn - down - up
    P[:, :, 4, :, :, 1], P[:, :, 4, :, :, 3] = churn, down
    P[:, :, 4, :, :, 4] = 1 - churn - down
    Eng = np.zeros((S, E, E))
    for s in range(S):
        for i in range(E):
            if s < 2:
                Eng[s, i, max(i - 1, 0)] = 1.0
            else:
                stay = rng.uniform(0.6, 0.8)
                Eng[s, i, i] += stay
                Eng[s, i, min(i + 1, E - 1)] += (1 - stay) / 2
                Eng[s, i, max(i - 1, 0)] += (1 - stay) / 2
    Band = np.array([[0.95, 0.05], [0.05, 0.95]])
    return {"status": P, "engagement": Eng, "band": Band}


def compile_tiny(seed: int = 0, draws: int = 0, name: str = MODEL):
    from stateworth.rules import compile_model, parse_spec

    t = tables(seed)
    d = {}
    if draws:
        other = tables(seed + 1000)
        a = np.random.default_rng(seed + 7).uniform(0.0, 0.4, size=draws)
        d = {"status": np.stack([(1 - x) * t["status"] + x * other["status"] for x in a])}
    return compile_model(parse_spec(spec_dict(name), source="tests:tiny"), t, draws=d, source="tests:tiny")


def write_artifact(model_dir: Path, artifact: str, seed: int = 0, draws: int = 0, name: str = MODEL) -> str:
    """Compile and save a tiny model as ``model_dir/artifact``; returns its version."""
    from stateworth.rules import save_model

    m = compile_tiny(seed, draws, name)
    save_model(m, Path(model_dir) / artifact)
    return m.version


class ServerProcess(Harness):
    """The demo's harness with the tests' settings: JAX on the CPU, run from the repository
    root, three minutes to start."""

    def __init__(self, model_dir: Path, *args: str, env: dict | None = None, wait: str = "serving") -> None:
        super().__init__(model_dir, *args, env={"JAX_PLATFORMS": "cpu", **(env or {})}, wait=wait, cwd=ROOT,
                         timeout=180.0)


def scrape(port: int) -> dict[tuple[str, frozenset], float]:
    """The samples at http://127.0.0.1:PORT/metrics as read by prometheus_client's own parser
    (so the exposition is valid text format too): (name, frozenset of label pairs) -> value."""
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=10) as r:
        text = r.read().decode()
    return {(s.name, frozenset(s.labels.items())): s.value
            for family in text_string_to_metric_families(text) for s in family.samples}


def sample(samples: dict[tuple[str, frozenset], float], name: str, **labels: str) -> float | None:
    """One sample's value from :func:`scrape` (None when absent)."""
    return samples.get((name, frozenset(labels.items())))
