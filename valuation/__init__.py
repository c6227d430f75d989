"""Valuation: the questions users ask of a compiled model, answered from solved value functions.

Sits on the solver and is what the gRPC server and the command line call. Solve a model once
(:func:`~stateworth.valuation.solved.solve_model` -> :class:`Solved`: every reward stream, every
posterior draw of its factor tables, the long-run mix), keep the result with the model
(:mod:`.stored`), and ask, through a :class:`Valuer` or the query functions directly
(:mod:`.lookups`, :mod:`.contrasts`, :mod:`.cohorts`, :mod:`.changes`, :mod:`.marginal`,
:mod:`.longrun`):

* ``value`` of a state, ``contrast`` of two states and the named contrasts ``acquisition``,
  ``plan_change``, ``win_back``, ``engagement_change``;
* ``cohort_contrast`` (weights over states -> one figure) and ``campaign`` (joins by market x
  value per acquisition), with ``naive_comparison`` beside the honest figure;
* ``transition_change`` (an exact, warm-started re-solve after changing a factor), ``marginal``
  (one adjoint solve prices every transition and every factor entry);
* ``stationary`` and ``long_run`` (the long-run state mix including non-members), and
  :func:`readout` for experiments (two fitted models, same spec).
* :mod:`.summary`: the report's answers (values by tenure per plan and market, acquisitions by
  market beside the naive figures, upgrades, ranked marginal values, long-run figures), JSON-ready.

Every answer carries its unit (the model's currency, or member-months), the model version and,
with draws, a percentile interval. Figures are model-based estimates under the model's causal
assumptions, not accounting figures.
"""

from stateworth.valuation.answer import (CAUTION, Answer, ChangeResult, MarginalEntry, MarginalResult,
                                         ReadoutResult, percentile_interval)
from stateworth.valuation.change import TransitionChange, apply_change
from stateworth.valuation.readout import readout
from stateworth.valuation.solved import Settings, Solved, solve_model
from stateworth.valuation.valuer import Valuer

__all__ = ["CAUTION", "Answer", "ChangeResult", "MarginalEntry", "MarginalResult", "ReadoutResult", "Settings",
           "Solved", "TransitionChange", "Valuer", "apply_change", "percentile_interval", "readout",
           "solve_model"]
