"""``stateworth query ACTION ...``: ask a running stateworth server (uses the Python client)."""

from __future__ import annotations

import argparse
import sys

NAME = "query"
HELP = "ask a running `stateworth serve` for values, contrasts, changes, marginal values, read-outs"
DESCRIPTION = """Ask a running stateworth server (see `stateworth serve`) over gRPC.

Actions: models, describe, value, contrast, cohort, change, marginal, readout, health, and the
admin calls load and reload. States are AXIS=LEVEL pairs; cohorts are selections
AXIS=LEVEL[,LEVEL...] (every state matching them, equal weights). --json prints the response.

Answers are model-based estimates under the model's causal assumptions (moves unconfounded
given the state); not accounting figures; the discount rate and policy are finance's call.

examples:
  stateworth query models
  stateworth query value fitness-demo market=harbor tenure=0 month=jan status=prospect engagement=none
  stateworth query contrast fitness-demo market=harbor tenure=0 month=jan status=prospect \\
      engagement=none --acquisition solo --level 0.9
  stateworth query marginal fitness-demo --cohort status=solo,duo --top 10
  stateworth query --admin-token-file admin.token reload
"""


def _state_args(p: argparse.ArgumentParser) -> None:
    p.add_argument("model", help="model name (models/NAME or NAME)")
    p.add_argument("state", nargs="*", metavar="AXIS=LEVEL", help="the state: one level per axis")


def _common(p: argparse.ArgumentParser, horizon: bool = True, interval: bool = True) -> None:
    p.add_argument("--version", default="", help="pin a model version (default: the server's default)")
    p.add_argument("--stream", default="", help="reward stream (default revenue)")
    if horizon:
        p.add_argument("--horizon", type=int, help="finite horizon in periods (default infinite)")
    if interval:
        p.add_argument("--level", dest="interval", type=float,
                       help="interval level: coverage of a percentile interval, e.g. 0.9 (as in `compare`, `value`)")


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--target", default="127.0.0.1:50051",
                   help="server address HOST:PORT; several comma-separated replicas are balanced round-robin")
    p.add_argument("--token-file", help="file holding the query bearer token")
    p.add_argument("--admin-token-file", help="file holding the admin bearer token (load, reload)")
    p.add_argument("--tls-ca", help="PEM CA certificate that signed the server's certificate (turns TLS on)")
    p.add_argument("--server-name", help="name to check the server certificate against")
    p.add_argument("--timeout", type=float, default=30.0, help="deadline in seconds (default 30)")
    p.add_argument("--json", action="store_true", help="print the response as JSON")
    sub = p.add_subparsers(dest="action", metavar="ACTION", required=True)
    sub.add_parser("models", help="list models and versions")
    d = sub.add_parser("describe", help="describe a model version")
    d.add_argument("model")
    d.add_argument("--version", default="")
    v = sub.add_parser("value", help="value of one state")
    _state_args(v)
    _common(v)
    c = sub.add_parser("contrast", help="value of a move from a state")
    _state_args(c)
    _common(c)
    g = c.add_mutually_exclusive_group(required=True)
    g.add_argument("--acquisition", metavar="PLAN", help="a non-member joins PLAN")
    g.add_argument("--plan-change", metavar="PLAN", help="a member moves to PLAN")
    g.add_argument("--win-back", metavar="PLAN", help="a former member rejoins on PLAN")
    g.add_argument("--engagement", metavar="AXIS=LEVEL", help="a chance axis moves to LEVEL")
    g.add_argument("--after", metavar="AXIS=LEVEL", nargs="+",
                   help="general move: the levels that differ after it (as in `compare ... states --after`)")
    co = sub.add_parser("cohort", help="cohort-weighted contrast")
    co.add_argument("model")
    co.add_argument("--cohort", action="append", required=True, metavar="AXIS=LEVEL[,LEVEL]")
    co.add_argument("--after", nargs="+", required=True, metavar="AXIS=LEVEL", help="levels after the move")
    _common(co)
    ch = sub.add_parser("change", help="exact effect of changing one transition factor")
    ch.add_argument("model")
    ch.add_argument("--axis", required=True, help="random axis whose factor changes (e.g. status)")
    ch.add_argument("--to", dest="to_level", required=True,
                    help="next level whose probability moves (e.g. lapsed; as in `change --to`)")
    ch.add_argument("--delta", type=float, required=True, help="change in probability (-0.01 is -1 point)")
    ch.add_argument("--when", action="append", metavar="AXIS=LEVEL[,LEVEL]", help="cells changed (default all)")
    ch.add_argument("--cohort", action="append", metavar="AXIS=LEVEL[,LEVEL]", help="cohort for the weighted figure")
    _common(ch, horizon=False)
    m = sub.add_parser("marginal", help="ranked marginal values of transition factor entries")
    m.add_argument("model")
    m.add_argument("--cohort", action="append", required=True, metavar="AXIS=LEVEL[,LEVEL]")
    m.add_argument("--top", type=int, default=20)
    _common(m, horizon=False, interval=False)
    r = sub.add_parser("readout", help="experiment read-out between two versions")
    r.add_argument("model")
    r.add_argument("control_version")
    r.add_argument("treatment_version")
    r.add_argument("--cohort", action="append", required=True, metavar="AXIS=LEVEL[,LEVEL]")
    r.add_argument("--stream", default="")
    r.add_argument("--level", dest="interval", type=float, help="interval level, e.g. 0.9")
    r.add_argument("--seed", type=int, default=0)
    sub.add_parser("health", help="grpc.health.v1 status of the server")
    lo = sub.add_parser("load", help="(admin) load or reload one artifact directory of the model directory")
    lo.add_argument("artifact")
    sub.add_parser("reload", help="(admin) rescan the whole model directory")


def selection_columns(described, selection: dict[str, list[str]]):
    """Every state matching a selection (axis -> levels; other axes: all levels) as code columns."""
    import numpy as np

    from stateworth.errors import QueryError

    axes = {a.name: list(a.levels) for a in described.axes}
    for k, levels in selection.items():
        if k not in axes:
            raise QueryError(f"unknown axis '{k}' in the cohort; axes are {', '.join(axes)}", field="cohort")
        for lv in levels:
            if lv not in axes[k]:
                raise QueryError(f"'{lv}' is not a level of {k}; levels are {', '.join(axes[k])}", field="cohort")
    codes = [np.array([axes[a].index(x) for x in selection[a]]) if a in selection else np.arange(len(axes[a]))
             for a in axes]
    grids = np.meshgrid(*codes, indexing="ij")
    return {a: g.reshape(-1).astype(np.int64) for a, g in zip(axes, grids)}


def read_secret(path: str | None, what: str) -> str | None:
    """A token file's first line; QueryError naming the file when unreadable or empty."""
    from pathlib import Path

    from stateworth.errors import QueryError

    if not path:
        return None
    try:
        text = Path(path).read_text().strip()
    except OSError as e:
        raise QueryError(f"cannot read the {what} file ({e.strerror})", where=path) from None
    if not text:
        raise QueryError(f"the {what} file is empty; put the token on its first line", where=path)
    return text


def _print(resp, as_json: bool, text: str) -> None:
    if as_json:
        import json

        from google.protobuf.json_format import MessageToDict
        print(json.dumps(MessageToDict(resp, preserving_proto_field_name=True), indent=2))
    else:
        print(text)


def _fig(f) -> str:
    s = f"{f.value:,.2f} {f.unit}"
    if f.HasField("interval"):
        s += f" ({f.interval.level:.0%} interval {f.interval.lower:,.2f} to {f.interval.upper:,.2f})"
    return s


def run(args: argparse.Namespace) -> int:
    from stateworth.clients.client import Client
    from stateworth.clients.commands._common import CAUTION_LINE, parse_pairs, parse_selection
    from stateworth.v1 import admin_service_pb2 as apb

    targets = [t.strip() for t in args.target.split(",") if t.strip()]
    client = Client(targets if len(targets) > 1 else targets[0], token=read_secret(args.token_file, "token"),
                    admin_token=read_secret(args.admin_token_file, "admin token"), tls_ca=args.tls_ca,
                    server_name=args.server_name, timeout=args.timeout, solve_timeout=max(args.timeout, 120.0))
    a = args.action
    with client:
        if a == "models":
            r = client.list_models()
            lines = [f"{m.name}  default {m.default_version}"
                     + (f" ({m.default_reason})" if m.default_reason else "") + "  versions "
                     + ", ".join(f"{v.version} ({v.artifact}, {v.state_count:,} states)" for v in m.versions)
                     for m in r.models] or ["no models loaded"]
            _print(r, args.json, "\n".join(lines))
        elif a == "describe":
            r = client.get_model(args.model, args.version)
            text = (f"{r.name} version {r.version} ({r.artifact}): {r.state_count:,} states, currency {r.currency}, "
                    f"beta {r.discounting.beta:.6f} per {r.discounting.period}\n"
                    + "\n".join(f"  {ax.name} ({ax.kind}): {', '.join(ax.levels)}" for ax in r.axes)
                    + f"\n  streams: {', '.join(s.name for s in r.reward_streams)}; solved by "
                      f"{r.solve_statistics.method}, residual {r.solve_statistics.residual:.2g}, "
                      f"{r.solve_statistics.draw_count} draws")
            _print(r, args.json, text)
        elif a == "value":
            r = client.value(args.model, parse_pairs(args.state), stream=args.stream, horizon=args.horizon,
                             interval=args.interval, version=args.version)
            _print(r, args.json, f"{_fig(r.value)}  [{r.name} {r.version}, {r.stream}]\n{CAUTION_LINE}")
        elif a == "contrast":
            st = parse_pairs(args.state)
            kw = dict(stream=args.stream, horizon=args.horizon, interval=args.interval, version=args.version)
            if args.acquisition:
                r = client.acquisition(args.model, st, args.acquisition, **kw)
            elif args.plan_change:
                r = client.plan_change(args.model, st, args.plan_change, **kw)
            elif args.win_back:
                r = client.win_back(args.model, st, args.win_back, **kw)
            elif args.engagement:
                (ax, lv), = parse_pairs([args.engagement], "engagement").items()
                r = client.engagement_change(args.model, st, ax, lv, **kw)
            else:
                r = client.contrast(args.model, st, {**st, **parse_pairs(args.after, "after")}, **kw)
            _print(r, args.json, f"{r.kind}: {_fig(r.value)}  [{r.name} {r.version}, {r.stream}]\n{CAUTION_LINE}")
        elif a in ("cohort", "change", "marginal", "readout"):
            version = getattr(args, "version", "") or getattr(args, "control_version", "")
            described = client.get_model(args.model, version)
            cols = selection_columns(described, parse_selection(args.cohort)) if args.cohort else None
            if a == "cohort":
                r = client.cohort_contrast(args.model, cols, parse_pairs(args.after, "after"), stream=args.stream,
                                           horizon=args.horizon, interval=args.interval, version=args.version)
                _print(r, args.json, f"cohort contrast: {_fig(r.value)}  [{r.name} {r.version}]\n{CAUTION_LINE}")
            elif a == "change":
                when = {k: v for k, v in parse_selection(args.when, "when").items()}
                r = client.transition_change(args.model, args.axis, args.to_level, args.delta, when=when,
                                             cohort_columns=cols, stream=args.stream, interval=args.interval,
                                             version=args.version)
                head = _fig(r.weighted_delta) if r.HasField("weighted_delta") else "no cohort given"
                _print(r, args.json, f"transition change: weighted {head}; largest change at one state "
                                     f"{r.max_abs_delta:,.2f} {r.unit}  [{r.name} {r.version} -> "
                                     f"{r.changed_version}]\n{CAUTION_LINE}")
            elif a == "marginal":
                r = client.marginal_values(args.model, cols, top=args.top, stream=args.stream, version=args.version)
                lines = [f"cohort value {_fig(r.objective)}  [{r.name} {r.version}]; value of +1 point:"]
                for e in r.entries:
                    cell = ", ".join(f"{k}={v}" for k, v in sorted(e.cell.items()))
                    lines.append(f"  {e.rank:3d}. P({e.axis}'={e.to} | {cell}) = {e.probability:.4f}: "
                                 f"{e.per_point:+,.4f} {r.objective.unit}")
                _print(r, args.json, "\n".join(lines + [CAUTION_LINE]))
            else:
                r = client.readout(args.model, args.control_version, args.treatment_version, cols,
                                   stream=args.stream, interval=args.interval, seed=args.seed)
                _print(r, args.json, f"treatment - control: {_fig(r.difference)}  (control {_fig(r.control)}, "
                                     f"treatment {_fig(r.treatment)})  [{r.name} {r.control_version} vs "
                                     f"{r.treatment_version}]\n{CAUTION_LINE}")
        elif a == "health":
            s = client.health()
            print(s)
            return 0 if s == "SERVING" else 1
        elif a == "load":
            r = client.load_model(args.artifact)
            _print(r, args.json, f"loaded {r.model.name} version {r.model.version} from {r.model.artifact}"
                                 + (" (replaced the previous version)" if r.replaced else ""))
        elif a == "reload":
            r = client.reload_models()
            lines = [f"reloaded: {r.loaded_count} loaded, {r.kept_count} kept, {r.failed_count} failed, "
                     f"{r.dropped_count} dropped; serving " + ", ".join(f"{m.name}@{m.version}" for m in r.models)]
            for o in r.outcomes:
                result = apb.ReloadResult.Name(o.result).removeprefix("RELOAD_RESULT_").lower()
                lines.append(f"  {o.artifact}: {result}" + (f" {o.name}@{o.version}" if o.version else "")
                             + (f" ({o.error})" if o.error else ""))
            _print(r, args.json, "\n".join(lines))
            if r.failed_count:
                print(f"error: {r.failed_count} model folder(s) could not be loaded; each keeps serving the version "
                      "it had (if any)", file=sys.stderr)
                sys.stdout.flush()
                return 1
    sys.stdout.flush()
    return 0
