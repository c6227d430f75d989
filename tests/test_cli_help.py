"""The command line's help: `--version`, every DESCRIPTION example parses and reads paths that
exist (the demo's output, the repository's files, or what an earlier example wrote), and every
pointer to a README section names a heading README.md has."""

from __future__ import annotations

import importlib.metadata
import re

import pytest

from help_examples import DEMO_OUT, ROOT, all_examples, example_lines
from stateworth.clients.cli import _modules, main


def test_version(capsys):
    with pytest.raises(SystemExit) as ei:
        main(["--version"])
    assert ei.value.code == 0
    assert capsys.readouterr().out.strip() == f"stateworth {importlib.metadata.version('stateworth')}"


def test_every_command_has_examples_that_parse():
    # all_examples() parses each with the real parser (an unknown option fails there)
    examples = all_examples()
    names = {m.NAME for m in _modules()}
    assert {ex.command for ex in examples} == names
    for mod in _modules():
        assert example_lines(mod.DESCRIPTION), f"{mod.NAME}: DESCRIPTION has no example"


def test_the_demo_writes_where_the_examples_read():
    from stateworth.clients.cli import build_parser

    assert build_parser().parse_args(["demo"]).output == DEMO_OUT


def test_examples_read_paths_that_exist():
    """Inputs are the demo's output (tests/test_demo.py checks the demo writes them), files of
    the repository, or what an earlier example of the same command wrote."""
    written: dict[str, set[str]] = {}
    for ex in all_examples():
        mine = written.setdefault(ex.command, set())
        for dest, path in ex.inputs:
            p = path.rstrip("/")
            ok = p.split("/")[0] == DEMO_OUT or (ROOT / p).exists() or p in mine
            assert ok, f"{ex.command}: `{ex.text}` reads {path} ({dest}), which neither the demo, the repository " \
                       "nor an earlier example writes"
        mine.update(o.rstrip("/") for o in ex.outputs)


def test_a_broken_example_is_caught():
    from help_examples import parse_example

    with pytest.raises(AssertionError, match="refuses"):
        parse_example("value", "stateworth value demo-out/models/fitted --no-such-option 3")


def _readme_headings() -> set[str]:
    """README.md's headings (outside code blocks), with and without backticks, and each one's
    part before a colon ("Past one machine" for "Past one machine: several devices and hosts")."""
    out, fenced = set(), False
    for ln in (ROOT / "README.md").read_text().splitlines():
        if ln.startswith("```"):
            fenced = not fenced
        elif not fenced and ln.startswith("#"):
            name = ln.lstrip("#").strip()
            for n in (name, name.replace("`", "")):
                out |= {n, n.split(": ")[0]}
    return out


POINTER = re.compile(r"""README(?:\.md)?(?!'s\b)[`,:]?\s*(?:section\s+)?\\?["']([^"'\\]+)\\?["']""")
SOURCE_DIRS = ("stateworth", "rules", "solver", "estimation", "valuation", "server", "clients", "proto", "bench")


def _pointers() -> list[tuple[str, str]]:
    found = []
    for d in SOURCE_DIRS:
        for path in sorted((ROOT / d).rglob("*.py")):
            for m in POINTER.finditer(path.read_text()):
                found.append((str(path.relative_to(ROOT)), m.group(1)))
    for doc in ("README.md", "DEVELOPERS.md"):
        text = (ROOT / doc).read_text()
        pattern = re.compile(r'[Ss]ee\s+"([^"]+)"') if doc == "README.md" else POINTER
        found += [(doc, m.group(1)) for m in pattern.finditer(text)]
    return found


def test_readme_pointers_name_existing_headings():
    pointers = _pointers()
    assert any(src.startswith("estimation/") for src, _ in pointers)  # the panel errors point at README
    headings = _readme_headings()
    missing = [f"{src}: '{name}'" for src, name in pointers if name not in headings]
    assert not missing, "README has no such heading: " + "; ".join(missing)


def test_a_pointer_to_a_missing_heading_is_caught():
    assert POINTER.search("columns (see README 'Panel format')").group(1) not in _readme_headings()
    assert POINTER.search('see README.md, "Spec reference"').group(1) in _readme_headings()
