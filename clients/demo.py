"""The end-to-end demo behind ``stateworth demo`` and ``make demo`` (the fitness-class scenario).

Each step prints what it did and how long it took; the figures are the library's (through the
gRPC server where a system would ask it). Outputs, all under the output folder:

* ``models/``: compiled model artifacts the server loads: the fitted model and the two arms of
  the experiment, all versions of one model name (the fitted model is written last, so it is
  the server's default version);
* ``panel/``: the simulated account panels (when the estimation layer is present);
* ``report/report.html``: the analyst's report; ``summary.json``: the figures printed at the end.
"""

from __future__ import annotations

import importlib.util
import json
import shutil
import time
from pathlib import Path
from typing import Any

import numpy as np

from stateworth.clients.commands._common import CAUTION_LINE
from stateworth.clients.harness import ServerProcess
from stateworth.clients.tables import format_table, interval, money

ROOT = Path(__file__).resolve().parents[1]
DEFAULT_SPEC = ROOT / "examples" / "fitness.toml"
#: the experiment: the treatment (say, a class-booking reminder) lifts members from light to
#: regular attendance by this much probability a month
LIFT = 0.03
#: marks a folder as demo output, which a later run may replace
MARKER = ".stateworth-demo"


class Scenario:
    """The states and moves the demo asks about, read off the spec (for the fitness spec: a
    harbor prospect in January; a solo member at tenure 6 in March attending regularly; the
    upgrade solo -> duo; the lift light -> regular attendance)."""

    def __init__(self, spec) -> None:
        grid_axes = {n: spec.axes[n] for n in spec.grid_order}
        fixed = [n for n, a in grid_axes.items() if a.kind == "fixed"]
        self.market_axis = fixed[0] if fixed else None
        self.market = spec.axis_levels(fixed[0])[0] if fixed else None
        self.status = spec.status_axis
        self.plan, self.upgrade = spec.members[0], spec.members[min(1, len(spec.members) - 1)]
        chance = [n for n, a in grid_axes.items() if a.kind == "chance"]
        self.engagement = "engagement" if "engagement" in chance else (chance[0] if chance else None)
        eng = spec.axis_levels(self.engagement) if self.engagement else []
        self.lift_from = eng[1] if len(eng) > 2 else (eng[0] if eng else None)
        self.lift_to = eng[2] if len(eng) > 2 else (eng[-1] if eng else None)
        self.prospect: dict[str, str] = {}
        self.member: dict[str, str] = {}
        for n, a in grid_axes.items():
            lv = spec.axis_levels(n)
            if n == self.status:
                self.prospect[n], self.member[n] = spec.non_members[0], self.plan
            elif a.kind == "fixed":
                self.prospect[n] = self.member[n] = lv[0]
            elif a.kind == "counter":
                self.prospect[n], self.member[n] = lv[0], lv[min(6, len(lv) - 1)]
            elif a.kind == "cycle":
                self.prospect[n], self.member[n] = lv[0], lv[min(2, len(lv) - 1)]
            else:
                self.prospect[n] = lv[0]
                self.member[n] = self.lift_to if n == self.engagement and self.lift_to else lv[-1]

    def lift(self, spec):
        from stateworth.valuation import TransitionChange

        return TransitionChange(axis=self.engagement, to=self.lift_to, delta=LIFT,
                                when={"next." + spec.status_axis: list(spec.members), self.engagement: self.lift_from})


class Step:
    """Prints ``[n/N] what ... done in s`` around a block."""

    def __init__(self, total: int) -> None:
        self.n, self.total, self.t0 = 0, total, time.perf_counter()

    def __call__(self, what: str):
        self.n += 1
        print(f"\n[{self.n}/{self.total}] {what}", flush=True)
        return _Timer()


class _Timer:
    def __enter__(self):
        self.t = time.perf_counter()
        return self

    def __exit__(self, *exc):
        if exc[0] is None:
            print(f"      done in {time.perf_counter() - self.t:.1f} s", flush=True)


def estimation_available() -> bool:
    """True when the estimation layer (simulate and fit) is installed."""
    return all(importlib.util.find_spec(m) is not None for m in
               ("stateworth.estimation.simulate", "stateworth.estimation.fit"))


def _columns(valuer, weights: np.ndarray) -> tuple[dict[str, list[str]], list[float]]:
    """States with positive weight as per-axis level columns (for a Cohort message)."""
    idx = np.flatnonzero(weights > 0)
    grid = valuer.model.grid
    pos = np.unravel_index(idx, grid.shape)
    cols = {ax.name: [ax.levels[int(i)] for i in p] for ax, p in zip(grid.axes, pos)}
    return cols, [float(x) for x in weights[idx]]


def _fig(f) -> tuple[float, list[float] | None]:
    """(value, [lo, hi] or None) of a stateworth.v1 Figure."""
    iv = [f.interval.lower, f.interval.upper] if f.HasField("interval") else None
    return float(f.value), iv


def build_models(spec_path: Path, out: Path, sc: Scenario, accounts: int | None, seed: int,
                 step: Step) -> tuple[Path, Path, Path, str]:
    """The fitted model and the two experiment arms under ``out/models``. Returns their
    directories and a one-line note on where the tables came from."""
    from stateworth.rules import compile_model, load_spec, save_model
    from stateworth.valuation import apply_change

    spec = load_spec(spec_path)
    truth = compile_model(spec, source=str(spec_path))
    models = out / "models"
    models.mkdir(parents=True, exist_ok=True)
    lift = sc.lift(spec)
    treated_truth = truth.with_tables({lift.axis: apply_change(truth, lift)})
    if estimation_available():
        from stateworth.clients.demo_fit import fit_from_panels
        return fit_from_panels(spec_path, truth, treated_truth, out, accounts, seed, step)
    with step("model: the estimation layer is not installed; compiling the spec's ground-truth tables"):
        save_model(treated_truth, models / "experiment-treatment")
        save_model(truth, models / "experiment-control")
        time.sleep(0.01)  # the server's default version is the newest artifact: write it last
        save_model(truth, models / "fitted")
        print(f"      {truth.n_states:,} states; experiment arms: ground truth, and ground truth with "
              f"{lift.describe()} (exact, so no interval)")
    return (models / "fitted", models / "experiment-control", models / "experiment-treatment",
            "tables written in the spec (ground truth; no panel was simulated)")


def run_demo(output: str | Path = "demo-out", spec: str | Path | None = None, accounts: int | None = None,
             seed: int = 7, serve: bool = True) -> int:
    """Run the whole demo; returns the exit status (0). See the module docstring."""
    from stateworth.clients.commands._common import cohort_weights, load_valuer
    from stateworth.clients.report import build_report
    from stateworth.rules import load_spec

    t_start = time.perf_counter()
    spec_path = Path(spec) if spec else DEFAULT_SPEC
    out = Path(output)
    if out.exists():
        if not (out / MARKER).exists() and any(out.iterdir()):
            from stateworth.errors import ArtifactError
            raise ArtifactError("exists, is not empty and is not an earlier demo output; pick another -o",
                                where=str(out))
        shutil.rmtree(out)
    out.mkdir(parents=True)
    (out / MARKER).write_text("written by `stateworth demo`; the next demo run replaces this folder\n")
    step = Step((7 if estimation_available() else 6) - (0 if serve else 1))
    summary: dict[str, Any] = {"spec": str(spec_path)}

    with step(f"check the spec {spec_path}"):
        sp = load_spec(spec_path)
        sc = Scenario(sp)
        print(f"      ok: axes {', '.join(sp.grid_order)}; plans {', '.join(sp.members)}; "
              f"streams {', '.join(sp.stream_names())}")

    model_dir, control_dir, treatment_dir, source = build_models(spec_path, out, sc, accounts, seed, step)
    summary["tables"] = source

    server = None
    if serve:
        # the server loads and solves its models in its own process while this one solves and
        # writes the report: on a small machine the two overlap instead of running in turn
        with step(f"start `stateworth serve {out / 'models'}` on a free loopback port"):
            server = ServerProcess(out / "models", "--log-level", "info", wait="", log_path=out / "server.log")
            print(f"      listening on {server.target}; it loads and solves its models in the background "
                  f"(log: {out / 'server.log'})")
    try:
        with step("solve every reward stream (I - beta P) V = r"):
            valuer = load_valuer(str(model_dir), quiet=True)
            s = valuer.solve_stats
            print(f"      {valuer.model.n_states:,} states, {s['method']}: {s['status']}, {s['iterations']} iterations, "
                  f"residual {s['residual']:.1e}; {valuer.n_draws} posterior draws solved in one batch")
            summary["solve"] = s

        with step("write the report"):
            page = build_report(model_dir, out / "report", valuer=valuer, progress=False)
            print(f"      {page}")
        summary["report"] = str(page)

        streams = list(valuer.streams)
        price_stream = streams[0]
        product_stream = "margin" if "margin" in streams else streams[0]
        members_sel = {sc.status: list(sp.members)}
        plan_sel = {sc.status: [sc.plan]}
        if sc.market_axis:
            plan_sel[sc.market_axis] = [sc.market]
        pi_members = cohort_weights(valuer, members_sel)
        pi_plan = cohort_weights(valuer, plan_sel)
        questions = Questions(sc, valuer, price_stream, product_stream, pi_members, pi_plan)
        if server is not None:
            from stateworth.clients.client import Client

            with step("ask the server what a pricing system, a product team and an experiment read-out ask"):
                t_wait = time.perf_counter()
                server.wait_for("serving")
                waited = time.perf_counter() - t_wait
                print(f"      server serving (waited {waited:.0f} s for it to finish loading)")
                with Client(server.target, timeout=60.0, solve_timeout=300.0) as client:
                    answers = questions.ask_server(client, sp, control_dir, treatment_dir)
        else:
            with step("answer the pricing, product and experiment questions in-process (--no-server)"):
                answers = questions.ask_library(sp, control_dir, treatment_dir)
    finally:
        if server is not None:
            rc = server.stop()
            print(f"      server stopped (exit status {rc})")
    summary["answers"] = answers
    summary["seconds"] = time.perf_counter() - t_start
    (out / "summary.json").write_text(json.dumps(summary, indent=2, default=float))
    questions.explain(answers, page, source, summary["seconds"])
    return 0


def _iv(x) -> list[float] | None:
    return None if x is None else [float(x[0]), float(x[1])]


class Questions:
    """What a pricing system, a product team and an experiment read-out ask, by server or library."""

    def __init__(self, sc: Scenario, valuer, price_stream: str, product_stream: str, pi_members, pi_plan) -> None:
        self.sc, self.valuer = sc, valuer
        self.price, self.product = price_stream, product_stream
        self.pi_members, self.pi_plan = pi_members, pi_plan

    def ask_server(self, client, spec, control_dir: Path, treatment_dir: Path) -> dict[str, Any]:
        from stateworth.rules import read_manifest

        sc, v, name = self.sc, self.valuer, self.valuer.model.name
        pin = {"version": v.version}  # ask the version this run fitted, whatever else the server holds
        cols_m, w_m = _columns(v, self.pi_members)
        cols_p, w_p = _columns(v, self.pi_plan)
        a: dict[str, Any] = {}
        up = client.plan_change(name, sc.member, sc.upgrade, stream=self.price, interval=0.9, **pin)
        a["upgrade_one"] = dict(zip(("value", "interval"), _fig(up.value)))
        upc = client.cohort_contrast(name, cols_p, {sc.status: sc.upgrade}, weights=w_p, stream=self.price,
                                     interval=0.9, **pin)
        a["upgrade_cohort"] = dict(zip(("value", "interval"), _fig(upc.value)))
        acq = client.acquisition(name, sc.prospect, sc.plan, stream=self.price, interval=0.9, **pin)
        a["acquisition"] = dict(zip(("value", "interval"), _fig(acq.value)))
        a["naive"] = v.naive_comparison(sc.prospect, sc.plan, stream=self.price)
        lift = sc.lift(spec)
        ch = client.transition_change(name, lift.axis, lift.to, lift.delta, when=dict(lift.when),
                                      cohort_columns=cols_m, weights=w_m, stream=self.product, interval=0.9,
                                      **pin)
        a["engagement_lift"] = dict(zip(("value", "interval"), _fig(ch.weighted_delta)))
        cv, tv = read_manifest(control_dir)["version"], read_manifest(treatment_dir)["version"]
        ro = client.readout(name, cv, tv, cols_m, weights=w_m, stream=self.product, interval=0.9)
        a["readout"] = {"difference": dict(zip(("value", "interval"), _fig(ro.difference))),
                        "control": dict(zip(("value", "interval"), _fig(ro.control))),
                        "treatment": dict(zip(("value", "interval"), _fig(ro.treatment))),
                        "control_version": cv, "treatment_version": tv}
        self._print(a)
        return a

    def ask_library(self, spec, control_dir: Path, treatment_dir: Path) -> dict[str, Any]:
        from stateworth.clients.commands._common import load_valuer
        from stateworth.valuation import readout

        sc, v = self.sc, self.valuer
        up = v.plan_change(sc.member, sc.upgrade, stream=self.price)
        upc = v.cohort_contrast(self.pi_plan, {sc.status: sc.upgrade}, stream=self.price)
        acq = v.acquisition(sc.prospect, sc.plan, stream=self.price)
        ch = v.transition_change(sc.lift(spec), stream=self.product, weights=self.pi_members)
        ro = readout(load_valuer(str(control_dir), quiet=True), load_valuer(str(treatment_dir), quiet=True),
                     self.pi_members, stream=self.product)
        a = {"upgrade_one": {"value": up.value, "interval": _iv(up.interval)},
             "upgrade_cohort": {"value": upc.value, "interval": _iv(upc.interval)},
             "acquisition": {"value": acq.value, "interval": _iv(acq.interval)},
             "naive": v.naive_comparison(sc.prospect, sc.plan, stream=self.price),
             "engagement_lift": {"value": ch.weighted, "interval": _iv(ch.interval)},
             "readout": {"difference": {"value": ro.value, "interval": _iv(ro.interval)},
                         "control": {"value": ro.control_value, "interval": _iv(ro.control_interval)},
                         "treatment": {"value": ro.treatment_value, "interval": _iv(ro.treatment_interval)}}}
        self._print(a)
        return a

    def _print(self, a: dict[str, Any]) -> None:
        sc, unit = self.sc, self.valuer.model.currency
        print(f"      pricing:    {sc.plan} -> {sc.upgrade} for {_state(sc.member)}: "
              f"{money(a['upgrade_one']['value'])} {unit} ({self.price})")
        print(f"                  and per {sc.plan} member in {sc.market}: {money(a['upgrade_cohort']['value'])} {unit} "
              f"{interval(a['upgrade_cohort']['interval'])}")
        print(f"      product:    +{100 * LIFT:.0f} points {sc.lift_from} -> {sc.lift_to} for members: "
              f"{money(a['engagement_lift']['value'])} {unit} per member ({self.product}) "
              f"{interval(a['engagement_lift']['interval'])}")
        print(f"      experiment: treatment - control: {money(a['readout']['difference']['value'])} {unit} per member "
              f"({self.product}) {interval(a['readout']['difference']['interval'])}")

    def explain(self, a: dict[str, Any], page: Path, source: str, seconds: float) -> None:
        sc, unit = self.sc, self.valuer.model.currency
        nv = a["naive"]
        where = f" in {sc.market}" if sc.market else ""
        rows = [
            [f"acquisition of a prospect{where} onto {sc.plan}", money(a["acquisition"]["value"]),
             interval(a["acquisition"]["interval"]), f"V({sc.plan} member) - V(prospect): what one more join is worth"],
            ['  naive "member value"', money(nv["member_value"]), "",
             f"V({sc.plan} member) alone: ignores that the prospect may join later anyway"],
            ['  naive "one period of price"', money(nv["one_period"]), "",
             "one period's net price: ignores that members stay"],
            [f"plan upgrade {sc.plan} -> {sc.upgrade}, one member", money(a["upgrade_one"]["value"]),
             interval(a["upgrade_one"]["interval"]), f"at {_state(sc.member)}"],
            [f"plan upgrade, {sc.plan} members{where}", money(a["upgrade_cohort"]["value"]),
             interval(a["upgrade_cohort"]["interval"]), "per member, in their long-run mix: bounds an upgrade offer"],
            [f"engagement lift +{100 * LIFT:.0f} points ({self.product})", money(a["engagement_lift"]["value"]),
             interval(a["engagement_lift"]["interval"]), "per member: what the product team's lift is worth"],
            [f"experiment read-out ({self.product})", money(a["readout"]["difference"]["value"]),
             interval(a["readout"]["difference"]["interval"]),
             "treatment - control per member, two arms fitted apart: the interval says how noisy"],
        ]
        print(f"\nWhat the figures mean ({unit}, discounted at the spec's rate; streams {self.price} and "
              f"{self.product}; model tables: {source}):")
        print(format_table(["figure", "value", "90% interval", "meaning"], rows))
        print(f"\nreport: {page}")
        print("  value by tenure per plan and market; acquisition by market beside the naive figures and the")
        print("  landing mix; plan upgrades; ranked marginal transition values; the long run; fit diagnostics;")
        print("  solve statistics; assumptions. Its charts (report/charts/*.png, 200 dpi) carry the model")
        print("  version, stream, unit and the caution, ready for a slide.")
        print(f"demo finished in {seconds:.0f} s.")
        print(CAUTION_LINE)


def _state(s: dict[str, str]) -> str:
    return " ".join(f"{k}={v}" for k, v in s.items())
