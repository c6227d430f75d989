"""The ``stateworth`` command line.

Each subcommand is one module in :mod:`stateworth.clients.commands` defining ``NAME``, ``HELP``,
``DESCRIPTION`` (with an example), ``add_arguments(parser)`` and ``run(args) -> int``. Modules are
discovered automatically; heavy imports (JAX) happen inside ``run`` so that ``--help`` is quick.

Exit codes: 0 fine; 1 a user error (bad spec, panel, option or request), printed on one line with
where and how to fix it; 2 an internal error, printed with a short pointer (set
``STATEWORTH_DEBUG=1`` for the traceback).
"""

from __future__ import annotations

import argparse
import importlib
import os
import pkgutil
import sys
import traceback

from stateworth.clients import commands as _commands


def _modules():
    mods = []
    for info in sorted(pkgutil.iter_modules(_commands.__path__), key=lambda i: i.name):
        if info.name.startswith("_"):
            continue
        mods.append(importlib.import_module(f"{_commands.__name__}.{info.name}"))
    order = getattr(_commands, "ORDER", [])
    mods.sort(key=lambda m: (order.index(m.NAME) if m.NAME in order else len(order), m.NAME))
    return mods


def build_parser() -> argparse.ArgumentParser:
    from stateworth.version import __version__  # package metadata only: --help stays quick

    parser = argparse.ArgumentParser(
        prog="stateworth",
        description="Value customer-state moves (acquisition, upgrade, engagement, win-back) as "
                    "differences of value functions of a Markov chain over customer states.",
        epilog="Run `stateworth COMMAND --help` for each command's options and an example. "
               "Figures are model-based estimates under stated causal assumptions, not accounting figures.")
    parser.add_argument("--version", action="version", version=f"stateworth {__version__}",
                        help="print the installed version of stateworth and exit")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for mod in _modules():
        p = sub.add_parser(mod.NAME, help=mod.HELP, description=getattr(mod, "DESCRIPTION", mod.HELP),
                           formatter_class=argparse.RawDescriptionHelpFormatter)
        mod.add_arguments(p)
        p.set_defaults(_run=mod.run)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "_run", None):
        parser.print_help()
        return 1
    from stateworth.errors import StateworthError
    try:
        return int(args._run(args) or 0)
    except StateworthError as e:
        print(f"error: {e}", file=sys.stderr)
        for extra in getattr(e, "problems", [])[1:]:
            print(f"error: {extra}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130
    except Exception as e:  # noqa: BLE001 - the one place internal errors are turned into exit 2
        if os.environ.get("STATEWORTH_DEBUG"):
            traceback.print_exc()
        print(f"internal error: {e.__class__.__name__}: {e} (this is a bug in stateworth; rerun with "
              "STATEWORTH_DEBUG=1 for the traceback and report it)", file=sys.stderr)
        return 2


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
