"""One module per ``stateworth`` subcommand (discovered by :mod:`stateworth.clients.cli`).

``ORDER`` fixes the order in ``stateworth --help``; commands not listed come after, by name."""

ORDER = ["init", "check", "simulate", "fit", "backtest", "solve", "value", "compare", "change", "marginal",
         "readout", "report", "serve", "query", "demo"]
