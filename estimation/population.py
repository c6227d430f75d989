"""The never-member mix by propensity band, from a sample of the addressable population.

A panel holds only people who joined, so it cannot say how the never-members of a market are
spread over the propensity bands; a survey or a prospect list can. Given a sample of the
addressable population (columns ``market``, the band's covariates, optional ``weight``), each
row is scored with the fitted propensity model and placed in its band, and per market m

    share(m, b)    = sum of weights in band b / sum of weights           (the sample's band mix)
    at_risk(m,b,t) = size(m, t) x share(m, b) - tracked(m, b, t)         (never-members at t)

with ``tracked(m, b, t)`` the panel's accounts in market m first seen by period t whose band at
their first row is b. Joins per (market, band, cycle) over those at risk give the join hazard by
band (:mod:`.joins`). The sample's own uncertainty enters the posterior draws by the Bayesian
bootstrap (Rubin 1981, docs/references.md): each draw reweights the rows of a market by
independent standard exponential variables, which makes the drawn shares Dirichlet over the
rows.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from stateworth.errors import PanelError

#: Rows of the population sample needed in a market per band level: the band mix of a market
#: is estimated from its rows, and with fewer than ~10 a band the shares (and the never-members
#: placed by them) move by more than a tenth of themselves from one sample to the next
#: (common practice, no source).
MIN_ROWS_PER_BAND = 10


@dataclass(frozen=True)
class PopulationSample:
    """A scored population sample: per row the market code, band code and weight."""

    path: str
    market: np.ndarray  # (R,) int
    band: np.ndarray  # (R,) int
    weight: np.ndarray  # (R,) float > = 0

    def shares(self, markets: int, bands: int) -> np.ndarray:
        """``(M, B)`` weighted band shares per market (rows summing to 1; 0 where a market has
        no rows)."""
        return _shares(self.market, self.band, self.weight, markets, bands)

    def share_draws(self, markets: int, bands: int, draws: int, rng: np.random.Generator) -> np.ndarray:
        """``(D, M, B)`` Bayesian-bootstrap draws of the shares (see module doc)."""
        out = np.empty((draws, markets, bands))
        for d in range(draws):
            g = rng.standard_exponential(len(self.weight))
            out[d] = _shares(self.market, self.band, self.weight * g, markets, bands)
        return out

    def rows_by_market(self, markets: int) -> np.ndarray:
        return np.bincount(self.market, minlength=markets)


def _shares(market, band, weight, M: int, B: int) -> np.ndarray:
    w = np.zeros((M, B))
    np.add.at(w, (market, band), weight)
    tot = w.sum(axis=1, keepdims=True)
    return np.where(tot > 0, w / np.where(tot > 0, tot, 1.0), 0.0)


def load_population(spec, path: str, panel, sizes, score) -> PopulationSample:
    """Read and validate a population sample, and band its rows.

    ``score(x)`` maps covariate rows ``(n, covariates)``, coded as in the panel (numbers;
    categorical covariates as the index of their value in ``panel.cov_levels``), to band codes.
    Every problem is a :class:`~stateworth.errors.PanelError` naming the file, row or column:
    a missing column, a market that is not a level or has no addressable size, a covariate that
    is not a number (or a categorical value the panel never showed), a negative, missing or
    non-finite weight, a market with too few rows to place its never-members in bands."""
    from stateworth.estimation.panel import _columns, _q, _source

    con, lay = panel.con, panel.layout
    rel, _ = _source(str(path), con)
    cols = _columns(con, rel, str(path))
    covs = list(lay.covariates)
    missing = [c for c in ["market", *covs] if c not in cols]
    if missing:
        raise PanelError(f"missing column(s) {', '.join(missing)}; a population sample needs market and the "
                         f"band's covariates {', '.join(covs)} (and optionally weight)", where=str(path))
    has_w = "weight" in cols
    sel = ", ".join(["_row", "CAST(market AS VARCHAR)"] + [f"CAST({_q(c)} AS VARCHAR)" for c in covs]
                    + (["CAST(weight AS VARCHAR)"] if has_w else []))
    data = con.execute(f"SELECT {sel} FROM {rel} ORDER BY _row").fetchall()
    if not data:
        raise PanelError("the population sample has no rows", where=str(path))
    cols_ = list(zip(*data))
    rowno = np.asarray(cols_[0], dtype=np.int64)
    levels = spec.axis_levels(lay.market)
    sized = sizes.listed if sizes.listed is not None else (sizes.size > 0).any(axis=1)

    def fail(bad: np.ndarray, column: str, message) -> None:
        if bad.any():
            i = int(np.argmax(bad))
            raise PanelError(message(i), where=f"{path}: row {rowno[i]}, column {column}")

    mk = np.asarray(cols_[1], dtype=object)
    code = {lv: i for i, lv in enumerate(levels)}
    market = np.array([code.get(v, -1) for v in mk], dtype=np.int64)
    fail(market < 0, "market", lambda i: f"'{mk[i]}' is not a level of {lay.market}; levels are {', '.join(levels)}")
    fail(~sized[market], "market", lambda i: f"market '{mk[i]}' has no row in the market-size table; add its "
                                             "addressable size or drop its rows")
    x = np.empty((len(rowno), len(covs)))
    for j, c in enumerate(covs):
        raw = np.asarray(cols_[2 + j], dtype=object)
        if c in panel.cov_levels:
            cl = {v: k for k, v in enumerate(panel.cov_levels[c])}
            x[:, j] = [cl.get(v, -1) for v in raw]
            fail(x[:, j] < 0, c, lambda i: f"'{raw[i]}' is not a value the panel shows for the categorical covariate "
                                           f"{c} ({', '.join(panel.cov_levels[c])}); the score has no coefficient for it")
            continue
        x[:, j] = _numbers(raw)
        fail(~np.isfinite(x[:, j]), c, lambda i: f"'{raw[i]}' is not a finite number; the covariate {c} must be "
                                                 "numeric as in the panel")
    weight = np.ones(len(rowno))
    if has_w:
        raw = np.asarray(cols_[2 + len(covs)], dtype=object)
        weight = _numbers(raw)
        fail(~(np.isfinite(weight) & (weight >= 0)), "weight",
             lambda i: f"weight '{raw[i]}' must be a finite number >= 0")
    bands = len(spec.axis_levels(lay.band))
    need = MIN_ROWS_PER_BAND * bands
    counts = np.bincount(market, weights=(weight > 0).astype(np.float64), minlength=len(levels))
    for m in np.flatnonzero(sized & (sizes.size > 0).any(axis=1)):
        if counts[m] < need:
            raise PanelError(f"market '{levels[m]}' has {int(counts[m])} row(s) with positive weight; at least "
                             f"{need} ({MIN_ROWS_PER_BAND} per band level of {lay.band}) are needed to place its "
                             "never-members in bands", where=f"{path}, column market")
    return PopulationSample(path=str(path), market=market, band=np.asarray(score(x), dtype=np.int64), weight=weight)


def _numbers(raw: np.ndarray) -> np.ndarray:
    """Text cells as floats; NaN where a cell is empty or not a number."""
    out = np.full(len(raw), np.nan)
    for i, v in enumerate(raw):
        try:
            out[i] = float(v)
        except (TypeError, ValueError):
            pass
    return out
