"""``stateworth solve SPEC_OR_MODEL``: solve every reward stream (and posterior draw) and keep it."""

from __future__ import annotations

import argparse

NAME = "solve"
HELP = "solve the Bellman equation for every stream and posterior draw; store the values with the model"
DESCRIPTION = """Solve (I - beta P) V = r for every reward stream of a compiled model directory
(or a spec with written tables), every posterior draw the model carries, and the long-run state
mix, and store them with the model (MODEL_DIR/solutions/): every later query, report and server
reads them instead of solving again. A model whose values are already stored is not solved
again unless --force is given. Prints the solve statistics and the value of each status level
averaged over the states the chain can reach.

Small and medium grids are solved by a sparse LU of I - beta P per fixed block (no compile);
larger ones by preconditioned GMRES on the structured operator (JAX; its compiled code is kept
in a per-user cache, see README "Solving").

example:
  stateworth solve demo-out/models/fitted
  stateworth solve demo-out/models/fitted --force --json
  stateworth solve examples/fitness.toml --save out/model
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("model", help="a compiled model directory, or a spec (.toml) with written tables")
    p.add_argument("--force", action="store_true", help="solve again even when values are stored")
    p.add_argument("--method", default="auto",
                   help="auto (default: sparse LU for small grids, else gmres), sparse, gmres, dense, value_iteration")
    p.add_argument("--tol", type=float, default=1e-10, help="max-norm relative residual to reach (default 1e-10)")
    p.add_argument("--horizon", type=int, default=None,
                   help="value of the next H periods only (solved and printed, not stored)")
    p.add_argument("--devices", type=int, default=None, help="number of local devices to shard the solve over")
    p.add_argument("--save", help="write the compiled model (and its stored values) to this directory")
    p.add_argument("--json", action="store_true", help="print JSON")


def load_any(path: str):
    """A compiled model from a spec file or an artifact directory."""
    from pathlib import Path

    from stateworth.rules import compile_model, load_model, load_spec

    p = Path(path)
    if p.is_dir():
        return load_model(p)[0]
    return compile_model(load_spec(p), source=str(p))


def _iterations(stats: dict) -> str:
    """``"19 iterations per stream (38 in all)"`` for an iterative solve, ``"direct"`` for an LU."""
    total, most = stats.get("iterations"), stats.get("iterations_per_column")
    if stats.get("method") in ("sparse", "dense"):
        return "direct"
    if most is not None and total is not None and most != total:
        return f"{most} iterations per stream at most ({total} in all)"
    return f"{total} iterations"


def _by_status(model, values, reachable):
    import numpy as np

    st = model.spec.status_axis
    codes = model.grid.codes()[model.grid.position(st)]
    levels = model.grid.axis(st).levels
    keep = np.ones(model.n_states, dtype=bool) if reachable is None else reachable
    out = {}
    for j, s in enumerate(values["streams"]):
        v = values["values"][:, j]
        out[s] = {lv: (float(np.mean(v[(codes == i) & keep])) if np.any((codes == i) & keep) else None)
                  for i, lv in enumerate(levels)}
    return out


def run(args: argparse.Namespace) -> int:
    import json
    from pathlib import Path

    from stateworth import config
    from stateworth.caution import CAUTION_LINE
    from stateworth.clients.commands._common import note
    from stateworth.errors import QueryError
    from stateworth.valuation import stored
    from stateworth.valuation.solved import Settings, solve_model

    if not args.tol > 0:
        raise QueryError(f"--tol must be a positive number (got {args.tol})", field="--tol")
    model = load_any(args.model)
    is_dir = Path(args.model).is_dir()
    if args.horizon is not None:
        return _horizon(model, args)
    settings = Settings(tol=args.tol)
    solved = None
    if is_dir and not args.force:
        try:
            solved = stored.load(args.model, model, settings)
        except FileNotFoundError:
            pass
        except stored.StoredValuesError as e:
            note(f"stored values not used: {e}; solving again")
    if solved is None:
        solved = solve_model(model, settings=settings, method=args.method, devices=args.devices)
        if not args.save and is_dir:
            try:
                stored.save(args.model, solved)
            except OSError as e:
                note(f"could not store the solved values in {args.model} ({e.strerror or e}); queries will "
                     "solve again")
    if args.save:
        from stateworth.rules import save_model

        # the values go into the new version before it is published
        save_model(model, args.save, before_publish=lambda d: stored.save(d, solved))
    point = solved.stats.get("point") or {}
    table = _by_status(model, {"streams": solved.streams, "values": solved.values}, solved.reachable)
    cache = config.compile_cache_note()
    out = {"model": model.name, "version": model.version, "states": model.n_states, "beta": model.beta,
           "currency": model.currency, "source": solved.source, "solve": point,
           "draws": solved.stats.get("draws"), "long_run": solved.stats.get("longrun"),
           "reachable_states": None if solved.reachable is None else int(solved.reachable.sum()),
           "mean_value_by_status": table, "compile_cache": cache}
    if args.json:
        print(json.dumps(out, indent=2, default=float))
        return 0
    period = model.spec.model.period
    print(f"model {model.name} version {model.version}: {model.n_states:,} states, beta {model.beta:.6f} a {period}")
    if solved.source != "solved":
        print(f"values {solved.source} (use --force to solve again)")
    print(f"solver {point.get('method')}: {point.get('status')}, {_iterations(point)}, "
          f"{point.get('operator_applies')} operator applies, residual {float(point.get('residual') or 0):.2e}, "
          f"{float(point.get('seconds') or 0):.2f} s")
    d = solved.stats.get("draws")
    if d:
        print(f"posterior draws: {d.get('draws')} by {d.get('method')}, {float(d.get('seconds') or 0):.2f} s")
    if cache and cache.startswith("compile cache off"):
        print(cache)
    levels = model.grid.axis(model.spec.status_axis).levels
    w = max(max(len(lv) for lv in levels), 10)
    reach = solved.reachable
    what = (f"the {int(reach.sum()):,} states the chain can reach" if reach is not None else "every state")
    print(f"mean value by status (averaged over {what}; blank: no reachable state):")
    print(f"  {'stream':<14} " + " ".join(f"{lv:>{w}}" for lv in levels) + "  unit")
    for s in solved.streams:
        cells = [f"{table[s][lv]:>{w},.2f}" if table[s][lv] is not None else " " * w for lv in levels]
        print(f"  {s:<14} " + " ".join(cells) + f"  {model.unit(s)}")
    if args.save:
        print(f"saved compiled model to {args.save}")
    elif is_dir and solved.source == "solved":
        print(f"stored the values with the model ({args.model}/solutions)")
    print(CAUTION_LINE)
    return 0


def _horizon(model, args) -> int:
    import json

    from stateworth.caution import CAUTION_LINE
    from stateworth.solver import solve

    kw = {} if args.devices is None else {"devices": args.devices}
    sol = solve(model, method=args.method, tol=args.tol, horizon=args.horizon, **kw)
    table = _by_status(model, {"streams": sol.streams, "values": sol.values}, None)
    if args.json:
        print(json.dumps({"model": model.name, "version": model.version, "horizon": args.horizon,
                          "solve": sol.stats(), "mean_value_by_status": table}, indent=2, default=float))
        return 0
    print(f"model {model.name} version {model.version}: value of the next {args.horizon} "
          f"{model.spec.model.period}s (not stored)")
    for s in sol.streams:
        print(f"  {s}: " + ", ".join(f"{lv} {v:,.2f}" for lv, v in table[s].items()) + f" {model.unit(s)}")
    print(CAUTION_LINE)
    return 0
