"""``stateworth solve SPEC_OR_MODEL``: compile (if a spec) and solve every reward stream."""

from __future__ import annotations

import argparse

NAME = "solve"
HELP = "solve the Bellman equation for every reward stream and print summary values"
DESCRIPTION = """Compile a spec (or load a compiled model directory) and solve
(I - beta P) V = r for every reward stream. Prints the solve statistics and the value of
each status level averaged over the grid; --save writes the compiled model artifact.

example:
  stateworth solve examples/fitness.toml
  stateworth solve examples/fitness.toml --save out/model --json
  stateworth solve demo-out/models/fitted
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("model", help="a spec (.toml) with written tables, or a compiled model directory")
    p.add_argument("--method", default="auto", help="auto (default), dense, gmres, value_iteration")
    p.add_argument("--tol", type=float, default=1e-10, help="max-norm relative residual to reach (default 1e-10)")
    p.add_argument("--horizon", type=int, default=None, help="value of the next H periods only")
    p.add_argument("--devices", type=int, default=None, help="number of local devices to shard the solve over")
    p.add_argument("--save", help="write the compiled model artifact to this directory")
    p.add_argument("--json", action="store_true", help="print JSON")


def load_any(path: str):
    """A compiled model from a spec file or an artifact directory."""
    from pathlib import Path

    from stateworth.rules import compile_model, load_model, load_spec

    p = Path(path)
    if p.is_dir():
        return load_model(p)[0]
    return compile_model(load_spec(p), source=str(p))


def run(args: argparse.Namespace) -> int:
    import json

    import numpy as np

    from stateworth.solver import solve

    model = load_any(args.model)
    kw = {}
    if args.devices is not None:
        kw["devices"] = args.devices
    sol = solve(model, method=args.method, tol=args.tol, horizon=args.horizon, **kw)
    if args.save:
        from stateworth.rules import save_model
        save_model(model, args.save)
    st = model.spec.status_axis
    codes = model.grid.codes()[model.grid.position(st)]
    levels = model.grid.axis(st).levels
    table = {}
    for s in sol.streams:
        v = sol.value(s)
        table[s] = {lv: float(np.mean(v[codes == i])) for i, lv in enumerate(levels)}
    out = {"model": model.name, "version": model.version, "states": model.n_states, "beta": model.beta,
           "currency": model.currency, "solve": sol.stats(), "mean_value_by_status": table}
    if args.json:
        print(json.dumps(out, indent=2))
        return 0
    print(f"model {model.name} version {model.version}: {model.n_states:,} states, beta {model.beta:.6f} a {model.spec.model.period}")
    print(f"solver {sol.method}: {sol.status.name.lower()}, {sol.iterations} iterations, "
          f"{sol.operator_applies} operator applies, residual {sol.residual:.2e}, {sol.seconds:.2f} s")
    w = max(len(lv) for lv in levels)
    print("mean value by status (averaged over the other axes):")
    print(f"  {'stream':<14} " + " ".join(f"{lv:>{max(w, 10)}}" for lv in levels) + "  unit")
    for s in sol.streams:
        print(f"  {s:<14} " + " ".join(f"{table[s][lv]:>{max(w, 10)},.2f}" for lv in levels) + f"  {model.unit(s)}")
    if args.save:
        print(f"saved compiled model to {args.save}")
    from stateworth.caution import CAUTION_LINE
    print(CAUTION_LINE)
    return 0
