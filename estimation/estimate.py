"""Factor tables from counts: Dirichlet posterior means shrunk towards the parent cell.

For a factor with counts ``C[g_1..g_k, a']`` (moves from the given cell into next level a'),
each cell's next-level distribution gets a Dirichlet prior ``alpha * m`` where ``m`` is the
*parent* cell's distribution: the same cell pooled over its last given axis ``g_k`` (if that is
empty too, pooled over the last two, ..., and at the root the even spread over the allowed
moves). The posterior mean is ``(C + alpha m) / (n + alpha)`` with ``n`` the cell's moves; it is
zero on moves the spec forbids because ``m`` is. ``alpha`` (pseudo-moves) is given, or chosen
by empirical Bayes: the value on a log grid that maximises the Dirichlet-multinomial marginal
likelihood of all the factor's cells. Posterior draws are ``Dirichlet(C + alpha m)`` per cell.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import gammaln

from stateworth.rules.factors import Factor, masked_uniform

#: Empirical-Bayes search grid for the prior strength (pseudo-moves per cell).
STRENGTH_GRID = np.logspace(-1, 4, 51)


@dataclass
class FactorFit:
    """A fitted factor: ``table`` (posterior mean, factor shape), ``counts`` (same shape),
    ``prior`` (the prior mean m), ``strength`` (alpha), ``draws`` ``(D, *shape)`` or None."""

    axis: str
    table: np.ndarray
    counts: np.ndarray
    prior: np.ndarray
    strength: float
    draws: np.ndarray | None = None

    @property
    def cell_moves(self) -> np.ndarray:
        return self.counts.sum(axis=-1)

    @property
    def prior_dominated(self) -> np.ndarray:
        """Cells whose prior weight exceeds their data (n < alpha), shape = the given cells."""
        return self.cell_moves < self.strength


def allowed_mask(spec, factor: Factor) -> np.ndarray:
    """Boolean ``factor.shape``: the moves the spec's rules allow in every case of the cell."""
    return masked_uniform(spec, factor) > 0


def parent_mean(counts: np.ndarray, allowed: np.ndarray) -> np.ndarray:
    """The prior mean m of every cell: its parent's distribution (pooled over the last given
    axis), falling back to coarser pools and finally the even spread over allowed moves."""
    k = counts.ndim - 1
    m = allowed / allowed.sum(axis=-1, keepdims=True)
    # pooling over a single-level axis would make a cell its own parent: skip those axes
    real = [i for i in range(k) if counts.shape[i] > 1]
    for j in range(len(real)):  # pool the given axes real[j:]; finer pools override coarser
        pooled = counts.sum(axis=tuple(real[j:]), keepdims=True)
        cand = np.broadcast_to(pooled, counts.shape) * allowed
        tot = cand.sum(axis=-1, keepdims=True)
        m = np.where(tot > 0, cand / np.where(tot > 0, tot, 1.0), m)
    return m


def log_marginal(counts: np.ndarray, m: np.ndarray, alpha: float) -> float:
    """Dirichlet-multinomial log marginal likelihood of all cells (up to a constant in alpha)."""
    c = counts.reshape(-1, counts.shape[-1])
    mm = m.reshape(c.shape)
    n = c.sum(axis=1)
    pos = mm > 0
    am = np.where(pos, alpha * mm, 1.0)
    terms = np.where(pos, gammaln(c + am) - gammaln(am), 0.0).sum(axis=1)
    return float((gammaln(alpha) - gammaln(n + alpha) + terms).sum())


def empirical_bayes_strength(counts: np.ndarray, m: np.ndarray, grid: np.ndarray = STRENGTH_GRID) -> float:
    """The prior strength on ``grid`` with the largest marginal likelihood."""
    if counts.sum() == 0:
        return float(grid[len(grid) // 2])
    ll = [log_marginal(counts, m, a) for a in grid]
    return float(grid[int(np.argmax(ll))])


def posterior(counts: np.ndarray, allowed: np.ndarray, strength: float | str = "auto",
              n_draws: int = 0, rng: np.random.Generator | None = None, axis: str = "") -> FactorFit:
    """Posterior mean (and draws) of a factor from its counts. Counts on disallowed moves must
    have been removed by the caller (see :func:`forbidden_counts`)."""
    counts = np.asarray(counts, dtype=np.float64)
    m = parent_mean(counts, allowed)
    alpha = empirical_bayes_strength(counts, m) if strength == "auto" else float(strength)
    if not alpha > 0:
        raise ValueError("prior strength must be > 0")
    n = counts.sum(axis=-1, keepdims=True)
    table = (counts + alpha * m) / (n + alpha)
    table = np.where(allowed, table, 0.0)
    table /= table.sum(axis=-1, keepdims=True)
    draws = None
    if n_draws:
        rng = rng or np.random.default_rng(0)
        conc = counts + alpha * m
        g = rng.standard_gamma(np.broadcast_to(conc, (n_draws,) + conc.shape))
        g = np.where(conc > 0, g, 0.0)
        tot = g.sum(axis=-1, keepdims=True)
        draws = np.where(tot > 0, g / np.where(tot > 0, tot, 1.0), table[None])
    return FactorFit(axis=axis, table=table, counts=counts, prior=m, strength=alpha, draws=draws)


def forbidden_counts(counts: np.ndarray, allowed: np.ndarray) -> tuple[np.ndarray, int]:
    """(counts with disallowed moves zeroed, number of moves removed)."""
    bad = np.where(allowed, 0.0, counts)
    return np.where(allowed, counts, 0.0), int(bad.sum())


def wilson_interval(k: np.ndarray, n: np.ndarray, z: float = 1.6448536269514722) -> tuple[np.ndarray, np.ndarray]:
    """Wilson (1927) score interval for a binomial proportion k/n (default 90 %, z = 1.645)."""
    k = np.asarray(k, dtype=np.float64)
    n = np.asarray(n, dtype=np.float64)
    safe = np.where(n > 0, n, 1.0)
    ph = k / safe
    den = 1 + z * z / safe
    centre = (ph + z * z / (2 * safe)) / den
    half = z * np.sqrt(ph * (1 - ph) / safe + z * z / (4 * safe * safe)) / den
    lo = np.where(n > 0, centre - half, 0.0)
    hi = np.where(n > 0, centre + half, 1.0)
    return lo, hi
