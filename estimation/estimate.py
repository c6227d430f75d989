"""Factor tables from counts: a hierarchical Dirichlet posterior over pooled cells.

For a factor with counts ``C[g_1..g_k, a']`` (moves from the given cell into next level a'), the
cells are nested in coarser and coarser pools: level 0 is the cells, level 1 the cells summed
over one given axis, level 2 over two, ..., and the top level is everything pooled. Each level's
next-level distribution theta_j gets a Dirichlet prior ``alpha_j m_j`` centred on its parent,
``m_j`` = the parent's theta_{j+1} restricted to the moves allowed there (renormalised); the top
level is centred on the even spread over the allowed moves. Posterior means run top down:

    theta_j = (C_j + alpha_j m_j) / (n_j + alpha_j),        n_j = the level's moves per cell,

zero on moves the spec forbids because ``m_j`` is (MacKay & Peto 1995's hierarchical Dirichlet
smoothing; docs/references.md). Cells whose allowed moves differ (a plan not sold in a market)
pool by expectation maximisation rather than by plain sums (:func:`pool_counts`).

*Which axis is pooled first* is chosen by the data, not by the order ``given`` lists the axes:
at each level, the axis whose pooled siblings best predict each cell's moves (the largest
Dirichlet-multinomial marginal likelihood of the level's cells, the prior mean of a cell being
its siblings' pooled moves without its own: a leave-one-out predictive score) is pooled next.
An axis the moves do not depend on (calendar month for members) is then pooled first, so a
sparse cell borrows from cells that move alike rather than from the cells of other engagement
bands.

*Strength* ``alpha_j`` (pseudo-moves), one per parent cell of each level (the pool its children
form): given, or its posterior on a log grid,

    p(alpha | C) ~ L_g(alpha) x L_j(alpha)^(1/G_j) x alpha^(-1/2),

``L_g`` the Dirichlet-multinomial marginal likelihood of that parent's children, ``L_j`` the
same over the whole level's G_j parents with moves (:func:`strength_log_prior` for the last
factor). ``L_j^(1/G_j)`` is the strength an average parent of the level shows, weighing as much
as one parent: a parent with few moves takes about the level's strength, and one whose children
clearly move apart (one market whose former members come back on another plan) gets its own.
The point table uses each posterior's mode.
*Draws* carry the doubt about the strengths and the parents (Gelman et al. 2013, section 5.3:
hyperparameters drawn from their marginal posterior on a grid, then the parameters given them):
per draw, every strength is drawn from its grid posterior, and top down
``theta_j ~ Dirichlet(E_j + alpha_j m_j)`` with ``m_j`` from the parent's *drawn* theta and
``E_j`` what the level's children tell it (:func:`_effective_counts`: each child counts as
``n (1 + alpha) / (n + alpha)`` moves, its Dirichlet-multinomial worth; the cells keep their own
counts). Within one account, successive moves are independent given the state under the model's
Markov assumption, so moves, not accounts, are the unit of the likelihood; heterogeneity the
state does not capture would make the intervals too narrow (see README, "Assumptions and cautions").
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.special import gammaln

from stateworth.rules.factors import Factor, masked_uniform

#: Search grid for the prior strength (pseudo-moves per cell), 10 points a decade: up to 10^6,
#: far above any cell's moves, so that cells which move alike can be pooled all but completely.
STRENGTH_GRID = np.logspace(-1, 6, 71)


@dataclass
class FactorFit:
    """A fitted factor: ``table`` (posterior mean, factor shape), ``counts`` (same shape),
    ``prior`` (the cells' prior mean m_0), ``strength`` (the cells' typical alpha_0), ``draws``
    ``(D, *shape)`` or None. ``pooling``: the given-axis positions in the order they are pooled
    (first = the cells' parent); ``strengths``: per level the median over its parent cells of
    their strength (posterior mode; cells first, top last); ``strength_ranges``: per level the
    5 % and 95 % points of those strengths over the parent cells (``None`` for a given strength)."""

    axis: str
    table: np.ndarray
    counts: np.ndarray
    prior: np.ndarray
    strength: float
    draws: np.ndarray | None = None
    pooling: tuple[int, ...] = ()
    strengths: tuple[float, ...] = ()
    strength_ranges: tuple[tuple[float, float] | None, ...] = field(default_factory=tuple)
    cell_strength: np.ndarray | None = None  # each cell's alpha_0 (its parent's), given-cell shape

    @property
    def cell_moves(self) -> np.ndarray:
        return self.counts.sum(axis=-1)

    @property
    def prior_dominated(self) -> np.ndarray:
        """Cells whose prior weight exceeds their data (n < alpha), shape = the given cells."""
        return self.cell_moves < (self.strength if self.cell_strength is None else self.cell_strength)


def allowed_mask(spec, factor: Factor) -> np.ndarray:
    """Boolean ``factor.shape``: the moves the spec's rules allow in every case of the cell."""
    return masked_uniform(spec, factor) > 0


def _normalise(x: np.ndarray, fallback: np.ndarray) -> np.ndarray:
    """Rows of ``x`` scaled to sum 1; rows with no mass take ``fallback``'s (normalised)."""
    tot = x.sum(axis=-1, keepdims=True)
    fb = fallback / np.maximum(fallback.sum(axis=-1, keepdims=True), 1e-300)
    return np.where(tot > 0, x / np.where(tot > 0, tot, 1.0), fb)


def _pool(a: np.ndarray, axis: int, how=np.sum) -> np.ndarray:
    return how(a, axis=axis, keepdims=True)


#: EM steps of :func:`pool_counts` at most, and the change of the pooled distribution that ends them.
POOL_STEPS = 200
POOL_TOL = 1e-10


def pool_counts(counts: np.ndarray, allowed: np.ndarray, axis: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pool cells along ``axis`` when their allowed moves differ: ``(pooled counts, pooled
    allowed, each cell's completed counts)``.

    A cell that may not make move a (a plan not sold in its market) shows the parent's
    distribution restricted to its allowed moves, ``theta_a / Z_c`` with ``Z_c`` the parent's
    mass on them. Summing its moves into the parent as they are would dilute the parent's share
    of the moves other cells may make. Instead the cell's moves are completed by expectation
    maximisation for a truncated multinomial: a cell with n_c moves stands for n_c / Z_c draws
    from the parent, of which ``n_c theta_a / Z_c`` fell on each move a it may not make; the
    pooled counts with those completed are the parent's counts. Its fixed point is the maximum
    likelihood parent of Luce's choice model with varying choice sets (Hunter 2004's MM
    algorithm; docs/references.md). Cells that share their allowed moves pool as plain sums."""
    A_par = _pool(allowed, axis, np.any)
    P = _pool(counts, axis)
    missing = A_par & ~allowed
    n = counts.sum(axis=-1, keepdims=True)
    if not (missing & (n > 0)).any():
        return P, A_par, counts
    theta = _normalise(np.where(A_par, P, 0.0), A_par.astype(np.float64))
    done = counts
    for _ in range(POOL_STEPS):
        Z = np.where(allowed, theta, 0.0).sum(axis=-1, keepdims=True)
        extra = np.where(missing & (n > 0), n / np.maximum(Z, 1e-300) * theta, 0.0)
        done = counts + extra
        P = _pool(done, axis)
        new = _normalise(np.where(A_par, P, 0.0), A_par.astype(np.float64))
        step = float(np.max(np.abs(new - theta)))
        theta = new
        if step < POOL_TOL:
            break
    return P, A_par, done


def log_marginal(counts: np.ndarray, m: np.ndarray, alpha) -> np.ndarray | float:
    """Dirichlet-multinomial log marginal likelihood of all cells, up to a constant in alpha:
    ``sum_cells [lgamma(alpha) - lgamma(n + alpha) + sum_a' (lgamma(C + alpha m) - lgamma(alpha m))]``.
    ``alpha`` a number (-> float) or an array of candidates (-> one value per candidate)."""
    c = counts.reshape(-1, counts.shape[-1])
    mm = np.broadcast_to(m, counts.shape).reshape(c.shape)
    keep = c.sum(axis=1) > 0  # cells without moves add 0 for every alpha
    c, mm = c[keep], mm[keep]
    n = c.sum(axis=1)
    pos = mm > 0
    al = np.atleast_1d(np.asarray(alpha, dtype=np.float64))
    out = np.empty(len(al))
    for i, a in enumerate(al):
        am = np.where(pos, a * mm, 1.0)
        terms = np.where(pos, gammaln(c + am) - gammaln(am), 0.0).sum(axis=1)
        out[i] = (gammaln(a) - gammaln(n + a) + terms).sum()
    return float(out[0]) if np.ndim(alpha) == 0 else out


def cell_log_marginal(counts: np.ndarray, m: np.ndarray, grid: np.ndarray) -> np.ndarray:
    """Each cell's Dirichlet-multinomial log marginal likelihood (up to a constant in alpha) at
    every strength on ``grid``: ``(*cells, len(grid))``, 0 for cells without moves."""
    shape = counts.shape[:-1]
    c = counts.reshape(-1, counts.shape[-1])
    mm = np.broadcast_to(m, counts.shape).reshape(c.shape)
    keep = np.flatnonzero(c.sum(axis=1) > 0)
    out = np.zeros((c.shape[0], len(grid)))
    c, mm = c[keep], mm[keep]
    n = c.sum(axis=1)
    pos = mm > 0
    for i, a in enumerate(grid):
        am = np.where(pos, a * mm, 1.0)
        out[keep, i] = gammaln(a) - gammaln(n + a) + np.where(pos, gammaln(c + am) - gammaln(am), 0.0).sum(axis=1)
    return out.reshape(shape + (len(grid),))


def strength_log_prior(grid: np.ndarray) -> np.ndarray:
    """Log prior weight of each strength on the (log-spaced) grid: ``p(log alpha) ~ alpha^(-1/2)``,
    Gelman et al. (2013, eq. 5.9)'s ``p(a, b) ~ (a + b)^(-5/2)`` for a beta-binomial written for
    the strength ``alpha = a + b`` at a given mean: a mild lean towards less pooling that keeps the
    posterior proper as alpha grows, where the likelihood of cells that move alike flattens out."""
    return -0.5 * np.log(grid)


def sibling_mean(counts: np.ndarray, allowed: np.ndarray, axis: int) -> np.ndarray:
    """Prior mean of each cell from its siblings along ``axis`` (their pooled moves without the
    cell's own, completed where allowed moves differ (:func:`pool_counts`), restricted to the
    cell's allowed moves); the even spread over the allowed moves where the siblings show none."""
    P, _, done = pool_counts(counts, allowed, axis)
    return _normalise(np.where(allowed, P - done, 0.0), allowed.astype(np.float64))


def pooling_order(counts: np.ndarray, allowed: np.ndarray, strength: float | str = "auto",
                  grid: np.ndarray = STRENGTH_GRID) -> tuple[int, ...]:
    """Given-axis positions in the order they are pooled: at each level greedily the axis whose
    siblings best predict the level's cells (largest leave-one-out marginal likelihood, at the
    empirical-Bayes strength or the given one). Axes of size 1 are never pooled."""
    k = counts.ndim - 1
    left = [i for i in range(k) if counts.shape[i] > 1]
    order: list[int] = []
    C, A = counts, allowed
    while left:
        if len(left) == 1 or C.sum() == 0:
            best = left[0]
        else:
            scores = []
            for i in left:
                m = sibling_mean(C, A, i)
                ll = log_marginal(C, m, grid if strength == "auto" else float(strength))
                scores.append(float(np.max(ll)))
            best = left[int(np.argmax(scores))]
        order.append(best)
        left.remove(best)
        C, A, _ = pool_counts(C, A, best)
    return tuple(order)


def _levels(counts: np.ndarray, allowed: np.ndarray, order: tuple[int, ...]) -> list[tuple[np.ndarray, np.ndarray]]:
    """(counts, allowed) of every level, cells first, keepdims shapes (size 1 on pooled axes)."""
    out = [(counts, allowed)]
    for i in order:
        C, A, _ = pool_counts(*out[-1], i)
        out.append((C, A))
    return out


def _effective_counts(levels: list[tuple[np.ndarray, np.ndarray]], order: tuple[int, ...],
                      alphas: list[np.ndarray]) -> list[np.ndarray]:
    """Per draw, what each level's cells tell their parent: ``(D, *level shape)`` counts.

    Given alpha, a cell's n moves are Dirichlet-multinomial around its parent: their share's
    variance is the multinomial one times ``(n + alpha) / (1 + alpha)`` (Mosimann 1962,
    docs/references.md), so for the parent the cell is worth ``n (1 + alpha) / (n + alpha)``
    moves: all n when the cells of a pool move alike (alpha large), about one when they differ
    (alpha small: each cell is one draw of the parent). Pooling the cells' moves at that weight
    (completed where allowed moves differ, :func:`pool_counts`) gives the parent's counts, level by
    level from the cells up; the cells keep their own counts."""
    out = [np.broadcast_to(levels[0][0], (len(alphas[0]),) + levels[0][0].shape)]
    for j, i in enumerate(order):
        C = out[-1]
        n = C.sum(axis=-1, keepdims=True)
        al = alphas[j][..., None]
        w = np.where(n > 0, (1.0 + al) / (n + al), 0.0)
        P, _, _ = pool_counts(C * w, levels[j][1][None], i + 1)
        out.append(P)
    return out


def posterior(counts: np.ndarray, allowed: np.ndarray, strength: float | str = "auto",
              n_draws: int = 0, rng: np.random.Generator | None = None, axis: str = "",
              grid: np.ndarray = STRENGTH_GRID) -> FactorFit:
    """Hierarchical posterior mean (and draws) of a factor from its counts (see module doc).
    Counts on disallowed moves must have been removed by the caller (see :func:`forbidden_counts`)."""
    counts = np.asarray(counts, dtype=np.float64)
    allowed = np.broadcast_to(np.asarray(allowed, dtype=bool), counts.shape)
    auto = strength == "auto"
    if not auto and not float(strength) > 0:
        raise ValueError("prior strength must be > 0")
    order = pooling_order(counts, allowed, strength, grid)
    levels = _levels(counts, allowed, order)
    L = len(levels)
    alphas: list[np.ndarray] = [np.empty(0)] * L  # per parent cell (keepdims shape: 1 on the pooled axis)
    posts: list[np.ndarray | None] = [None] * L  # per parent cell, the strength's posterior weights on the grid
    priors: list[np.ndarray] = [np.empty(0)] * L
    theta = None
    for j in reversed(range(L)):  # top down: each level's prior is its parent's posterior mean
        C, A = levels[j]
        Af = A.astype(np.float64)
        m = _normalise(Af, Af) if theta is None else _normalise(np.where(A, theta, 0.0), Af)
        gshape = (1,) * (C.ndim - 1) if j == L - 1 else tuple(1 if i == order[j] else n
                                                               for i, n in enumerate(C.shape[:-1]))
        if auto:
            ll = cell_log_marginal(C, m, grid)
            groups = ll.sum(axis=tuple(range(ll.ndim - 1)), keepdims=True) if j == L - 1 else \
                ll.sum(axis=order[j], keepdims=True)  # one likelihood per parent cell
            G = max(1, int(((groups != 0).any(axis=-1)).sum()))  # parents whose children show moves
            lp = groups + ll.reshape(-1, len(grid)).sum(axis=0) / G + strength_log_prior(grid)
            post = np.exp(lp - lp.max(axis=-1, keepdims=True))
            posts[j] = post / post.sum(axis=-1, keepdims=True)
            alphas[j] = grid[np.argmax(lp, axis=-1)].reshape(gshape)
        else:
            alphas[j] = np.full(gshape, float(strength))
        al = alphas[j][..., None]
        theta = np.where(A, (C + al * m) / (C.sum(axis=-1, keepdims=True) + al), 0.0)
        theta = _normalise(theta, Af)
        priors[j] = m
    table = theta
    draws = None
    if n_draws:
        rng = rng or np.random.default_rng(0)
        D = int(n_draws)
        a = []
        for j in range(L):
            if posts[j] is None:
                a.append(np.broadcast_to(alphas[j], (D,) + alphas[j].shape))
                continue
            cdf = np.cumsum(posts[j], axis=-1)
            u = rng.random((D,) + alphas[j].shape + (1,))
            a.append(grid[np.minimum((u > cdf).sum(axis=-1), len(grid) - 1)])
        eff = _effective_counts(levels, order, a)
        th = None
        for j in reversed(range(L)):
            C, A = levels[j]
            Af = A.astype(np.float64)
            m = np.broadcast_to(_normalise(Af, Af), (D,) + C.shape) if th is None \
                else _normalise(np.where(A, th, 0.0), np.broadcast_to(Af, (D,) + C.shape))
            conc = eff[j] + a[j][..., None] * m
            g = np.where(conc > 0, rng.standard_gamma(np.where(conc > 0, conc, 1.0)), 0.0)
            # a row whose gammas all underflow (tiny concentrations) falls back to its prior mean
            th = _normalise(g, m)
        draws = th
    typical = [float(np.median(x)) for x in alphas]
    ranges = tuple(None if w is None else (float(np.quantile(x, 0.05)), float(np.quantile(x, 0.95)))
                   for x, w in zip(alphas, posts))
    return FactorFit(axis=axis, table=table, counts=counts, prior=priors[0], strength=typical[0], draws=draws,
                     pooling=order, strengths=tuple(typical), strength_ranges=ranges,
                     cell_strength=np.broadcast_to(alphas[0], counts.shape[:-1]))


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
