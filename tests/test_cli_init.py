"""`stateworth init` writes a valid, commented starter spec and never overwrites by accident."""

from __future__ import annotations

import pytest

from stateworth.clients.cli import main


def test_init_writes_a_spec_that_checks(tmp_path, capsys):
    from stateworth.rules import load_spec

    out = tmp_path / "my.toml"
    assert main(["init", "--plans", "basic,plus", "--markets", "north,south", "-o", str(out)]) == 0
    spec = load_spec(out)
    assert spec.members == ["basic", "plus"]
    assert spec.non_members == ["prospect", "lapsed"]
    assert spec.axis_levels("market") == ["north", "south"]
    assert spec.axes["status"].moves["basic"] == ["lapsed", "basic", "plus"]
    text = out.read_text()
    assert text.count("#") > 20  # commented throughout
    capsys.readouterr()
    assert main(["check", str(out)]) == 0
    assert "ok" in capsys.readouterr().out


def test_init_refuses_to_overwrite_without_force(tmp_path, capsys):
    out = tmp_path / "my.toml"
    out.write_text("keep me")
    assert main(["init", "--plans", "basic", "--markets", "north", "-o", str(out)]) == 1
    assert "--force" in capsys.readouterr().err
    assert out.read_text() == "keep me"
    assert main(["init", "--plans", "basic", "--markets", "north", "-o", str(out), "--force"]) == 0
    assert "[axes.status]" in out.read_text()


def test_init_options_prices_bands_seasonal(tmp_path):
    from stateworth.rules import load_spec

    out = tmp_path / "s.toml"
    assert main(["init", "--plans", "a,b,c", "--markets", "x", "--prices", "9,19.5,30", "--bands", "off,on",
                 "--seasonal", "--tenure-cap", "6", "-o", str(out)]) == 0
    spec = load_spec(out)
    assert spec.rewards["revenue"].price == {"a": 9.0, "b": 19.5, "c": 30.0}
    assert spec.axis_levels("engagement") == ["off", "on"]
    assert len(spec.axis_levels("month")) == 12 and spec.axes["tenure"].size == 7
    # neighbour-only plan moves: a cannot jump to c
    assert "c" not in spec.axes["status"].moves["a"]


@pytest.mark.parametrize("argv,needle", [
    (["--plans", "basic,basic", "--markets", "n"], "duplicated"),
    (["--plans", "basic", "--markets", "n", "--prices", "1,2"], "--prices"),
    (["--plans", "prospect", "--markets", "n"], "non-member"),
    (["--plans", "9lives", "--markets", "n"], "letter"),
    (["--plans", "basic", "--markets", "n", "--rate", "10"], "--rate"),
])
def test_init_bad_options_exit_1(tmp_path, capsys, argv, needle):
    out = tmp_path / "x.toml"
    assert main(["init", *argv, "-o", str(out)]) == 1
    err = capsys.readouterr().err
    assert needle in err and not out.exists()
