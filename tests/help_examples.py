"""The `example:` lines of every command's DESCRIPTION, parsed by the real command-line parser.

Used by tests/test_cli_help.py (every example's options exist, its input paths are the demo's
or the repository's) and tests/test_demo.py (the demo writes every `demo-out/` path an example
reads)."""

from __future__ import annotations

import argparse
import shlex
from dataclasses import dataclass
from pathlib import Path

from stateworth.clients.cli import _modules, build_parser

ROOT = Path(__file__).resolve().parents[1]
#: Where `make demo` writes (clients/demo.py: run_demo's default output folder).
DEMO_OUT = "demo-out"
#: Options whose value is a file the command writes.
OUTPUT_DESTS = ("output", "save")
#: Options whose value is a secret or certificate the operator makes (never written by anything).
OPERATOR_DESTS = ("token_file", "admin_token_file", "tls_cert", "tls_key", "tls_ca")
PATH_SUFFIXES = (".toml", ".csv", ".parquet", ".json", ".token", ".pem", ".key", ".html")


@dataclass(frozen=True)
class Example:
    command: str  # the module's NAME
    text: str  # the example as written (continuation lines joined)
    args: argparse.Namespace
    inputs: tuple[tuple[str, str], ...]  # (option dest, path) read
    outputs: tuple[str, ...]  # paths written


def example_lines(description: str) -> list[str]:
    """The `stateworth ...` commands under the `example:` / `examples:` heading of a DESCRIPTION,
    with backslash continuations joined."""
    lines = description.splitlines()
    try:
        start = next(i for i, ln in enumerate(lines) if ln.strip() in ("example:", "examples:"))
    except StopIteration:
        return []
    out: list[str] = []
    for ln in lines[start + 1:]:
        if not ln.strip():
            continue
        if out and out[-1].endswith("\\"):
            out[-1] = out[-1][:-1].rstrip() + " " + ln.strip()
        else:
            out.append(ln.strip())
    return out


def _looks_like_path(value: str) -> bool:
    # a database URL (postgresql://...) names a server, not a file of the repository
    return "=" not in value and "://" not in value and ("/" in value or value.endswith(PATH_SUFFIXES))


def _strings(value) -> list[str]:
    if isinstance(value, str):
        return [value]
    if isinstance(value, (list, tuple)):
        return [v for v in value if isinstance(v, str)]
    return []


def parse_example(command: str, text: str) -> Example:
    """Parse one example with the real parser; raises AssertionError when argparse refuses it."""
    words = shlex.split(text)
    assert words[0] == "stateworth", f"{command}: an example must start with `stateworth`: {text}"
    parser = build_parser()
    try:
        args = parser.parse_args(words[1:])
    except SystemExit as e:  # argparse refuses unknown options and missing arguments this way
        raise AssertionError(f"{command}: the parser refuses the example `{text}` (exit {e.code})") from None
    inputs, outputs = [], []
    for dest, value in vars(args).items():
        if dest.startswith("_") or dest in OPERATOR_DESTS:
            continue
        for v in _strings(value):
            if not _looks_like_path(v):
                continue
            (outputs.append(v) if dest in OUTPUT_DESTS else inputs.append((dest, v)))
    if args.command == "simulate":  # the market-size table goes beside the panel
        from stateworth.estimation.simulate import markets_path_for

        outputs.append(str(markets_path_for(args.output)))
    return Example(command, text, args, tuple(inputs), tuple(outputs))


def all_examples() -> list[Example]:
    """Every example of every command, in the order `stateworth --help` lists the commands."""
    return [parse_example(mod.NAME, text) for mod in _modules()
            for text in example_lines(getattr(mod, "DESCRIPTION", ""))]


def demo_inputs() -> set[str]:
    """Paths under demo-out/ that some example reads."""
    return {p.rstrip("/") for ex in all_examples() for _, p in ex.inputs if p.split("/")[0] == DEMO_OUT}
