"""The solver sharded over forced host devices equals the single-device solve.

JAX reads XLA_FLAGS once at start, so the checks run in a child process with
``--xla_force_host_platform_device_count=4`` set before JAX is imported."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

HERE = Path(__file__).resolve().parent

SCRIPT = textwrap.dedent('''
    import json, os, sys
    os.environ["XLA_FLAGS"] = "--xla_force_host_platform_device_count=4"
    sys.path.insert(0, sys.argv[1])
    import numpy as np
    import jax
    from test_solver import random_model
    from stateworth.errors import QueryError
    from stateworth.solver import solve
    out = {"devices": len(jax.devices())}
    m = random_model(0, markets=6)
    ref = solve(m, "rev", method="gmres", tol=1e-14)
    for d in (2, 3, 4):
        s = solve(m, "rev", method="gmres", tol=1e-14, devices=d)
        out[f"gmres{d}"] = float(np.max(np.abs(s.values - ref.values)) / np.max(np.abs(ref.values)))
        out[f"note{d}"] = s.notes[0]
    tr = solve(m, np.ones(m.n_states), method="gmres", tol=1e-12, transpose=True)
    tr4 = solve(m, np.ones(m.n_states), method="gmres", tol=1e-12, transpose=True, devices=4)
    out["transpose4"] = float(np.max(np.abs(tr.values - tr4.values)) / np.max(np.abs(tr.values)))
    h = solve(m, "rev", horizon=9); h4 = solve(m, "rev", horizon=9, devices=4)
    out["horizon4"] = float(np.max(np.abs(h.values - h4.values)) / np.max(np.abs(h.values)))
    errors = []
    for model, d in ((m, 5), (random_model(1, markets=2), 4)):
        try:
            solve(model, "rev", devices=d)
        except QueryError as e:
            errors.append(str(e))
    out["errors"] = errors
    print(json.dumps(out))
''')


def test_sharded_solve_equals_single_device():
    env = dict(os.environ)
    env.pop("XLA_FLAGS", None)
    res = subprocess.run([sys.executable, "-c", SCRIPT, str(HERE)], capture_output=True, text=True,
                         env=env, timeout=600)
    assert res.returncode == 0, res.stderr[-2000:]
    out = json.loads(res.stdout.strip().splitlines()[-1])
    assert out["devices"] == 4
    for key in ("gmres2", "gmres3", "gmres4", "transpose4", "horizon4"):
        assert out[key] <= 1e-12, (key, out[key])
    assert "3 devices along 'market' (2 levels each)" in out["note3"]
    assert "padded it from 6 to 8 levels" in out["note4"]
    assert any("only 4" in e and "devices" in e for e in out["errors"])
    assert any("too few to shard over 4 devices" in e for e in out["errors"])
