"""The plain scipy script a user would write instead of ``stateworth solve``: the reference of
bench/cold_bench.py, run as a fresh process and timed whole (interpreter start, imports, loading
the model, building the explicit matrix, solving, printing one value).

    python bench/scipy_script.py MODEL_DIR [--solver spsolve|bicgstab]

Loads the model with the project's API (``stateworth.rules.load_model``: no JAX), builds
``A = I - beta P`` from the explicit matrix (``model.csr()``), and solves ``A V = r`` for the
model's first reward stream:

* ``spsolve``: scipy's direct sparse solve (SuperLU);
* ``bicgstab``: scipy's BiCGStab with ``rtol`` 1e-9 on the 2-norm, then the check a careful user
  adds: the max-norm relative residual ``||A V - r||_inf / ||r||_inf`` must be at most 1e-8, else
  the solve is repeated from its answer with a ten times tighter ``rtol`` (at most three times;
  not after a breakdown, whose answer is NaN).

Prints the value of state 0, then one JSON line for the benchmark: the solve alone in seconds
(``solve_s``), the explicit matrix's build time, its non-zeros, the residual reached (null after
a breakdown) and whether it is at most 1e-8 (``reached``).
"""

from __future__ import annotations

import argparse
import json
import time

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as sla

from stateworth.rules import load_model

TOL = 1e-8


def max_rel_residual(A, v: np.ndarray, r: np.ndarray) -> float:
    return float(np.max(np.abs(A @ v - r)) / np.max(np.abs(r)))


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("model_dir")
    ap.add_argument("--solver", default="spsolve", choices=["spsolve", "bicgstab"])
    args = ap.parse_args()

    model, _ = load_model(args.model_dir)
    t0 = time.perf_counter()
    P = model.csr()
    A = (sp.identity(P.shape[0], format="csr") - model.beta * P).tocsr()
    build_s = time.perf_counter() - t0
    r = model.rewards[model.streams[0]]
    t0 = time.perf_counter()
    rounds = 0
    if args.solver == "spsolve":
        v = sla.spsolve(A.tocsc(), r)
    else:
        v, rtol = None, TOL / 10
        while True:
            v, _ = sla.bicgstab(A, r, x0=v, rtol=rtol, maxiter=20000)
            rounds += 1
            res = max_rel_residual(A, v, r)
            # BiCGStab may break down (NaN) on the slowest chains: then it has no answer to refine
            if res <= TOL or not np.isfinite(res) or rounds >= 4:
                break
            rtol /= 10
    solve_s = time.perf_counter() - t0
    res = max_rel_residual(A, v, r)
    print(f"V(state 0) = {v[0]:.6f} {model.unit(model.streams[0])}")
    finite = bool(np.isfinite(res))
    print(json.dumps({"solver": f"scipy_{args.solver}", "states": int(P.shape[0]), "nnz": int(P.nnz),
                      "build_s": build_s, "solve_s": solve_s, "rel_residual": res if finite else None,
                      "reached": finite and res <= TOL, "rounds": rounds or None,
                      "value0": float(v[0]) if np.isfinite(v[0]) else None}))


if __name__ == "__main__":
    main()
