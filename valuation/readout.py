"""Experiment read-out: two fitted models (control and treatment arms, same spec).

The figure is the difference of cohort-weighted values, mu . V_treatment - mu . V_control, with
a percentile interval over independently paired posterior draws of the two arms (draw d of the
treatment with a random draw of the control), so both arms' uncertainty enters. Beside it, the
long-run member share and expected member-months under each arm.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from stateworth.errors import QueryError
from stateworth.valuation.answer import ReadoutResult, percentile_interval


def readout(control, treatment, weights: Any, stream: str = "revenue", level: float = 0.9,
            seed: int = 0) -> ReadoutResult:
    """Treatment minus control cohort-weighted value (both :class:`Valuer`), interval at ``level``.

    QueryError when the two models' specs differ (they must share the grid) or the weights are
    invalid. ``seed`` fixes the random pairing of draws. With draws in only one arm, the other
    arm enters at its point value."""
    if control.model.spec.canonical() != treatment.model.spec.canonical():
        raise QueryError("control and treatment models have different specs; a read-out compares two fits of the "
                         "same spec (same grid, rules and rewards)", field="treatment")
    j_c, j_t = control.solved.col(stream), treatment.solved.col(stream)
    if not 0.0 < float(level) < 1.0:
        raise QueryError(f"interval level must lie strictly between 0 and 1 (got {level})", field="level")
    mu = control.weights_vector(weights)
    vc = float(np.dot(mu, control.solved.values[:, j_c]))
    vt = float(np.dot(mu, treatment.solved.values[:, j_t]))
    dc = None if control.solved.draws is None else control.solved.draws[:, :, j_c] @ mu
    dt = None if treatment.solved.draws is None else treatment.solved.draws[:, :, j_t] @ mu
    interval = ci = ti = None
    if dc is not None:
        lo, hi = percentile_interval(dc, level)
        ci = (float(lo), float(hi))
    if dt is not None:
        lo, hi = percentile_interval(dt, level)
        ti = (float(lo), float(hi))
    if dc is not None or dt is not None:
        rng = np.random.default_rng(seed)
        # independent pairing: the arms were fitted on disjoint samples, so any pairing of their
        # draws is a draw from the joint posterior; shuffle to avoid accidental alignment
        if dc is not None and dt is not None:
            D = min(len(dc), len(dt))
            diff = rng.permutation(dt)[:D] - rng.permutation(dc)[:D]
        elif dt is not None:
            diff = dt - vc
        else:
            diff = vt - dc
        lo, hi = percentile_interval(diff, level)
        interval = (float(lo), float(hi))
    long_run = {"control": control.long_run(weights), "treatment": treatment.long_run(weights)}
    return ReadoutResult(value=vt - vc, unit=control.unit(stream), version=f"{control.version}..{treatment.version}",
                         stream=stream, control_value=vc, treatment_value=vt, interval=interval, level=float(level),
                         control_interval=ci, treatment_interval=ti, long_run=long_run)
