"""A lean install: what needs an extra says which one, in one line; the client needs none."""

from __future__ import annotations

import subprocess
import sys

import pytest

from stateworth.clients.cli import main


@pytest.mark.parametrize("module,extra,args", [
    ("jax", "solve", None),
    ("duckdb", "fit", ["check", "examples/fitness.toml", "--panel", "tests/data/none.csv"]),
])
def test_a_missing_package_names_its_extra(module, extra, args, monkeypatch, capsys):
    # a module set to None in sys.modules cannot be imported: as if it were not installed
    monkeypatch.setitem(sys.modules, module, None)
    if args is None:
        from stateworth import config
        from stateworth.extras import MissingExtraError
        monkeypatch.setattr(config, "_state", {})
        with pytest.raises(MissingExtraError, match=rf"pip install 'stateworth\[{extra}\]'"):
            config.use_jax()
        return
    assert main(args) == 1
    err = capsys.readouterr().err
    assert f"pip install 'stateworth[{extra}]'" in err and "Traceback" not in err


def test_the_client_needs_no_extra():
    # a fresh interpreter where the extras' packages cannot be imported at all
    code = ("import sys\n"
            "for m in ('jax', 'duckdb', 'pyarrow', 'matplotlib', 'jinja2', 'scipy'):\n"
            "    sys.modules[m] = None\n"
            "import stateworth.clients.client\n"
            "from stateworth.clients.cli import main\n"
            "print('ok')\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "ok"
