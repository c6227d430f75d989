"""Propensity bands: a logistic score of being a member, cut into quantile bands.

The model is ``P(member | x) = 1 / (1 + exp(-(b0 + x . b)))`` over the panel rows (members and
former members; people who never joined are not in a panel), fitted by Newton's method (IRLS):
``b <- b + (X' W X)^-1 X' (y - p)`` with ``W = diag(p (1 - p))``, in JAX. The bands cut the
linear score ``eta = b0 + x . b`` at its empirical quantiles over the rows (band j holds
``c_j <= eta < c_{j+1}``), so each band holds about the same number of rows; the band then
enters the grid as a chance axis with its own estimated kernel.

Balance: the standardised mean difference of each covariate between member and non-member
rows within a band, ``(mean_1 - mean_0) / sqrt((var_1 + var_0) / 2)``; below 0.1 is commonly
read as balanced (Austin 2011, see docs/references.md).
"""

from __future__ import annotations

from dataclasses import dataclass

import jax
import jax.numpy as jnp
import numpy as np

from stateworth.errors import PanelError
from stateworth import config

#: The 0.1 rule of thumb for a balanced covariate (common practice; Austin 2011).
SMD_BALANCED = 0.1


@dataclass(frozen=True)
class LogitFit:
    """Coefficients ``coef`` = (intercept, one per covariate), standard errors from the inverse
    Hessian, Newton iterations, and whether the step fell below tolerance."""

    names: tuple[str, ...]
    coef: np.ndarray
    se: np.ndarray
    iterations: int
    converged: bool

    def eta(self, x: np.ndarray) -> np.ndarray:
        """Linear score ``b0 + x . b`` for covariate rows ``x`` of shape (n, k)."""
        return self.coef[0] + np.asarray(x, dtype=np.float64) @ self.coef[1:]


@jax.jit
def _newton(X, y, max_iter, tol):
    k = X.shape[1]

    def step(state):
        b, it, _ = state
        eta = X @ b
        p = jax.nn.sigmoid(eta)
        w = p * (1 - p)
        H = (X * w[:, None]).T @ X
        g = X.T @ (y - p)
        d = jnp.linalg.solve(H, g)
        return b + d, it + 1, jnp.max(jnp.abs(d))

    def cond(state):
        _, it, delta = state
        return (it < max_iter) & (delta > tol)

    b, it, delta = jax.lax.while_loop(cond, step, (jnp.zeros(k), 0, jnp.inf))
    p = jax.nn.sigmoid(X @ b)
    H = (X * (p * (1 - p))[:, None]).T @ X
    return b, jnp.sqrt(jnp.diag(jnp.linalg.inv(H))), it, delta


def fit_logit(x: np.ndarray, y: np.ndarray, names: tuple[str, ...] = (), *, max_iter: int = 50,
              tol: float = 1e-10, where: str = "propensity") -> LogitFit:
    """Logistic regression of ``y`` (0/1, shape (n,)) on ``x`` (n, k) with an intercept."""
    config.use_jax()
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    if x.ndim != 2 or len(x) != len(y):
        raise ValueError("x must be (n, k) and y (n,)")
    if y.min() == y.max():
        raise PanelError("every panel row has the same membership; a propensity score needs members and "
                         "former members", where=where)
    X = np.column_stack([np.ones(len(x)), x])
    b, se, it, delta = _newton(jnp.asarray(X), jnp.asarray(y), max_iter, tol)
    b = np.asarray(b)
    if not np.all(np.isfinite(b)):
        raise PanelError("the logistic fit did not converge (covariates separate members from non-members "
                         "perfectly, or are collinear); drop or combine covariates", where=where)
    return LogitFit(tuple(names) or tuple(f"x{i}" for i in range(x.shape[1])), b, np.asarray(se),
                    int(it), bool(float(delta) <= tol))


def band_cuts(eta: np.ndarray, bands: int) -> np.ndarray:
    """The ``bands - 1`` cut points of the score: midpoints between neighbouring distinct sorted
    scores at the quantiles j / bands, so that no row sits on a cut (a cut on a row's score would
    put it in either band depending on the last bit of the arithmetic, and so on the engine).
    Where the score at a quantile is tied, the cut moves to the gap above the tied value (below
    it at the top); cuts never decrease, and two equal cuts leave a band empty."""
    s = np.sort(np.asarray(eta, dtype=np.float64))
    n = len(s)
    u = np.unique(s)
    mids = 0.5 * (u[:-1] + u[1:])  # every gap between distinct scores
    cuts: list[float] = []
    for j in range(1, bands):
        i = min(max(int(round(j * n / bands)), 1), n - 1)
        if len(mids) == 0:
            cuts.append(float(s[i]))
            continue
        g = int(np.searchsorted(u, s[i], side="left"))  # u[g] == s[i]; gap g-1 lies below it
        g = g - 1 if s[i - 1] < s[i] else min(g, len(mids) - 1)
        if cuts and mids[g] < cuts[-1]:
            g = int(np.searchsorted(mids, cuts[-1], side="left"))
        cuts.append(float(mids[g]))
    return np.array(cuts)


def band_of(eta: np.ndarray, cuts: np.ndarray) -> np.ndarray:
    """Band index of each score: the number of cuts at or below it."""
    return np.searchsorted(cuts, eta, side="right").astype(np.int64)


def band_sql(fit: LogitFit, cols: list[str], cuts: np.ndarray, null_col: str | None = None) -> str:
    """The band as an SQL expression over the design columns ``cols`` (column names or SQL
    expressions, one per coefficient after the intercept; same arithmetic order as
    :meth:`LogitFit.eta`, so every engine puts a row in the same band). NULL where ``null_col``
    (default ``cols[0]``) is NULL: a gap row has no covariates."""
    # exponent notation: a DOUBLE literal on every engine (Spark reads 0.25 as a DECIMAL)
    lit = lambda x: "%.17e" % float(x)  # noqa: E731
    eta = lit(fit.coef[0]) + "".join(f" + {lit(b)} * {c}" for b, c in zip(fit.coef[1:], cols))
    whens = " ".join(f"WHEN ({eta}) < {lit(c)} THEN {j}" for j, c in enumerate(cuts))
    return f"CASE WHEN {null_col or cols[0]} IS NULL THEN NULL {whens} ELSE {len(cuts)} END"


@dataclass(frozen=True)
class Design:
    """The score's design columns from the panel's covariates: a numeric covariate is one
    column; a categorical one with values ``v_0 < v_1 < ...`` (sorted) is one indicator per
    value after the first (the reference). ``names[i]`` is ``"age"`` or ``"channel=web"``;
    ``source[i]`` the covariate index and ``code[i]`` the value code (-1 for numeric)."""

    names: tuple[str, ...]
    source: tuple[int, ...]
    code: tuple[int, ...]

    @classmethod
    def of(cls, covariates: tuple[str, ...], levels: dict[str, list[str]]) -> "Design":
        names, source, code = [], [], []
        for j, c in enumerate(covariates):
            if c in levels:
                for k, v in enumerate(levels[c][1:], start=1):
                    names.append(f"{c}={v}")
                    source.append(j)
                    code.append(k)
            else:
                names.append(c)
                source.append(j)
                code.append(-1)
        return cls(tuple(names), tuple(source), tuple(code))

    def matrix(self, v: np.ndarray) -> np.ndarray:
        """``(n, len(names))`` design rows from covariate rows ``v`` (n, covariates) as coded in
        the panel (numbers, or value codes of categorical covariates)."""
        v = np.asarray(v, dtype=np.float64)
        cols = [v[:, j] if k < 0 else (v[:, j] == k).astype(np.float64) for j, k in zip(self.source, self.code)]
        return np.column_stack(cols) if cols else np.zeros((len(v), 0))

    def sql(self, cols: list[str]) -> list[str]:
        """The design columns as SQL over the covariate columns ``cols`` (one per covariate)."""
        return [cols[j] if k < 0 else f"(CASE WHEN {cols[j]} = {k} THEN 1.0 ELSE 0.0 END)"
                for j, k in zip(self.source, self.code)]


def smd_by_band(x: np.ndarray, member: np.ndarray, band: np.ndarray, bands: int) -> np.ndarray:
    """``(bands, k)`` standardised mean differences (member minus non-member rows); NaN where a
    band lacks one of the groups."""
    x = np.asarray(x, dtype=np.float64)
    out = np.full((bands, x.shape[1]), np.nan)
    for b in range(bands):
        sel = band == b
        m1, m0 = sel & (member == 1), sel & (member == 0)
        if m1.sum() < 2 or m0.sum() < 2:
            continue
        v = (x[m1].var(axis=0, ddof=1) + x[m0].var(axis=0, ddof=1)) / 2
        out[b] = (x[m1].mean(axis=0) - x[m0].mean(axis=0)) / np.sqrt(np.where(v > 0, v, np.nan))
    return out


def smd(x: np.ndarray, member: np.ndarray) -> np.ndarray:
    """Standardised mean difference over all rows, ``(k,)``."""
    return smd_by_band(x, member, np.zeros(len(x), dtype=np.int64), 1)[0]
