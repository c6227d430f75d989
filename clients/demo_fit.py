"""The demo's estimation step: simulate account panels from the ground truth and fit them back.

Three panels are drawn from the spec's ground-truth tables (the scenario is invented):

* the business's panel, fitted into the model the demo solves, serves and reports;
* the two arms of an experiment on separate, randomly assigned populations: the control arm
  drawn from the ground truth, the treatment arm from the ground truth with the engagement lift
  applied (what the product team hopes the feature does). Each arm is fitted on its own panel,
  so the read-out compares two *estimated* models, with both arms' sampling uncertainty.

Fitting uses the estimation layer (``stateworth.estimation.fit``) with posterior draws, so every figure
downstream carries a percentile interval.
"""

from __future__ import annotations

import time
from pathlib import Path

#: posterior draws per fitted model: enough for 90 % percentile intervals, few enough that the
#: batched solves of every draw stay within the demo's time budget
DRAWS = 30
#: months simulated per panel
PERIODS = 24
#: addressable people per panel (the panel holds those who join)
ACCOUNTS = 20000


def fit_from_panels(spec_path: Path, truth, treated_truth, out: Path, accounts: int | None, seed: int,
                    step) -> tuple[Path, Path, Path, str]:
    """Simulate and fit the business panel and the experiment's two arms (see the module doc).
    Returns (fitted model dir, control dir, treatment dir, a note on the source)."""
    from stateworth.rules import load_spec
    from stateworth.estimation.fit import FitOptions, fit_to_dir
    from stateworth.estimation.simulate import simulate_panel, write_simulation

    spec = load_spec(spec_path)
    n = int(accounts or ACCOUNTS)
    panels, models = out / "panel", out / "models"
    panels.mkdir(parents=True, exist_ok=True)
    models.mkdir(parents=True, exist_ok=True)
    arms = [("experiment-treatment", treated_truth.tables, seed + 2),
            ("experiment-control", None, seed + 1),
            ("fitted", None, seed)]  # written last: the server's default version is the newest
    files = {}
    with step(f"simulate three account panels ({n:,} addressable people each, {PERIODS} months) from the "
              "ground truth"):
        for name, tables, s in arms:
            sim = simulate_panel(spec, n, PERIODS, s, tables=tables)
            files[name] = write_simulation(sim, panels / f"{name}.parquet")
            print(f"      {files[name][0].name}: {sim.panel.num_rows:,} rows")
    with step(f"fit each panel (Dirichlet shrinkage, {DRAWS} posterior draws, diagnostics)"):
        for name, _, s in arms:
            res = fit_to_dir(spec, str(files[name][0]), str(files[name][1]), models / name,
                             FitOptions(draws=DRAWS, seed=s), source=str(spec_path))
            d = res.diagnostics
            print(f"      {name}: version {res.model.version}, {d['panel']['accounts']:,} accounts, "
                  f"{d['panel']['moves']:,} moves, {d['overlap']['cells_failing']} overlap cells flagged")
            time.sleep(0.01)
    return (models / "fitted", models / "experiment-control", models / "experiment-treatment",
            f"fitted from a simulated panel of {n:,} addressable people ({DRAWS} posterior draws)")
