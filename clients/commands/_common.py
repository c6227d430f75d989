"""Helpers shared by the query commands (value, compare, change, marginal, readout, report).

Not a command itself (the leading underscore keeps the dispatcher from listing it). States are
given on the command line as ``axis=level`` pairs; cohorts and table cells as ``axis=level,level``
selections. Cohort weights are the model's long-run state mix restricted to the selection (or
uniform over the selected states): a way to say "the members on solo in harbor, in the mix they
are found in", without a panel at hand.
"""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any, Mapping, Sequence

from stateworth.errors import QueryError

from stateworth.caution import CAUTION_LINE  # noqa: F401  (re-exported for the commands)


def parse_pairs(pairs: Sequence[str], what: str = "state") -> dict[str, str]:
    """``["market=harbor", "tenure=3"] -> {"market": "harbor", "tenure": "3"}``.

    A bad pair raises QueryError naming it and the expected form."""
    out: dict[str, str] = {}
    for p in pairs:
        if "=" not in p or p.startswith("=") or p.endswith("="):
            raise QueryError(f"'{p}' is not of the form AXIS=LEVEL (e.g. status=prospect)", field=what)
        k, v = p.split("=", 1)
        k, v = k.strip(), v.strip()
        if k in out and out[k] != v:
            raise QueryError(f"axis '{k}' is given twice ({out[k]} and {v})", field=what)
        out[k] = v
    return out


def parse_selection(items: Sequence[str] | None, what: str = "cohort") -> dict[str, list[str]]:
    """``["status=solo,duo", "market=harbor"] -> {"status": ["solo", "duo"], "market": ["harbor"]}``."""
    out: dict[str, list[str]] = {}
    for item in items or []:
        for part in item.split(";"):
            part = part.strip()
            if not part:
                continue
            if "=" not in part or part.endswith("="):
                raise QueryError(f"'{part}' is not of the form AXIS=LEVEL[,LEVEL...] (e.g. status=solo,duo)",
                                 field=what)
            k, v = part.split("=", 1)
            levels = [x.strip() for x in v.split(",") if x.strip()]
            out.setdefault(k.strip(), []).extend(levels)
    return out


def note(message: str) -> None:
    """A one-line note on stderr (what the command did about stored values, caches, ...)."""
    print(f"note: {message}", file=sys.stderr)


def load_valuer(path: str, *, draws: bool = True, quiet: bool = False):
    """A :class:`~stateworth.valuation.Valuer` for a compiled model directory (its stored values,
    solved and stored first when there are none or they do not match the model) or for a spec with
    written tables (solved now: every stream, every posterior draw, the long-run mix)."""
    from pathlib import Path

    from stateworth.clients.commands.solve import load_any
    from stateworth.valuation import Valuer

    p = Path(path)
    if p.is_dir():
        from stateworth.rules import load_model
        from stateworth.rules.artifact import model_files
        from stateworth.valuation import stored

        p = model_files(p)  # the current version's own folder: model and values from one version

        model = load_model(p)[0]
        if not quiet and sys.stderr.isatty() and not stored.exists(p):
            print(f"solving {model.name} ({model.n_states:,} states, {len(model.streams)} streams"
                  f"{', with posterior draws' if model.draws else ''}; stored with the model for next time) ...",
                  file=sys.stderr)
        return Valuer.open(p, model, note=note)
    model = load_any(path)
    if not quiet and sys.stderr.isatty():
        print(f"solving {model.name} ({model.n_states:,} states, {len(model.streams)} streams"
              f"{', with posterior draws' if model.draws and draws else ''}) ...", file=sys.stderr)
    return Valuer.build(model, draws=draws)


def selection_mask(valuer, selection: Mapping[str, Sequence[str]], what: str = "cohort"):
    """Boolean ``(n,)`` mask of the states whose level on each named axis is one of the given
    levels. QueryError names an unknown axis or level."""
    import numpy as np

    grid = valuer.model.grid
    codes = grid.codes()
    mask = np.ones(grid.size, dtype=bool)
    for axis, levels in selection.items():
        if axis not in grid.names:
            raise QueryError(f"unknown axis '{axis}' in --{what}; axes are {', '.join(grid.names)}", field=what)
        idx = [grid.level_index(axis, lv) for lv in levels]
        mask &= np.isin(codes[grid.position(axis)], idx)
    return mask


def cohort_weights(valuer, selection: Mapping[str, Sequence[str]], basis: str = "long-run",
                   what: str = "cohort"):
    """Cohort weights ``(n,)`` summing to 1: the long-run state mix (``valuer.stationary()``)
    restricted to the selection, or ``basis="uniform"``: equal weight on each selected state the
    chain can reach.
    QueryError when the selection holds no weight (e.g. a plan not sold where selected)."""
    import numpy as np

    mask = selection_mask(valuer, selection, what)
    if basis == "uniform":
        # states no customer can be in carry no weight
        reach = valuer.solved.reachable
        w = (mask if reach is None else mask & reach).astype(np.float64)
    elif basis == "long-run":
        pi = np.asarray(valuer.stationary(), dtype=np.float64)
        # the long-run solve leaves round-off (~1e-17) on unreachable states: that is no weight
        pi = np.where(pi > 1e-12 * float(pi.max()), pi, 0.0)
        w = np.where(mask, pi, 0.0)
    else:
        raise QueryError(f"unknown weight basis '{basis}'; use long-run or uniform", field="basis")
    total = float(w.sum())
    if not total > 0.0:
        sel = " ".join(f"{k}={','.join(v)}" for k, v in selection.items()) or "(everything)"
        raise QueryError(f"the selection {sel} holds no {'states' if basis == 'uniform' else 'long-run weight'}; "
                         "widen it (a plan not sold in a market, or a state never reached, has none)", field=what)
    return w / total


def cohort_mix(valuer, weights) -> str:
    """What population cohort weights describe, by status level: ``"solo 66%, duo 24%, ..."``
    (levels with no weight left out), so a reader knows who J is about."""
    import numpy as np

    model = valuer.model
    st = model.spec.status_axis
    codes = model.grid.codes()[model.grid.position(st)]
    parts = []
    for i, lv in enumerate(model.grid.axis(st).levels):
        share = float(np.sum(np.where(codes == i, weights, 0.0)))
        if share > 0.0005:
            parts.append(f"{lv} {share:.0%}")
    missing = [lv for i, lv in enumerate(model.grid.axis(st).levels)
               if float(np.sum(np.where(codes == i, weights, 0.0))) <= 0.0005]
    return ", ".join(parts) + (f" (no {', '.join(missing)})" if missing else "")


def add_model_argument(p: argparse.ArgumentParser) -> None:
    p.add_argument("model", help="a compiled model directory (from `stateworth fit` or `solve --save`) "
                                 "or a spec (.toml) with written tables")


def add_stream_arguments(p: argparse.ArgumentParser, horizon: bool = True) -> None:
    p.add_argument("--stream", default=None,
                   help="reward stream to value (default: the spec's first stream; member_months counts "
                        "discounted member periods)")
    if horizon:
        p.add_argument("--horizon", type=int, default=None,
                       help="value of the next H periods only (default: the infinite horizon)")
    p.add_argument("--level", type=float, default=0.9,
                   help="interval level when the model carries posterior draws (default 0.9)")
    p.add_argument("--json", action="store_true", help="print the answer as JSON (for scripts)")


def add_cohort_arguments(p: argparse.ArgumentParser, required: bool = False) -> None:
    p.add_argument("--cohort", action="append", metavar="AXIS=LEVEL[,LEVEL]", required=required,
                   help="select the cohort's states (repeatable; e.g. --cohort status=solo,duo "
                        "--cohort market=harbor); default: every state")
    p.add_argument("--basis", choices=["long-run", "uniform"], default="long-run",
                   help="weights within the cohort: the model's long-run state mix (default) or uniform")


def default_stream(valuer, stream: str | None) -> str:
    if stream is None:
        return valuer.streams[0]
    if stream not in valuer.streams:
        raise QueryError(f"unknown reward stream '{stream}'; streams are {', '.join(valuer.streams)}",
                         field="stream")
    return stream


def check_level(level: float) -> float:
    if not (0.0 < level < 1.0):
        raise QueryError(f"--level must lie strictly between 0 and 1, e.g. 0.9 (got {level})", field="level")
    return level


def describe_state(coords: Mapping[str, Any]) -> str:
    return " ".join(f"{k}={v}" for k, v in coords.items())


def print_json(doc: Any) -> None:
    print(json.dumps(doc, indent=2, sort_keys=False, default=float))


def header(valuer, stream: str, horizon: int | None = None) -> str:
    hz = f", next {horizon} {valuer.model.spec.model.period}s" if horizon else ""
    return (f"model {valuer.model.name} version {valuer.version}, stream {stream} "
            f"({valuer.unit(stream)}{hz})")
