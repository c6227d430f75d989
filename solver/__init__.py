"""Solver: linear algebra on a compiled model's operator. Knows nothing of files or gRPC.

``solve(model_or_operator, rewards, ...) -> Solution`` is the entry point.
"""

from stateworth.solver.result import Solution, Status
from stateworth.solver.solve import METHODS, memory_needed, solve

__all__ = ["METHODS", "Solution", "Status", "memory_needed", "solve"]
