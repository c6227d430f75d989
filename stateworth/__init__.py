"""stateworth: value customer-state moves with discounted Markov chains.

Importing the package is light: it loads neither JAX nor the data engines, so the gRPC client,
``stateworth --help`` and lookups of stored values start quickly. The numerical layers switch
JAX to float64 where they make arrays (:func:`stateworth.config.float64`).
"""

from stateworth.errors import StateworthError
from stateworth.version import __version__

__all__ = ["StateworthError", "__version__"]
