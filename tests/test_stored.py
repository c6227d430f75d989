"""Solved values kept with the model: written by `solve`, read by every query; a stored file that
does not match its model is never used. Also: the sparse LU path for draws and the long-run mix,
and the refusal of states no customer can be in."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as sla

from stateworth.clients.cli import main
from stateworth.errors import QueryError
from stateworth.rules import compile_model, save_model
from stateworth.valuation import Valuer, stored
from stateworth.valuation.solved import Settings, solve_model

from test_valuation import PROSPECT, dirichlet_draws, tiny_spec, tiny_tables


@pytest.fixture(scope="module")
def model():
    spec = tiny_spec(markets=2, tenure=3)
    t = tiny_tables(spec, seed=4)
    return compile_model(spec, t, draws=dirichlet_draws(t, 20, seed=3), source="stored-test")


@pytest.fixture()
def model_dir(tmp_path, model):
    d = tmp_path / "m"
    save_model(model, d)
    return d


def test_solved_values_match_scipy_per_draw(model):
    # Reference: scipy.sparse.linalg.spsolve on each draw's explicit matrix (reference library,
    # computed at test time); the point model's long-run mix against the left eigenvector for 1
    # of each fixed block (numpy.linalg.eig).
    s = solve_model(model)
    assert s.stats["draws"]["method"] == "sparse" and s.draws.shape == (20, model.n_states, 2)
    for d in (0, 19):
        md = model.with_tables({a: model.draws[a][d] for a in model.draws})
        A = (sp.identity(md.n_states) - md.beta * md.csr()).tocsc()
        ref = sla.spsolve(A, np.stack([md.rewards[k] for k in s.streams], axis=1))
        np.testing.assert_allclose(s.draws[d], ref, rtol=1e-9, atol=1e-9 * np.abs(ref).max())
    P = model.csr().toarray()
    half = model.n_states // 2
    for b in range(2):
        blk = P[b * half:(b + 1) * half, b * half:(b + 1) * half]
        w, vec = np.linalg.eig(blk.T)
        pi = np.real(vec[:, np.argmin(np.abs(w - 1))])
        pi = pi / pi.sum() / 2
        np.testing.assert_allclose(s.longrun[b * half:(b + 1) * half], pi, atol=1e-10)


def test_store_round_trip(model, model_dir):
    s = solve_model(model)
    stored.save(model_dir, s)
    back = stored.load(model_dir, model)
    assert back.source.startswith("stored")
    np.testing.assert_array_equal(back.values, s.values)
    np.testing.assert_array_equal(back.draws, s.draws)
    np.testing.assert_array_equal(back.reachable, s.reachable)
    a = Valuer(back).acquisition(PROSPECT, "solo")
    b = Valuer(s).acquisition(PROSPECT, "solo")
    assert a.value == b.value and a.interval == b.interval
    # other settings are another file: none stored under them
    with pytest.raises(FileNotFoundError):
        stored.load(model_dir, model, Settings(tol=1e-12))


def _folder(model_dir):
    return stored.location(model_dir)


@pytest.mark.parametrize("damage", ["truncate", "edit", "version", "format", "manifest-json", "fifo"])
def test_a_stored_file_that_does_not_match_is_never_used(model, model_dir, damage):
    stored.save(model_dir, solve_model(model))
    folder = _folder(model_dir)
    doc = json.loads((folder / "solution.json").read_text())
    if damage == "truncate":
        data = (folder / "values.npy").read_bytes()
        (folder / "values.npy").write_bytes(data[: len(data) // 2])
    elif damage == "edit":
        v = np.load(folder / "values.npy")
        v[3, 0] += 1.0
        np.save(folder / "values.npy", v)
    elif damage == "version":
        doc["model_hash"] = "0" * 64
        doc["version"] = "000000000000"
        (folder / "solution.json").write_text(json.dumps(doc))
    elif damage == "format":
        doc["format"] = "stateworth.solution/99"
        (folder / "solution.json").write_text(json.dumps(doc))
    elif damage == "manifest-json":
        (folder / "solution.json").write_text("[1, 2")
    else:
        import os
        (folder / "draws.npy").unlink()
        os.mkfifo(folder / "draws.npy")
    with pytest.raises(stored.StoredValuesError) as e:
        stored.load(model_dir, model)
    assert str(model_dir) in str(e.value)
    # the command line says so in one line and solves again (and stores a good file)
    v = Valuer.open(model_dir, model, note=(notes := []).append)
    assert len(notes) == 1 and "stored values not used" in notes[0] and "\n" not in notes[0]
    assert v.source == "solved"
    assert stored.load(model_dir, model).values.shape == (model.n_states, 2)


def test_value_command_reads_stored_values_without_jax(model, model_dir, capsys):
    assert main(["solve", str(model_dir)]) == 0
    out = capsys.readouterr().out
    assert "stored the values" in out
    # a fresh process: the lookup must not import JAX (or solve: it would have to)
    code = ("import sys; from stateworth.clients.cli import main; "
            f"rc = main(['value', {str(model_dir)!r}, 'market=harbor', 'tenure=0', 'status=prospect', "
            "'engagement=none', '--json']); print('JAX', 'jax' in sys.modules, file=sys.stderr); sys.exit(rc)")
    p = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert p.returncode == 0, p.stderr
    assert "JAX False" in p.stderr
    ans = json.loads(p.stdout)
    ref = Valuer.build(model).value(PROSPECT)
    assert ans["value"] == pytest.approx(ref.value, rel=1e-12)
    # solve again without --force: nothing recomputed
    assert main(["solve", str(model_dir), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["source"].startswith("stored")


def test_unwritable_model_dir_still_answers(model, model_dir, capsys):
    import os
    if os.geteuid() == 0:
        # root writes anywhere: make the solutions path a file instead
        (stored.files_dir(model_dir) / stored.FOLDER).write_text("not a folder")
    else:
        stored.files_dir(model_dir).chmod(0o555)
    try:
        assert main(["value", str(model_dir), "market=harbor", "tenure=0", "status=prospect",
                     "engagement=none"]) == 0
    finally:
        stored.files_dir(model_dir).chmod(0o755)
    err = capsys.readouterr().err
    assert "could not store the solved values" in err


def test_unreachable_states_are_refused(model):
    v = Valuer.build(model)
    # duo is not sold in upland (tiny_spec's not_sold)
    with pytest.raises(QueryError, match="not sold in market=upland"):
        v.value({"market": "upland", "tenure": "1", "status": "duo", "engagement": "light"})
    # tenure counts member periods only and resets on lapse: a prospect never has tenure 2
    with pytest.raises(QueryError, match="tenure=2 never occurs with status=prospect") as e:
        v.value({**PROSPECT, "tenure": "2"})
    assert e.value.field == "tenure"
    with pytest.raises(QueryError, match="never occurs with status=lapsed"):
        v.value({**PROSPECT, "status": "lapsed", "tenure": "1"})
    # reachable states answer
    v.value({**PROSPECT, "status": "duo", "tenure": "2"})


def test_forbidden_moves_are_refused():
    spec = tiny_spec(markets=2, tenure=3)
    d = spec.canonical()
    d["axes"]["status"]["moves"]["solo"] = ["lapsed", "solo"]  # no upgrade from solo
    from stateworth.rules import parse_spec
    spec2 = parse_spec(d, source="moves-test")
    t = tiny_tables(spec, seed=1)
    t["status"][..., 2, :, 3] = 0.0
    t["status"] /= t["status"].sum(axis=-1, keepdims=True)
    v = Valuer.build(compile_model(spec2, t, source="moves-test"))
    member = {**PROSPECT, "status": "solo", "tenure": "1"}
    with pytest.raises(QueryError, match=r"solo -> duo is not allowed by axes.status.moves.solo") as e:
        v.plan_change(member, "duo")
    assert e.value.field == "to_plan"
    v.plan_change({**member, "status": "duo"}, "solo")


def test_fit_stores_values_and_value_answers_at_once(tmp_path, capsys):
    # simulate -> fit (solves and stores) -> value reads the stored values
    root = Path(__file__).resolve().parent
    spec = root / "data" / "mini_fitness.toml"
    panel = tmp_path / "panel.parquet"
    assert main(["simulate", str(spec), "--accounts", "300", "--periods", "8", "--seed", "2", "-o", str(panel)]) == 0
    out = tmp_path / "model"
    assert main(["fit", str(spec), "--panel", str(panel), "--markets", str(tmp_path / "panel.markets.csv"),
                 "-o", str(out), "--draws", "20"]) == 0
    assert "solved and stored its values" in capsys.readouterr().out
    from stateworth.rules import load_model
    m = load_model(out)[0]
    s = stored.load(out, m)
    assert s.n_draws == 20
