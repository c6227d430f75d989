"""Coverage of the valuation intervals, a larger run than the test's (tests/test_valuation_uncertainty.py).

Simulated transition counts from a known small model -> Dirichlet posterior draws -> the
Valuer's percentile intervals for an acquisition value; reports the share of repeats whose
interval covers the true value, per nominal level, with the binomial standard error.
Run: .venv/bin/python bench/valuation_coverage.py --repeats 200 (writes bench/out/valuation_coverage.json).
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent / "tests"))

from test_valuation import PROSPECT, tiny_spec, tiny_tables  # noqa: E402
from test_valuation_uncertainty import posterior  # noqa: E402

from stateworth.files import write_json  # noqa: E402
from stateworth.rules import compile_model  # noqa: E402
from stateworth.valuation import Valuer  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=200)
    ap.add_argument("--draws", type=int, default=200)
    ap.add_argument("--per-cell", type=int, default=150)
    ap.add_argument("--out", default=str(HERE / "out" / "valuation_coverage.json"))
    a = ap.parse_args()
    spec = tiny_spec(markets=1, not_sold=False)
    truth = compile_model(spec, tiny_tables(spec, seed=4), source="truth")
    target = Valuer.build(truth).acquisition(PROSPECT, "solo").value
    rng = np.random.default_rng(7)
    levels = (0.5, 0.8, 0.9, 0.95)
    hits = {lv: 0 for lv in levels}
    for _ in range(a.repeats):
        mean, draws = posterior(truth.tables, rng, n_per_cell=a.per_cell, D=a.draws)
        v = Valuer.build(compile_model(spec, mean, draws=draws, source="fit"))
        for lv in levels:
            lo, hi = v.acquisition(PROSPECT, "solo", level=lv).interval
            hits[lv] += lo <= target <= hi
    res = {"repeats": a.repeats, "draws": a.draws, "per_cell": a.per_cell, "true_value": target,
           "coverage": {str(lv): {"share": hits[lv] / a.repeats,
                                  "binomial_se": float(np.sqrt(lv * (1 - lv) / a.repeats))} for lv in levels}}
    out = Path(a.out)
    write_json(out, res)
    print(json.dumps(res["coverage"]))


if __name__ == "__main__":
    main()
