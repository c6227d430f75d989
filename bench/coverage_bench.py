"""Coverage of fitted models' intervals on the bundled example, against the spec's own values.

R panels are simulated from ``examples/fitness.toml`` (its written tables are the truth), each
is fitted with ``stateworth.estimation.fit.fit_panel`` and solved with its posterior draws, and
the same questions are asked of the fitted model and of the true model:

* ``acquisition``: V(plan) - V(prospect) for every market x plan a prospect can join (revenue);
* ``upgrade``: solo -> duo in every market (margin);
* ``member_value``: V of a new member on every plan in every market it is sold in (revenue);
* ``lift``: the members' engagement lift, +0.03 on P(engagement' = regular | member next,
  engagement = light), cohort-weighted over members in the long-run mix (margin), as in the
  README's ``stateworth change`` example.

Per figure class: coverage of the percentile interval at ``--level`` with its binomial standard
error sqrt(c (1 - c) / k) over the k (figure, panel) pairs, the mean bias (fitted - true) and the
mean half-width, both also relative to the true value. Figures of one panel are correlated, so
the binomial error is a lower bound on the real one when a class holds several figures a panel.

Run: ``.venv/bin/python bench/coverage_bench.py --repeats 20`` (writes bench/out/coverage.json).
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
SPEC = ROOT / "examples" / "fitness.toml"

LIFT_WHEN = {"next.status": ["solo", "duo", "studio"], "engagement": "light"}
MEMBERS = {"status": ["solo", "duo", "studio"]}


@dataclass(frozen=True)
class Figure:
    """One question: ``cls`` (figure class), ``name``, ``kind`` and its arguments."""

    cls: str
    name: str
    kind: str
    args: tuple


def figures(spec) -> list[Figure]:
    """The benchmark's questions on the example spec (see module doc)."""
    from stateworth.rules.spec import not_sold_pairs

    markets = spec.axis_levels("market")
    unsold = {(plan, level) for plan, _, level in not_sold_pairs(spec)}
    joinable = [p for p in spec.axes["status"].moves["prospect"] if p in spec.members]
    out = []
    for m in markets:
        base = {"market": m, "tenure": "0", "month": "jan", "status": "prospect", "engagement": "none"}
        for p in joinable:
            if (p, m) not in unsold:
                out.append(Figure("acquisition", f"{m}/{p}", "acquisition", (base, p, "revenue")))
        up = {"market": m, "tenure": "4", "month": "mar", "status": "solo", "engagement": "regular"}
        out.append(Figure("upgrade", f"{m}/solo->duo", "plan_change", (up, "duo", "margin")))
        for p in spec.members:
            if (p, m) not in unsold:
                s = {"market": m, "tenure": "0", "month": "jan", "status": p, "engagement": "light"}
                out.append(Figure("member_value", f"{m}/{p}", "value", (s, "revenue")))
    out.append(Figure("lift", "members +0.03 light->regular", "lift", ()))
    return out


def answer(valuer, fig: Figure, level: float) -> tuple[float, tuple[float, float] | None]:
    """(point, interval) of one question on one solved model."""
    if fig.kind == "acquisition":
        s, p, stream = fig.args
        a = valuer.acquisition(s, p, stream=stream, level=level)
    elif fig.kind == "plan_change":
        s, p, stream = fig.args
        a = valuer.plan_change(s, p, stream=stream, level=level)
    elif fig.kind == "value":
        s, stream = fig.args
        a = valuer.value(s, stream=stream, level=level)
    elif fig.kind == "lift":
        return lift(valuer, level)
    else:
        raise ValueError(fig.kind)
    return float(a.value), a.interval


def lift(valuer, level: float) -> tuple[float, tuple[float, float] | None]:
    """The README's ``stateworth change``: +0.03 on light -> regular for members, weighted over
    the members in the model's own long-run mix (as ``--cohort status=solo,duo,studio``)."""
    from stateworth.valuation import TransitionChange

    grid = valuer.model.grid
    status = grid.codes()[grid.position("status")]
    members = np.isin(status, [grid.level_index("status", p) for p in MEMBERS["status"]])
    pi = np.asarray(valuer.stationary(), dtype=np.float64)
    pi = np.where(pi > 1e-12 * float(pi.max()), pi, 0.0)
    w = np.where(members, pi, 0.0)
    w /= w.sum()
    res = valuer.transition_change(TransitionChange("engagement", "regular", 0.03, LIFT_WHEN), stream="margin",
                                   weights=w, level=level)
    return float(res.weighted), res.interval


def truth_answers(spec, figs: list[Figure]) -> dict[str, float]:
    from stateworth.rules import compile_model
    from stateworth.valuation import Valuer

    v = Valuer.build(compile_model(spec, source="truth"))
    return {f"{f.cls}:{f.name}": answer(v, f, 0.9)[0] for f in figs}


def one_panel(spec, figs: list[Figure], seed: int, accounts: int, periods: int, draws: int, level: float,
              options: dict | None = None) -> dict:
    """Simulate, fit and solve one panel; the answers to every question."""
    from stateworth.estimation.fit import FitOptions, fit_panel
    from stateworth.estimation.simulate import simulate_panel, write_simulation
    from stateworth.valuation import Valuer

    t0 = time.perf_counter()
    sim = simulate_panel(spec, accounts, periods, seed=seed)
    with tempfile.TemporaryDirectory() as d:
        p, m = write_simulation(sim, Path(d) / "panel.parquet")
        t1 = time.perf_counter()
        res = fit_panel(spec, p, m, FitOptions(draws=draws, seed=seed, **(options or {})))
    t2 = time.perf_counter()
    v = Valuer.build(res.model)
    t3 = time.perf_counter()
    out = {}
    for f in figs:
        point, iv = answer(v, f, level)
        out[f"{f.cls}:{f.name}"] = (point, None if iv is None else [float(iv[0]), float(iv[1])])
    t4 = time.perf_counter()
    return {"seed": seed, "answers": out, "seconds": {"simulate": t1 - t0, "fit": t2 - t1, "solve": t3 - t2,
                                                      "questions": t4 - t3},
            "strengths": {p["factor"]: p["strength"] for p in res.diagnostics["prior"]}}


def summarise(truth: dict[str, float], panels: list[dict], level: float) -> dict:
    """Coverage, bias and half-width per figure class (see module doc)."""
    classes: dict[str, dict[str, list]] = {}
    for pn in panels:
        for key, (point, iv) in pn["answers"].items():
            cls = key.split(":", 1)[0]
            t = truth[key]
            c = classes.setdefault(cls, {"hit": [], "bias": [], "half": [], "rel_bias": [], "rel_half": []})
            if iv is None:
                continue
            c["hit"].append(iv[0] <= t <= iv[1])
            c["bias"].append(point - t)
            c["half"].append((iv[1] - iv[0]) / 2)
            c["rel_bias"].append((point - t) / abs(t) if t else np.nan)
            c["rel_half"].append((iv[1] - iv[0]) / 2 / abs(t) if t else np.nan)
    out = {}
    for cls, c in classes.items():
        k = len(c["hit"])
        cov = float(np.mean(c["hit"])) if k else float("nan")
        out[cls] = {"figures": k, "coverage": cov,
                    "binomial_se": float(np.sqrt(cov * (1 - cov) / k)) if k else float("nan"),
                    "nominal_se": float(np.sqrt(level * (1 - level) / k)) if k else float("nan"),
                    "mean_bias": float(np.mean(c["bias"])), "mean_abs_bias": float(np.mean(np.abs(c["bias"]))),
                    "mean_half_width": float(np.mean(c["half"])),
                    "bias_over_half_width": float(abs(np.mean(c["bias"])) / np.mean(c["half"])),
                    "mean_rel_bias": float(np.nanmean(c["rel_bias"])),
                    "mean_rel_half_width": float(np.nanmean(c["rel_half"]))}
    return out


def per_figure(truth: dict[str, float], panels: list[dict]) -> dict:
    out = {}
    for key, t in truth.items():
        pts = [pn["answers"][key][0] for pn in panels]
        hits = [pn["answers"][key][1][0] <= t <= pn["answers"][key][1][1] for pn in panels
                if pn["answers"][key][1] is not None]
        halves = [(pn["answers"][key][1][1] - pn["answers"][key][1][0]) / 2 for pn in panels
                  if pn["answers"][key][1] is not None]
        out[key] = {"truth": t, "mean_point": float(np.mean(pts)), "sd_point": float(np.std(pts)),
                    "coverage": float(np.mean(hits)) if hits else None,
                    "mean_half_width": float(np.mean(halves)) if halves else None}
    return out


def run(repeats: int, accounts: int, periods: int, draws: int, level: float, seed0: int = 1000,
        options: dict | None = None, spec_path: Path = SPEC, log=print) -> dict:
    from stateworth.config import use_jax
    from stateworth.rules import load_spec

    use_jax()
    spec = load_spec(spec_path)
    figs = figures(spec)
    truth = truth_answers(spec, figs)
    panels = []
    for r in range(repeats):
        pn = one_panel(spec, figs, seed0 + r, accounts, periods, draws, level, options)
        panels.append(pn)
        s = summarise(truth, panels, level)
        log(f"panel {r + 1}/{repeats} ({sum(pn['seconds'].values()):.0f} s): "
            + "; ".join(f"{c} {v['coverage']:.2f}" for c, v in s.items()))
    return {"spec": str(spec_path.relative_to(ROOT)) if spec_path.is_relative_to(ROOT) else str(spec_path),
            "repeats": repeats, "accounts": accounts, "periods": periods, "draws": draws, "level": level,
            "options": options or {}, "classes": summarise(truth, panels, level),
            "figures": per_figure(truth, panels), "truth": truth, "panels": panels}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=20)
    ap.add_argument("--accounts", type=int, default=20000)
    ap.add_argument("--periods", type=int, default=24)
    ap.add_argument("--draws", type=int, default=100)
    ap.add_argument("--level", type=float, default=0.9)
    ap.add_argument("--seed", type=int, default=1000, help="seed of the first panel (panel r uses seed + r)")
    ap.add_argument("--out", default=str(HERE / "out" / "coverage.json"))
    a = ap.parse_args()
    from stateworth.files import write_json

    t0 = time.perf_counter()
    res = run(a.repeats, a.accounts, a.periods, a.draws, a.level, a.seed, log=lambda s: print(s, flush=True))
    res["seconds"] = time.perf_counter() - t0
    write_json(Path(a.out), res)
    print(f"{'class':<14}{'k':>5}{'coverage':>10}{'+-se':>7}{'mean bias':>11}{'half-width':>12}{'|bias|/hw':>10}")
    for c, v in res["classes"].items():
        print(f"{c:<14}{v['figures']:>5}{v['coverage']:>10.3f}{v['binomial_se']:>7.3f}{v['mean_bias']:>11.2f}"
              f"{v['mean_half_width']:>12.2f}{v['bias_over_half_width']:>10.2f}")
    print(f"wrote {a.out} ({res['seconds']:.0f} s)")


if __name__ == "__main__":
    sys.exit(main())
