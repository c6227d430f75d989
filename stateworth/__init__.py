"""stateworth: value customer-state moves with discounted Markov chains.

Importing any part of the package imports :mod:`stateworth.config` first, which switches JAX to
float64. That is the only global setting in the project.
"""

from stateworth import config as _config  # noqa: F401  (float64 before any array is made)
from stateworth.errors import StateworthError

__version__ = "0.1.0"
__all__ = ["StateworthError", "__version__"]
