"""No panel value is ever echoed: account identifiers fed through every error path of
``stateworth check`` and ``stateworth fit`` never reach stdout, stderr or any file written.

Every account of a simulated panel gets a distinctive identifier (``acct-Q7ZK-00001`` ...);
each case then puts the file wrong in one way, the way a real file goes wrong (no header row,
columns shifted so identifiers land in another column, a history that breaks a rule, a market
table that is really the panel), and runs both commands in this process with the output
captured at the file-descriptor level. Errors must be one line naming file, row and column
(exit 1), never an internal error (exit 2), and never carry an identifier.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest

from stateworth.clients.cli import main
from test_simulate import BAND_SPEC

SPEC = str(Path(__file__).parent / "data" / "mini_fitness.toml")
MARK = "Q7ZK"  # in every identifier; appears nowhere else


def _ids(n: int) -> list[str]:
    return [f"acct-{MARK}-{k:05d}" for k in range(n)]


@pytest.fixture(scope="module")
def base(tmp_path_factory):
    d = tmp_path_factory.mktemp("identifiers")
    assert main(["simulate", SPEC, "--accounts", "400", "--periods", "6", "--seed", "5", "-o", str(d / "sim.csv")]) == 0
    df = pd.read_csv(d / "sim.csv", dtype=str)
    codes = {a: i for i, a in enumerate(df["account"].unique())}
    df["account"] = [_ids(len(codes))[codes[a]] for a in df["account"]]
    mk = pd.read_csv(d / "sim.markets.csv", dtype=str)
    (d / "sim.csv").unlink()
    (d / "sim.markets.csv").unlink()
    return df, mk


def _first_row_of_long_history(df: pd.DataFrame) -> int:
    counts = df.groupby("account")["period"].transform("count")
    return int(df.index[counts >= 4][0])


def _shifted(df: pd.DataFrame, column: str) -> pd.DataFrame:
    out = df.copy()
    out[column] = out["account"]
    return out


def _history_break(df: pd.DataFrame, kind: str) -> pd.DataFrame:
    i = _first_row_of_long_history(df)
    acc = df.loc[i, "account"]
    rows = df.index[df["account"] == acc]
    out = df.copy()
    if kind == "duplicate":
        return pd.concat([out, out.loc[[rows[1]]]], ignore_index=True)
    if kind == "market":
        out.loc[rows[2], "market"] = "south" if out.loc[rows[2], "market"] == "north" else "north"
        return out
    if kind == "gap":
        return out.drop(index=rows[1])
    if kind == "never_member":
        out.loc[rows[1], "status"] = "prospect"
        return out
    if kind == "forbidden":  # plus is not sold in south: a south account moving onto plus
        counts = df.groupby("account")["period"].transform("count")
        acc = df.loc[(df["market"] == "south") & (counts >= 3), "account"].iloc[0]
        out.loc[df.index[df["account"] == acc][1], "status"] = "plus"
        return out
    raise AssertionError(kind)


CASES = ["no_header", "period", "market", "status", "engagement", "revenue", "empty_account", "duplicate",
         "market_changes", "gap", "never_member", "forbidden", "header_only", "zero_rows_parquet", "not_utf8", "ragged_rows",
         "parquet_period", "id_as_column_name", "markets_market", "markets_size", "markets_is_panel",
         "markets_no_header", "covariate"]


#: errors only the fit finds (the moves are counted there); ``check`` passes the file
FIT_ONLY: set[str] = set()  # check is as strict as fit: none is left to fit alone


def _write_case(case: str, df: pd.DataFrame, mk: pd.DataFrame, d: Path) -> tuple[str, str, str]:
    """(spec, panel, markets) files for one case."""
    spec, panel, markets = SPEC, d / "panel.csv", d / "markets.csv"
    mk.to_csv(markets, index=False)
    if case == "no_header":
        df.to_csv(panel, index=False, header=False)
    elif case in ("period", "market", "status", "engagement", "revenue"):
        _shifted(df, case).to_csv(panel, index=False)
    elif case == "empty_account":
        out = df.copy()
        out.loc[3, "account"] = None
        out.to_csv(panel, index=False)
    elif case == "duplicate":
        _history_break(df, "duplicate").to_csv(panel, index=False)
    elif case == "market_changes":
        _history_break(df, "market").to_csv(panel, index=False)
    elif case in ("gap", "never_member", "forbidden"):
        _history_break(df, case).to_csv(panel, index=False)
    elif case == "header_only":
        df.iloc[:0].to_csv(panel, index=False)
    elif case == "zero_rows_parquet":
        panel = d / "panel.parquet"
        df.iloc[:0].to_parquet(panel)
    elif case == "not_utf8":  # the reader's own message quotes the line: it must not come through
        lines = df.to_csv(index=False).encode().splitlines()
        lines[7] = lines[7] + b"," + df.loc[6, "account"].encode() + b"\xff\xfe"
        panel.write_bytes(b"\n".join(lines) + b"\n")
    elif case == "ragged_rows":
        lines = df.to_csv(index=False).splitlines()
        lines[3] += f",{df.loc[2, 'account']},{df.loc[2, 'account']}"
        panel.write_text("\n".join(lines) + "\n")
    elif case == "parquet_period":
        panel = d / "panel.parquet"
        _shifted(df, "period").to_parquet(panel)
    elif case == "id_as_column_name":
        df.rename(columns={"engagement": df.loc[0, "account"]}).to_csv(panel, index=False)
    elif case == "markets_market":
        df.to_csv(panel, index=False)
        out = mk.copy()
        out["market"] = _ids(len(out))
        out.to_csv(markets, index=False)
    elif case == "markets_size":
        df.to_csv(panel, index=False)
        out = mk.copy()
        out["size"] = _ids(len(out))
        out.to_csv(markets, index=False)
    elif case == "markets_is_panel":
        df.to_csv(panel, index=False)
        df.to_csv(markets, index=False)
    elif case == "markets_no_header":
        df.to_csv(panel, index=False)
        df.to_csv(markets, index=False, header=False)
    elif case == "covariate":
        spec_path = d / "band.toml"
        spec_path.write_text(BAND_SPEC)
        spec = str(spec_path)
        sim = d / "band.csv"
        assert main(["simulate", spec, "--accounts", "300", "--periods", "5", "--seed", "2", "-o", str(sim)]) == 0
        band = pd.read_csv(sim, dtype=str)
        codes = {a: i for i, a in enumerate(band["account"].unique())}
        band["account"] = [_ids(len(codes))[codes[a]] for a in band["account"]]
        band["age"] = band["account"]
        band.to_csv(panel, index=False)
        sim.unlink()
        markets = d / "band.markets.csv"
    else:
        raise AssertionError(case)
    return spec, str(panel), str(markets)


def _written(d: Path, inputs: set[str]) -> list[Path]:
    return [p for p in d.rglob("*") if p.is_file() and str(p) not in inputs]


@pytest.mark.parametrize("case", CASES)
def test_no_identifier_reaches_any_output(base, case, tmp_path, capfd):
    df, mk = base
    spec, panel, markets = _write_case(case, df, mk, tmp_path)
    if case not in ("header_only", "zero_rows_parquet") and not panel.endswith(".parquet"):
        assert any(MARK.encode() in Path(f).read_bytes() for f in (panel, markets))  # the identifiers are in the input
    capfd.readouterr()
    inputs = {spec, panel, markets}
    check = main(["check", spec, "--panel", panel, "--markets", markets])
    fit = main(["fit", spec, "--panel", panel, "--markets", markets, "-o", str(tmp_path / "model"), "--draws", "20"])
    out = capfd.readouterr()
    text = out.out + out.err
    assert MARK not in text, text
    assert fit == 1, text  # every case is a user error: one line, exit 1
    assert check == (0 if case in FIT_ONLY else 1), text
    assert "internal error" not in text and "Traceback" not in text
    errors = [line for line in out.err.splitlines() if line.startswith(("error:", "problem:"))]
    assert errors and all("row" in e or "column" in e or "header" in e or "no data rows" in e
                          or "cannot be read" in e for e in errors), errors
    for p in _written(tmp_path, inputs):
        assert MARK not in p.read_bytes().decode("latin-1"), p


def test_a_clean_fit_writes_no_identifier(base, tmp_path, capfd):
    df, mk = base
    spec, panel, markets = _write_case("market_changes", df, mk, tmp_path)
    df.to_csv(panel, index=False)  # the clean panel
    capfd.readouterr()
    assert main(["check", spec, "--panel", panel, "--markets", markets]) == 0
    assert main(["fit", spec, "--panel", panel, "--markets", markets, "-o", str(tmp_path / "model"), "--draws", "20"]) == 0
    out = capfd.readouterr()
    assert MARK not in out.out + out.err
    written = _written(tmp_path, {spec, panel, markets})
    assert any(p.name == "diagnostics.json" for p in written) and any(p.name == "diagnostics.txt" for p in written)
    for p in written:
        assert MARK not in p.read_bytes().decode("latin-1"), p

