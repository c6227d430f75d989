"""``stateworth fit SPEC --panel FILE|URL --markets FILE|URL -o MODEL_DIR``: estimate and compile a model."""

from __future__ import annotations

import argparse

from stateworth.clients.commands._sources import add_table_arguments

NAME = "fit"
HELP = "estimate the factor tables from an account panel and write the compiled model"
DESCRIPTION = """Estimate every factor table of a spec from an account panel (CSV or Parquet) and a
market-size table, and write the compiled model artifact to MODEL_DIR with diagnostics.json (and a
readable diagnostics.txt) inside. Probabilities are hierarchical Dirichlet posterior means: each
cell shrunk towards its parent, the parents pooling the given axes in the order the data favour
(marginal likelihood), with posterior draws that carry the doubt about how hard to pool;
never-member join rates come from first joins and the market sizes (printed raw and as used); a propensity
band axis is fitted from its covariates. With --population (a sample of the addressable population:
market, the band's covariates, optional weight) never-members are placed in propensity bands and
their join hazard is estimated per market and band; without it, per-band acquisition values assume
that never-members' joining does not depend on the band. Nothing is written when fitting fails.
The panel and the market sizes may be tables (or views, or queries) in a PostgreSQL database:
--panel postgresql://USER@HOST:PORT/DB --panel-table TABLE (password from PGPASSWORD or ~/.pgpass).

example:
  stateworth fit examples/fitness.toml --panel demo-out/panel/fitted.parquet \\
      --markets demo-out/panel/fitted.markets.csv -o out/model
  stateworth simulate examples/fitness.toml --accounts 20000 -o out/panel.parquet
  stateworth fit examples/fitness.toml --panel out/panel.parquet --markets out/panel.markets.csv -o out/model2
  stateworth fit examples/fitness.toml --panel postgresql://analyst@db.example:5432/crm \\
      --panel-table panel --markets postgresql://analyst@db.example:5432/crm --markets-table market_sizes -o out/model
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("spec", help="the model spec (TOML)")
    add_table_arguments(p, "panel", "account panel (.csv or .parquet; see README 'Fitting from an account panel')",
                        required=True)
    add_table_arguments(p, "markets", "market-size table (market, size, low, high[, period])", required=True)
    p.add_argument("--population", default=None,
                   help="a sample of the addressable population (.csv or .parquet: market, the propensity band's "
                        "covariates, optional weight): places never-members in bands for a join hazard by band")
    p.add_argument("-o", "--output", required=True, help="model directory to write")
    p.add_argument("--strength", default="auto",
                   help="prior strength in pseudo-moves per cell at every level of pooling, or auto (each "
                        "parent cell's from the marginal likelihood; default)")
    p.add_argument("--drop-forbidden", action="store_true",
                   help="drop moves the spec's rules forbid (counted in the diagnostics) instead of failing")
    p.add_argument("--gaps", default="error", choices=["error", "non_member"],
                   help="a missing period inside an account's history: an error (default) or a former-member period")
    p.add_argument("--draws", type=int, default=100,
                   help="posterior draws of every table for intervals (default 100; 0 for none, else at least "
                        "20: a 90%% interval needs 2 / (1 - 0.9) = 20)")
    p.add_argument("--seed", type=int, default=0, help="seed of the posterior draws (default 0)")
    p.add_argument("--engine", default="duckdb", choices=["duckdb", "spark"],
                   help="where the counting query runs: the embedded DuckDB (default) or Spark SQL (pyspark; "
                        "local mode unless STATEWORTH_SPARK_MASTER names a cluster)")
    p.add_argument("--no-solve", action="store_true",
                   help="do not solve the fitted model (by default its values, posterior draws' values and "
                        "long-run mix are solved and stored with it, so queries answer at once)")
    p.add_argument("--quiet", action="store_true", help="no progress bar and no summary")


def run(args: argparse.Namespace) -> int:
    import sys

    from stateworth.clients.commands._sources import table_source
    from stateworth.errors import PanelError
    from stateworth.rules import load_spec
    from stateworth.estimation.diagnostics import summary_text
    from stateworth.estimation.fit import FitOptions, fit_to_dir

    if args.strength == "auto":
        strength = "auto"
    else:
        try:
            strength = float(args.strength)
        except ValueError:
            raise PanelError(f"'{args.strength}' is not a number; give pseudo-moves > 0 or auto",
                             where="--strength") from None
    panel, markets = table_source(args, "panel"), table_source(args, "markets")
    spec = load_spec(args.spec)
    opts = FitOptions(strength=strength, forbidden="drop" if args.drop_forbidden else "error", gaps=args.gaps,
                      draws=args.draws, seed=args.seed, engine=args.engine)
    solved_box = []

    def store_values(res, tmp) -> None:
        # solved before the directory appears, so the model is published with its values
        from stateworth.valuation import stored
        from stateworth.valuation.solved import solve_model

        try:  # a fit that reproduces the current version keeps the values stored with it
            solved_box.append(stored.load(tmp, res.model))
            return
        except (FileNotFoundError, stored.StoredValuesError):
            pass
        solved_box.append(solve_model(res.model))
        stored.save(tmp, solved_box[0])

    res = fit_to_dir(spec, panel, markets, args.output, opts, source=args.spec,
                     progress=not args.quiet and sys.stderr.isatty(),
                     before_publish=None if args.no_solve else store_values, population=args.population)
    if not args.quiet:
        print(summary_text(res.diagnostics))
        print(f"wrote {args.output} (version {res.model.version}, {res.model.n_states:,} states)")
        if solved_box:
            s = solved_box[0]
            d = s.stats.get("draws") or {}
            print(f"solved and stored its values ({s.stats['point'].get('method')}, "
                  f"{float(s.stats['point'].get('seconds') or 0):.2f} s"
                  + (f"; {d.get('draws')} posterior draws, {float(d.get('seconds') or 0):.2f} s" if d else "") + ")")
    return 0
