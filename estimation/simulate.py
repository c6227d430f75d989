"""A synthetic account panel drawn from a spec with known factor tables (the ground truth).

``population`` addressable people are spread evenly at random over the levels of each fixed
axis. Everyone starts, one period before the panel's first period, as a never-member (the first
non-member level), at the lowest level of each chance axis, with counters at their never-member
start (:func:`stateworth.estimation.counts.counter_start`); a propensity band axis instead starts at a
uniformly drawn band. Each period every person moves by the true factors in draw order, counters
by their index map and cycles by one. A person enters the panel in the period they first join
and stays in it (as a former member after lapsing); never-members never appear.

Covariates of a propensity band axis confound membership: covariate j of a row is
``(-1)^j (band - (B - 1) / 2) + 0.15 z`` with z a standard normal drawn once per person
(standardised units), so the band, which drives joining, lapsing and re-joining in the true
tables, is what they measure. A categorical covariate reports the same measurement in classes
(:data:`CATEGORY_NAMES`, cut at :data:`CATEGORY_EDGES`). The fit orders bands by membership score, so give band levels in
increasing order of the propensity to be a member.
Revenue is the plan's list price from the first reward stream that has prices (0 otherwise).

The market-size table holds the true population per market with low / high at -/+ 10 % (low
never below the accounts the panel tracks there).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from stateworth.errors import SpecError
from stateworth.files import write_with
from stateworth.estimation.counts import counter_start
from stateworth.rules.factors import factors_of, table_from_rows
from stateworth.rules.counters import counter_index
from stateworth.estimation.panel import Layout, parse_period, period_label

COVARIATE_NOISE = 0.15
#: The first simulated period unless told: the period of the spec's kind that holds this date.
DEFAULT_START = "2024-01-01"
#: Classes of a simulated categorical covariate and the cuts of the underlying measurement.
CATEGORY_NAMES = ["low", "mid", "high", "top"]
CATEGORY_EDGES = [-0.75, 0.0, 0.75]


@dataclass
class Simulation:
    """``panel`` and ``markets`` are pyarrow Tables; ``truth`` the factor tables drawn from."""

    panel: object
    markets: object
    truth: dict[str, np.ndarray]
    population: dict[str, int]
    sample: object = None  # pyarrow Table: a sample of the addressable population (market, covariates)


def _draw(rng: np.random.Generator, probs: np.ndarray) -> np.ndarray:
    """One categorical draw per row of ``probs`` (n, K)."""
    u = rng.random(len(probs))[:, None]
    c = np.cumsum(probs, axis=1)
    out = (u >= c[:, :-1]).sum(axis=1) if probs.shape[1] > 1 else np.zeros(len(probs), dtype=np.int64)
    return out.astype(np.int64)


def simulate_panel(spec, population: int, periods: int, seed: int = 0, *, start: str | None = None,
                   tables: dict[str, np.ndarray] | None = None, sample: int = 0,
                   band_shares: np.ndarray | None = None,
                   later: tuple[int, dict[str, np.ndarray]] | None = None) -> Simulation:
    """Simulate ``periods`` periods of the spec (months, ISO weeks, quarters or years) of
    ``population`` addressable people (see the module doc). ``start``: the first panel period,
    a label of the spec's period or a date in it (default: the first period of 2024); the
    panel's ``period`` column holds the spec's labels (``2024-01``, ``2024-W01``, ``2024-Q1``,
    ``2024``).

    ``sample`` > 0 (a spec with a propensity band axis) also draws that many people at random
    from the whole addressable population, members and never-members alike, with their market
    and their covariates measured at the last period as the panel measures them: what a survey
    of the market would give (``Simulation.sample``). ``band_shares``: the start distribution
    of a propensity band axis (default even).

    ``later = (t, tables)``: from the move into panel period ``t`` (0-based) on, the given
    factors are drawn from these tables instead: a world that changes (for backtests)."""
    from stateworth.extras import need

    pa = need("pyarrow", "fit", "simulating a panel")

    if population < 1 or periods < 2:
        raise SpecError("simulate needs at least 1 person and 2 periods", where="--accounts/--periods")
    lay = Layout.of(spec)
    if lay.market is None:
        raise SpecError("simulate needs a fixed market axis (the market-size table refers to it)", where="axes")
    rng = np.random.default_rng(seed)
    factors = factors_of(spec)
    truth = {f.axis: np.asarray((tables or {}).get(f.axis, None) if tables and f.axis in tables
                                else table_from_rows(spec, f), dtype=np.float64) for f in factors}
    grid = spec.grid_order
    st = spec.status_axis
    nm = lay.code(st, lay.never_member)
    period = spec.model.period
    p0 = parse_period(start if start is not None else DEFAULT_START, "--start", period)
    N = int(population)
    cur: dict[str, np.ndarray] = {}
    for a in grid:
        kind = spec.axes[a].kind
        size = len(spec.axis_levels(a))
        if a == lay.band and band_shares is not None:
            cur[a] = rng.choice(size, size=N, p=np.asarray(band_shares, dtype=np.float64))
        elif kind == "fixed" or a == lay.band:
            cur[a] = rng.integers(0, size, N)
        elif kind == "counter":
            cur[a] = np.full(N, counter_start(spec, a), dtype=np.int64)
        elif kind == "cycle":
            cur[a] = np.full(N, (p0 - 1) % size, dtype=np.int64)
        elif a == st:
            cur[a] = np.full(N, nm, dtype=np.int64)
        else:
            cur[a] = np.zeros(N, dtype=np.int64)
    counters = {a: counter_index(spec, a) for a in grid if spec.axes[a].kind == "counter"}
    joined = np.zeros(N, dtype=bool)
    price = _prices(spec)
    chunks: list[dict[str, np.ndarray]] = []
    changed = {**truth, **{a: np.asarray(v, dtype=np.float64) for a, v in later[1].items()}} if later else truth
    for t in range(periods):
        nxt: dict[str, np.ndarray] = {}
        now = changed if later and t >= later[0] else truth
        for f in factors:
            idx = [nxt[g[5:]] if g.startswith("next.") else cur[g] for g in f.given]
            T = now[f.axis]
            flat = np.ravel_multi_index(idx, f.shape[:-1]) if idx else np.zeros(N, dtype=np.int64)
            nxt[f.axis] = _draw(rng, T.reshape(-1, f.shape[-1])[flat])
        for a in grid:
            kind = spec.axes[a].kind
            if kind == "fixed":
                nxt[a] = cur[a]
            elif kind == "counter":
                nxt[a] = counters[a][cur[a], cur[st], nxt[st]].astype(np.int64)
            elif kind == "cycle":
                nxt[a] = (cur[a] + 1) % len(spec.axis_levels(a))
        cur = nxt
        joined |= cur[st] != nm
        who = np.flatnonzero(joined)
        row = {"account": who.astype(np.int64), "p": np.full(len(who), p0 + t, dtype=np.int64)}
        for a in lay.observed:
            row[a] = cur[a][who]
        if lay.band:
            row["_band"] = cur[lay.band][who]
        row["revenue"] = price[cur[st][who], cur[lay.market][who]]
        chunks.append(row)
    cols = {k: np.concatenate([c[k] for c in chunks]) for k in chunks[0]}
    arrays = {"account": pa.array(cols["account"]),
              "period": pa.DictionaryArray.from_arrays(
                  pa.array((cols["p"] - p0).astype(np.int32)),
                  pa.array([period_label(p0 + t, period) for t in range(periods)]))}
    for a in lay.observed:
        arrays[a] = pa.DictionaryArray.from_arrays(pa.array(cols[a].astype(np.int32)), pa.array(spec.axis_levels(a)))
    noise = None
    if lay.band:
        # a person's measurement error is their own and lasts (age, distance do not jitter monthly)
        noise = rng.standard_normal((N, len(lay.covariates)))
        arrays.update(_measure(spec, lay, cols["_band"], noise[cols["account"]]))
    arrays["revenue"] = pa.array(cols["revenue"])
    panel = pa.table(arrays)
    m_levels = spec.axis_levels(lay.market)
    pop = np.bincount(cur[lay.market], minlength=len(m_levels))
    tracked = np.bincount(cur[lay.market][joined], minlength=len(m_levels))
    low = np.maximum(np.floor(0.9 * pop), tracked).astype(np.int64)
    high = np.ceil(1.1 * pop).astype(np.int64)
    markets = pa.table({"market": m_levels, "size": pop.astype(np.int64), "low": low, "high": high})
    sampled = None
    if sample > 0:
        if noise is None:
            raise SpecError("a population sample measures the covariates of a propensity band axis, and the spec "
                            "declares none", where="--population-sample")
        # drawn after everything else, so the panel of a seed is the same with or without it
        who = np.sort(rng.choice(N, size=min(int(sample), N), replace=False))
        sampled = pa.table({"market": pa.array([m_levels[i] for i in cur[lay.market][who]]),
                            **_measure(spec, lay, cur[lay.band][who], noise[who])})
    return Simulation(panel=panel, markets=markets, truth=truth,
                      population={lv: int(x) for lv, x in zip(m_levels, pop)}, sample=sampled)


def _measure(spec, lay: Layout, band: np.ndarray, noise: np.ndarray) -> dict:
    """The covariate columns (pyarrow arrays) measuring ``band`` with each row's ``noise``
    ``(rows, covariates)``: covariate j is ``(-1)^j (band - (B - 1) / 2) + 0.15 z_j``."""
    import pyarrow as pa

    B = len(spec.axis_levels(lay.band))
    centre = band - (B - 1) / 2.0
    out = {}
    for j, c in enumerate(lay.covariates):
        x = (-1) ** j * centre + COVARIATE_NOISE * noise[:, j]
        if c in lay.categorical:
            # the same measurement, reported in coarse named classes
            code = np.digitize(x, CATEGORY_EDGES)
            out[c] = pa.DictionaryArray.from_arrays(pa.array(code.astype(np.int32)), pa.array(CATEGORY_NAMES))
        else:
            out[c] = pa.array(x)
    return out


def _prices(spec) -> np.ndarray:
    """``price[status code, market code]``: list price of a plan (0 for non-members)."""
    lay = Layout.of(spec)
    st_levels = spec.axis_levels(spec.status_axis)
    m_levels = spec.axis_levels(lay.market)
    out = np.zeros((len(st_levels), len(m_levels)))
    stream = next((r for r in spec.rewards.values() if r.price), None)
    if stream is None:
        return out
    for plan, val in stream.price.items():
        i = st_levels.index(plan)
        if isinstance(val, dict):
            for j, m in enumerate(m_levels):
                out[i, j] = val.get(m, 0.0)
        else:
            out[i, :] = val
    return out


def markets_path_for(panel_path: str | Path) -> Path:
    """Where :func:`write_simulation` puts the market-size table: beside the panel, named
    ``<panel stem>.markets.csv``."""
    p = Path(panel_path)
    return p.with_name(p.name[: -len(p.suffix)] + ".markets.csv" if p.suffix else p.name + ".markets.csv")


def _atomic(path: Path, write) -> None:
    write_with(path, lambda tmp: write(str(tmp)))


def write_table(table, path: str | Path) -> Path:
    """Write a pyarrow Table as Parquet (``.parquet``) or CSV (anything else), atomically."""
    import pyarrow.csv as pcsv
    import pyarrow.parquet as pq

    path = Path(path)
    if path.suffix.lower() in (".parquet", ".pq"):
        _atomic(path, lambda t: pq.write_table(table, t))
    else:
        plain = table.cast(__import__("pyarrow").schema(
            [(f.name, f.type.value_type if hasattr(f.type, "value_type") else f.type) for f in table.schema]))
        _atomic(path, lambda t: pcsv.write_csv(plain, t))
    return path


def population_path_for(panel_path: str | Path) -> Path:
    """Where :func:`write_simulation` puts a population sample: ``<panel stem>.population.csv``."""
    return markets_path_for(panel_path).with_name(markets_path_for(panel_path).name.replace(".markets.csv",
                                                                                          ".population.csv"))


def write_simulation(sim: Simulation, panel_path: str | Path) -> tuple[Path, Path]:
    """Write the panel to ``panel_path``, the market-size table beside it (CSV) and, when the
    simulation drew one, the population sample (:func:`population_path_for`)."""
    p = write_table(sim.panel, panel_path)
    m = write_table(sim.markets, markets_path_for(panel_path))
    if sim.sample is not None:
        write_table(sim.sample, population_path_for(panel_path))
    return p, m
