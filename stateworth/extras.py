"""Optional parts of stateworth and the packages they need.

A lean install (``pip install stateworth``) holds what the gRPC client, the server answering
stored values, and the sparse solves of small and medium grids need. The rest comes as extras:

* ``solve``: JAX, for the structured operator (large grids, posterior draws of large grids,
  marginal values of large grids, sharded solves);
* ``fit``: DuckDB and pyarrow, for panels (check, fit, simulate, backtest);
* ``report``: matplotlib and jinja2, for the HTML report;
* ``spark``: pyspark, for ``fit --engine spark``;
* ``db``: the ADBC PostgreSQL driver, for panels read straight from a database;
* ``all``: everything above (what ``make`` installs).
"""

from __future__ import annotations

import importlib
from types import ModuleType

from stateworth.errors import StateworthError


class MissingExtraError(StateworthError):
    """A feature needs a package that is not installed; the message says which extra brings it."""


def need(module: str, extra: str, what: str) -> ModuleType:
    """Import ``module``, or raise :class:`MissingExtraError` saying that ``what`` needs the
    ``extra`` (``pip install 'stateworth[extra]'``)."""
    try:
        return importlib.import_module(module)
    except ImportError:
        raise MissingExtraError(f"{what} needs the package '{module.split('.')[0]}', which is not installed; "
                                f"install it with: pip install 'stateworth[{extra}]'") from None
