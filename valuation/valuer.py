"""The :class:`Valuer`: one compiled model, its solved value functions, and the queries on them.

``Valuer.build(model)`` solves ``(I - beta P) V = r`` for every reward stream (money per period
in, money out: V(s) is the expected discounted sum of the stream from state s, cash timing as the
spec states) and, when ``model.draws`` holds posterior draws of factor tables, solves every draw
in one batched computation (see :mod:`.draws`). Queries are then lookups and differences of these
arrays; only transition changes, marginal values and finite horizons solve again.
"""

from __future__ import annotations

from typing import Any, Callable, Mapping, Sequence

import numpy as np

from stateworth.valuation.answer import Answer, ChangeResult, MarginalResult
from stateworth.valuation.change import TransitionChange

Coords = Mapping[str, "str | int"]
#: cohort weights: a dense ``(n,)`` array over states, a mapping flat index -> weight, or a
#: sequence of ``(coords, weight)`` pairs
Weights = "np.ndarray | Mapping[int, float] | Sequence[tuple[Coords, float]]"


class Valuer:
    """Solved value functions of one compiled model, answering valuation queries from memory.

    Attributes: ``model`` (the CompiledModel), ``version`` (``model.version``), ``streams``
    (reward streams solved, in order), ``solution`` (the solver's Solution for the point
    model: ``values`` ``(n, k)``), ``has_intervals`` (True when draws were solved),
    ``n_draws``. Build with :meth:`build`."""

    def __init__(self, model, solution, draw_values: np.ndarray | None, tol: float) -> None:
        raise NotImplementedError

    @classmethod
    def build(cls, model, *, tol: float = 1e-10, draws: bool = True,
              streams: Sequence[str] | None = None, chunk: int | None = None) -> "Valuer":
        """Solve every reward stream of ``model`` (or ``streams``) to relative residual ``tol``.

        With ``draws`` and a non-empty ``model.draws`` ({axis: (D, *table shape)}), also solve
        the D drawn models (each draw replaces the tables of the axes it names) in one batched
        computation, ``chunk`` draws at a time (default: as many as memory allows), warm-started
        from the point solution and sharing its preconditioner. Raises QueryError on an unknown
        stream or draws of the wrong shape."""
        raise NotImplementedError

    # ---- metadata -------------------------------------------------------------------------
    @property
    def version(self) -> str:
        return self.model.version

    @property
    def has_intervals(self) -> bool:
        raise NotImplementedError

    @property
    def n_draws(self) -> int:
        raise NotImplementedError

    def unit(self, stream: str) -> str:
        """``"member-months"`` for the member_months stream, else the model's currency."""
        raise NotImplementedError

    # ---- states ---------------------------------------------------------------------------
    def index(self, coords: Coords) -> int:
        """Flat state index of a full coordinate (one level on every axis). QueryError names an
        unknown axis or level, or a missing axis."""
        raise NotImplementedError

    def index_many(self, columns: Mapping[str, Sequence[str | int]]) -> np.ndarray:
        """Vectorised :meth:`index`: per axis an equal-length sequence of level names (or codes)
        -> ``(m,)`` int64 flat indices."""
        raise NotImplementedError

    def coords(self, state: int) -> dict[str, str]:
        """The levels of one state (inverse of :meth:`index`)."""
        raise NotImplementedError

    def counterpart(self, coords: Coords, status: str, **levels: str) -> dict[str, str]:
        """The state a status event leads to, at the same date: ``status`` replaced, each counter
        reset to 0 when the event (join, lapse or change of status) is in its ``reset_on``, else
        unchanged; cycles, fixed and chance axes unchanged unless given in ``levels``."""
        raise NotImplementedError

    # ---- lookups --------------------------------------------------------------------------
    def values(self, states: np.ndarray, stream: str, horizon: int | None = None) -> np.ndarray:
        """V at flat ``states`` ``(m,)`` -> ``(m,)`` (money or member-months). ``horizon``: the
        H-period value, solved on first use and cached."""
        raise NotImplementedError

    def draw_values(self, states: np.ndarray, stream: str, horizon: int | None = None) -> np.ndarray | None:
        """V at ``states`` under each posterior draw: ``(D, m)``, or None without draws."""
        raise NotImplementedError

    def value(self, coords: Coords, stream: str = "revenue", horizon: int | None = None,
              level: float = 0.9) -> Answer:
        """V(s) of one state, with a percentile interval at ``level`` when the model has draws."""
        raise NotImplementedError

    # ---- contrasts ------------------------------------------------------------------------
    def contrast(self, before: Coords, after: Coords, stream: str = "revenue", horizon: int | None = None,
                 level: float = 0.9) -> Answer:
        """V(after) - V(before). The two states must agree on every fixed axis (QueryError names
        the axis otherwise): a fixed axis never changes, so no move can cross it."""
        raise NotImplementedError

    def acquisition(self, coords: Coords, plan: str, stream: str = "revenue", horizon: int | None = None,
                    level: float = 0.9) -> Answer:
        """Value of acquiring a non-member: V(member counterpart on ``plan``) - V(non-member state).
        The counterpart is :meth:`counterpart` with the join event (tenure-like counters reset as
        the spec's ``reset_on`` says). QueryError if ``coords`` is a member, ``plan`` is not a
        plan, or ``plan`` is not sold at the state's fixed levels."""
        raise NotImplementedError

    def plan_change(self, coords: Coords, to_plan: str, stream: str = "revenue", horizon: int | None = None,
                    level: float = 0.9) -> Answer:
        """Upgrade or downgrade of a member: V(same state on ``to_plan``) - V(state), counters reset
        where the spec resets them on a change of status."""
        raise NotImplementedError

    def win_back(self, coords: Coords, to_plan: str, stream: str = "revenue", horizon: int | None = None,
                 level: float = 0.9) -> Answer:
        """Winning back a former member: like :meth:`acquisition`, but the state's status must be
        a former-member level (a non-member level that members can move into)."""
        raise NotImplementedError

    def engagement_change(self, coords: Coords, axis: str, to_level: str, stream: str = "revenue",
                          horizon: int | None = None, level: float = 0.9) -> Answer:
        """Lifting (or lowering) a chance axis such as an engagement band: V(state with ``axis`` at
        ``to_level``) - V(state)."""
        raise NotImplementedError

    # ---- cohorts --------------------------------------------------------------------------
    def weights_vector(self, weights: Any) -> np.ndarray:
        """Cohort weights -> ``(n,)`` normalised to sum 1. QueryError on negative, non-finite or
        all-zero weights, naming the entry."""
        raise NotImplementedError

    def cohort_contrast(self, weights: Any, after: Callable[[dict[str, str]], Mapping[str, str]] | Mapping[str, str],
                        stream: str = "revenue", horizon: int | None = None, level: float = 0.9) -> Answer:
        """mu . (V(after(s)) - V(s)) for cohort weights mu (normalised to sum 1). ``after`` maps a
        state's coordinates to the state after the move, or is a mapping of axis -> level applied
        to every state (a status change moves counters as :meth:`counterpart` does)."""
        raise NotImplementedError

    def campaign(self, joins_by_market: Mapping[str, float], plan: str, stream: str = "revenue", *,
                 weights: Any = None, axis: str | None = None, horizon: int | None = None,
                 level: float = 0.9) -> Answer:
        """Value of a campaign: sum over markets of incremental joins x value per acquisition.

        ``axis``: the fixed axis whose levels key ``joins_by_market`` (default the first fixed
        axis). Value per acquisition in a market: the acquisition contrast onto ``plan`` averaged
        over the joiners' source states, ``weights`` restricted to the market (default the
        long-run mix of never-member states of the market, i.e. non-member levels no member moves
        into)."""
        raise NotImplementedError

    def naive_comparison(self, coords: Coords, plan: str, stream: str = "revenue") -> dict[str, Any]:
        """The shortcut figures beside the honest one, for a non-member state and a plan:
        ``member_value`` V(s+) (the usual lifetime-value shortcut), ``honest`` V(s+) - V(s),
        ``one_period`` the stream's cash in one member period at s+, ``gap_ratio`` member_value /
        honest, plus unit, version and a caution."""
        raise NotImplementedError

    # ---- changes and marginal values -------------------------------------------------------
    def transition_change(self, change: TransitionChange, stream: str = "revenue", weights: Any = None,
                          level: float = 0.9) -> ChangeResult:
        """Exact effect of ``change`` (see :mod:`.change`): re-solve the changed model warm from the
        current values; per-state delta and, with ``weights``, the cohort-weighted delta; with
        draws, the same change applied to every draw and re-solved in one batch for intervals."""
        raise NotImplementedError

    def marginal(self, weights: Any, stream: str = "revenue", top: int = 20) -> MarginalResult:
        """Marginal values for J = mu . V: one adjoint solve (I - beta P^T) lambda = mu gives
        dJ/dP_ij = beta lambda_i V_j, and, chained through the factor product (a vector-Jacobian
        product of the operator), dJ/dT for every factor-table entry; ``top`` entries ranked by the
        value of +1 point with proportional renormalisation."""
        raise NotImplementedError

    # ---- long run --------------------------------------------------------------------------
    def stationary(self, fixed_weights: Mapping[str, float] | None = None) -> np.ndarray:
        """Long-run state distribution pi ``(n,)`` (pi P = pi, sum 1), members and non-members.
        Fixed axes split the chain into blocks; each block's stationary distribution is weighted
        by ``fixed_weights`` (level of the first fixed axis -> weight; default equal)."""
        raise NotImplementedError

    def long_run(self, weights: Any = None, fixed_weights: Mapping[str, float] | None = None) -> dict[str, Any]:
        """``member_share``: long-run share of periods spent as a member (pi over member states);
        ``member_share_by_plan``; ``expected_member_months``: mu . V_member_months, the discounted
        expected member-months from the cohort ``weights`` (default pi); with draws, intervals."""
        raise NotImplementedError
