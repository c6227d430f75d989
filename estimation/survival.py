"""Retention curves: the Kaplan-Meier product-limit estimate, and the chain's counterpart.

Durations are whole periods after joining. A joiner observed to lapse ``d`` periods after
joining has an event at ``d``; one still a member at its last observed period, ``d`` periods
after joining, is censored at ``d`` (it survived ``d``). At duration ``k`` the accounts at risk
are those with ``d >= k`` and the events those lapsing at ``k``; the Kaplan-Meier estimate of
the share still a member ``k`` periods after joining is (Kaplan & Meier 1958, see
docs/references.md)

    S(k) = prod_{j <= k} (1 - events_j / at_risk_j).

The chain's counterpart for the same joiners: with ``s_k(i)`` the probability that a member in
state ``i`` is still a member after ``k`` more periods (``s_0 = 1``, ``s_k = P (m * s_{k-1})``,
``m`` the member indicator), a joiner starting in state ``i`` and followed for ``h`` periods
is expected at risk at ``k <= h`` with probability ``s_{k-1}(i)`` and to lapse at ``k`` with
``s_{k-1}(i) - s_k(i)``. The predicted curve is the product-limit of those expected counts,
so it weighs the joiners as the estimate does (the same join states and follow-up times).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np


@dataclass(frozen=True)
class Curve:
    """At duration ``k = 1..len``: ``at_risk[k-1]``, ``events[k-1]``, ``survival[k-1]``."""

    at_risk: np.ndarray
    events: np.ndarray
    survival: np.ndarray


def product_limit(at_risk: np.ndarray, events: np.ndarray) -> np.ndarray:
    """``prod_{j <= k} (1 - events_j / at_risk_j)`` along the last axis (a duration with no one
    at risk leaves the curve where it was)."""
    at_risk = np.asarray(at_risk, dtype=np.float64)
    events = np.asarray(events, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        h = np.where(at_risk > 0, events / np.where(at_risk > 0, at_risk, 1.0), 0.0)
    return np.cumprod(1.0 - h, axis=-1)


def kaplan_meier(duration: np.ndarray, event: np.ndarray, count: np.ndarray, horizon: int) -> Curve:
    """The Kaplan-Meier curve at durations ``1..horizon`` from grouped observations: ``count``
    accounts with ``duration`` (periods, >= 0) and ``event`` (True: lapsed then; False:
    censored then)."""
    d = np.asarray(duration, dtype=np.int64)
    e = np.asarray(event, dtype=bool)
    c = np.asarray(count, dtype=np.float64)
    ks = np.arange(1, horizon + 1)
    # at risk at k: every account with d >= k (events and censored alike)
    by_d = np.bincount(np.clip(d, 0, horizon + 1), weights=c, minlength=horizon + 2)
    at_risk = np.cumsum(by_d[::-1])[::-1][ks]
    ev = np.bincount(np.clip(d[e], 0, horizon + 1), weights=c[e], minlength=horizon + 2)[ks]
    return Curve(at_risk, ev, product_limit(at_risk, ev))


def member_survival(pull_back: Callable[[np.ndarray], np.ndarray], member: np.ndarray, horizon: int) -> np.ndarray:
    """``s_k`` for ``k = 0..horizon`` as rows of ``(horizon + 1, n)``: the probability that a
    member in each state stays a member through the next k periods (``pull_back(v) = P v``;
    ``member`` the ``(n,)`` member indicator of each state)."""
    m = np.asarray(member, dtype=np.float64)
    out = np.empty((horizon + 1, len(m)))
    out[0] = 1.0
    for k in range(1, horizon + 1):
        out[k] = pull_back(m * out[k - 1])
    return out


def expected_curve(s: np.ndarray, state: np.ndarray, follow: np.ndarray, count: np.ndarray) -> Curve:
    """The chain's curve for joiners grouped as ``count`` people starting in flat ``state``,
    followed for ``follow`` periods, from the survival rows ``s`` of :func:`member_survival`
    (durations ``1..len(s) - 1``)."""
    horizon = s.shape[0] - 1
    ks = np.arange(1, horizon + 1)
    under = (np.asarray(follow)[None, :] >= ks[:, None]) * np.asarray(count, dtype=np.float64)[None, :]
    alive = s[:-1, state]  # (horizon, groups): s_{k-1}
    lapse = alive - s[1:, state]
    at_risk = (under * alive).sum(axis=1)
    events = (under * lapse).sum(axis=1)
    return Curve(at_risk, events, product_limit(at_risk, events))
