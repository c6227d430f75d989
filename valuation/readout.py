"""Experiment read-out: two fitted models (control and treatment arms, same spec).

The figure is the difference of cohort-weighted values, mu . V_treatment - mu . V_control, with
a percentile interval over independently paired posterior draws of the two arms (draw d of the
treatment with a random draw of the control), so both arms' uncertainty enters. Beside it, the
long-run member share and expected member-months under each arm.
"""

from __future__ import annotations

from typing import Any

from stateworth.valuation.answer import ReadoutResult


def readout(control, treatment, weights: Any, stream: str = "revenue", level: float = 0.9,
            seed: int = 0) -> ReadoutResult:
    """Treatment minus control cohort-weighted value (both :class:`Valuer`), interval at ``level``.

    QueryError when the two models' specs differ (they must share the grid) or the weights are
    invalid. ``seed`` fixes the random pairing of draws."""
    raise NotImplementedError
