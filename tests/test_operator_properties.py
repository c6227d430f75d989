"""Property tests of the compiler on random small specs (hypothesis).

Each example draws a spec dict (1-2 fixed axes, 0-2 counters with random ``advance_while`` and
``reset_on``, 0-1 cycle, the status axis with a random member split and random ``moves`` /
``not_sold`` rules, 0-2 chance axes with random ``given`` including ``next.X`` of axes drawn
earlier) and random factor tables that respect the move masks. Then:

* the structured operator ``P x`` equals the explicit CSR matrix times ``x`` (one vector and a
  block of vectors), and the transpose apply equals ``P^T y``;
* every row of P sums to 1;
* every non-zero of P obeys the rules, checked on the grid coordinates of its row and column
  with the rules re-derived here from the spec dict (not from the compiler's masks or index
  maps): allowed moves, not_sold plans, fixed axes unchanged, counters ageing as declared,
  cycles advancing modulo their length.

Grids stay under ~400 states. A jitted apply recompiles for every new grid shape, so each
example compiles one function holding both the apply and the transpose apply (one vector each);
blocks of vectors ``(n, k)`` are checked once, on a fixed spec, in
:func:`test_block_apply_matches_csr`.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from stateworth.rules import compile_model, parse_spec
from stateworth.rules.factors import factors_of, masked_uniform
from stateworth.rules.steps import Contract, CounterGather, Finish, Offsets, PairStep

MAX_STATES = 400
SETTINGS = settings(max_examples=25, deadline=None, derandomize=True,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])


def _names(prefix: str, k: int) -> list[str]:
    return [f"{prefix}{i}" for i in range(k)]


@st.composite
def specs(draw):
    """A random valid spec dict, plus a seed for its tables."""
    n_fixed = draw(st.integers(1, 2))
    n_counter = draw(st.integers(0, 2))
    n_cycle = draw(st.integers(0, 1))
    n_chance = draw(st.integers(0, 2))
    sizes = {
        "fixed": [draw(st.integers(1, 3)) for _ in range(n_fixed)],
        "counter": [draw(st.integers(2, 4)) for _ in range(n_counter)],
        "cycle": [draw(st.integers(2, 3)) for _ in range(n_cycle)],
        "status": [draw(st.integers(2, 4))],
        "chance": [draw(st.integers(2, 3)) for _ in range(n_chance)],
    }

    # shrink the largest axis until the grid is small (deterministic, so shrinking stays stable)
    def total():
        return int(np.prod([s for v in sizes.values() for s in v]))

    while total() > MAX_STATES:
        kind, i = max(((k, j) for k, v in sizes.items() for j in range(len(v))),
                      key=lambda kj: sizes[kj[0]][kj[1]])
        sizes[kind][i] -= 1

    axes: dict[str, dict] = {}
    fixed_names = [f"f{i}" for i in range(n_fixed)]
    for name, k in zip(fixed_names, sizes["fixed"]):
        axes[name] = {"kind": "fixed", "levels": _names(f"{name}_", k)}

    s_levels = _names("s", sizes["status"][0])
    n_members = draw(st.integers(1, len(s_levels) - 1))
    member_idx = draw(st.permutations(range(len(s_levels))))[:n_members]
    members = [s_levels[i] for i in sorted(member_idx)]
    non_members = [lv for lv in s_levels if lv not in members]

    counter_names = [f"c{i}" for i in range(n_counter)]
    for name, k in zip(counter_names, sizes["counter"]):
        ax: dict = {"kind": "counter", "size": k}
        aw = draw(st.sampled_from(["member", "non_member", "always", "list", "omit"]))
        if aw == "list":
            ax["advance_while"] = draw(st.lists(st.sampled_from(s_levels), unique=True, max_size=len(s_levels)))
        elif aw != "omit":
            ax["advance_while"] = aw
        reset = draw(st.lists(st.sampled_from(["join", "lapse", "change"]), unique=True, max_size=3))
        if reset or draw(st.booleans()):
            ax["reset_on"] = reset
        axes[name] = ax
    cycle_names = [f"y{i}" for i in range(n_cycle)]
    for name, k in zip(cycle_names, sizes["cycle"]):
        axes[name] = ({"kind": "cycle", "size": k} if draw(st.booleans())
                      else {"kind": "cycle", "levels": _names(f"{name}_", k)})

    chance_names = [f"e{i}" for i in range(n_chance)]
    random_names = ["status"] + chance_names
    order = list(draw(st.permutations(random_names)))
    current_axes = fixed_names + counter_names + cycle_names + random_names

    def draw_given(name: str, must: list[str]) -> list[str]:
        earlier = order[: order.index(name)]
        pool = current_axes + [f"next.{a}" for a in earlier]
        picked = draw(st.lists(st.sampled_from(pool), unique=True, max_size=3))
        if earlier and draw(st.booleans()):  # next values are the interesting case: favour them
            picked.append(f"next.{draw(st.sampled_from(earlier))}")
        return list(dict.fromkeys(must + picked))

    # status: moves from some levels (always keeping a non-member level open, so that no cell is
    # left without an allowed next level), not_sold for some plans in some fixed levels
    s_moves = {}
    for frm in s_levels:
        if draw(st.booleans()):
            keep = draw(st.sampled_from(non_members))
            extra = draw(st.lists(st.sampled_from(s_levels), unique=True, max_size=len(s_levels)))
            s_moves[frm] = list(dict.fromkeys([keep] + extra))
    not_sold = {}
    for plan in members:
        if draw(st.booleans()):
            fax = draw(st.sampled_from(fixed_names))
            flv = axes[fax]["levels"]
            chosen = draw(st.lists(st.sampled_from(flv), unique=True, min_size=1, max_size=len(flv)))
            not_sold[plan] = {fax: chosen}
    must = (["status"] if s_moves else []) + list(dict.fromkeys(f for r in not_sold.values() for f in r))
    status_ax: dict = {"kind": "status", "levels": s_levels, "members": members,
                       "given": draw_given("status", must)}
    if s_moves:
        status_ax["moves"] = s_moves
    if not_sold:
        status_ax["not_sold"] = not_sold
    axes["status"] = status_ax

    for name, k in zip(chance_names, sizes["chance"]):
        lv = _names(f"{name}_", k)
        moves = {}
        for frm in lv:
            if draw(st.booleans()):
                moves[frm] = draw(st.lists(st.sampled_from(lv), unique=True, min_size=1, max_size=k))
        ax = {"kind": "chance", "levels": lv, "given": draw_given(name, [name] if moves else [])}
        if moves:
            ax["moves"] = moves
        axes[name] = ax

    model = {"name": "random", "discount": {"annual_rate": 0.1}}
    # dict order of axes is shuffled too: grid order must not depend on it
    names = list(axes)
    shuffled = draw(st.permutations(names))
    # without draw_order the random axes are drawn in the order the spec lists them
    if order != [n for n in shuffled if n in random_names] or draw(st.booleans()):
        model["draw_order"] = order
    spec = {"model": model, "axes": {n: axes[n] for n in shuffled}}
    return spec, draw(st.integers(0, 2**31 - 1))


def random_tables(spec, seed: int) -> dict[str, np.ndarray]:
    """Tables that respect the masks: the masked uniform table perturbed, with some allowed
    entries zeroed (keeping one per row), renormalised."""
    rng = np.random.default_rng(seed)
    out = {}
    for f in factors_of(spec):
        allowed = masked_uniform(spec, f) > 0
        t = rng.uniform(0.05, 1.0, size=f.shape) * allowed
        drop = rng.uniform(size=f.shape) < 0.3
        # keep the largest allowed entry of each row so that no row becomes empty
        keep = t == t.max(axis=-1, keepdims=True)
        t = np.where(drop & ~keep, 0.0, t)
        out[f.axis] = t / t.sum(axis=-1, keepdims=True)
    return out


def _counter_next(ax: dict, size: int, c: int, s_from: str, s_to: str, members: list[str]) -> int:
    """The declared ageing, restated from the spec dict: reset to 0 on a named event
    (join: non-member -> member, lapse: member -> non-member, change: any status change);
    otherwise +1, capped at the last level, while the next status satisfies advance_while."""
    was, now = s_from in members, s_to in members
    events = set()
    if not was and now:
        events.add("join")
    if was and not now:
        events.add("lapse")
    if s_from != s_to:
        events.add("change")
    if events & set(ax.get("reset_on", [])):
        return 0
    aw = ax.get("advance_while", "always")
    if aw == "always":
        adv = True
    elif aw == "member":
        adv = now
    elif aw == "non_member":
        adv = not now
    else:
        adv = s_to in aw
    return min(c + 1, size - 1) if adv else c


def _check_rules(spec_dict: dict, model, P) -> None:
    grid = model.grid
    axes = spec_dict["axes"]
    members = axes["status"]["members"]
    coo = P.tocoo()
    rows, cols = coo.row, coo.col
    cur = dict(zip(grid.names, np.unravel_index(rows, grid.shape)))
    nxt = dict(zip(grid.names, np.unravel_index(cols, grid.shape)))
    for a in grid.axes:
        ax = axes[a.name]
        i, j = cur[a.name], nxt[a.name]
        if a.kind == "fixed":
            np.testing.assert_array_equal(i, j, err_msg=f"fixed axis {a.name} changed")
        elif a.kind == "cycle":
            np.testing.assert_array_equal(j, (i + 1) % a.size, err_msg=f"cycle {a.name}")
        elif a.kind == "counter":
            s_lv = grid.axis("status").levels
            want = [_counter_next(ax, a.size, int(c), s_lv[s0], s_lv[s1], members)
                    for c, s0, s1 in zip(i, cur["status"], nxt["status"])]
            np.testing.assert_array_equal(j, want, err_msg=f"counter {a.name}")
        if a.kind in ("status", "chance"):
            for frm, tos in ax.get("moves", {}).items():
                sel = i == a.levels.index(frm)
                allowed = np.isin(j[sel], [a.levels.index(t) for t in tos])
                assert allowed.all(), f"{a.name}: mass on a move from {frm} outside {tos}"
    s_lv = grid.axis("status").levels
    for plan, rule in axes["status"].get("not_sold", {}).items():
        for fax, flevels in rule.items():
            f_lv = grid.axis(fax).levels
            bad = (nxt["status"] == s_lv.index(plan)) & np.isin(cur[fax], [f_lv.index(x) for x in flevels])
            assert not bad.any(), f"mass on {plan}, not sold in {fax} {flevels}"


@jax.jit
def _both(op, x, y):
    return op.mv(x), op.transpose().mv(y)


@SETTINGS
@given(specs())
def test_operator_matches_csr_and_obeys_rules(case):
    spec_dict, seed = case
    spec = parse_spec(spec_dict)
    model = compile_model(spec, random_tables(spec, seed))
    n = model.n_states
    assert n <= MAX_STATES
    P = model.csr()
    assert P.shape == (n, n)
    rng = np.random.default_rng(seed)
    x, y = rng.normal(size=n), rng.normal(size=n)
    px, pty = _both(model.operator, jnp.asarray(x), jnp.asarray(y))
    np.testing.assert_allclose(np.asarray(px), P @ x, rtol=0, atol=1e-12)
    np.testing.assert_allclose(np.asarray(pty), P.T @ y, rtol=0, atol=1e-12)
    np.testing.assert_allclose(np.asarray(P.sum(axis=1)).ravel(), 1.0, rtol=0, atol=1e-12)
    assert P.data.min() > 0.0
    _check_rules(spec_dict, model, P)


@SETTINGS
@given(specs())
def test_grid_order_and_level_index_round_trip(case):
    """Grid order is fixed, then counters and cycles, then random axes in draw order; a flat
    index and its coordinates convert both ways."""
    spec_dict, _ = case
    spec = parse_spec(spec_dict)
    from stateworth.rules import Grid
    grid = Grid.from_spec(spec)
    kinds = [a.kind for a in grid.axes]
    rank = {"fixed": 0, "counter": 1, "cycle": 1, "status": 2, "chance": 2}
    assert [rank[k] for k in kinds] == sorted(rank[k] for k in kinds)
    assert [a.name for a in grid.axes if a.kind in ("status", "chance")] == spec.draw_order
    for flat in range(0, grid.size, max(1, grid.size // 7)):
        assert grid.flat_index(grid.coords(flat)) == flat


SMALL = {
    "model": {"name": "t", "discount": {"annual_rate": 0.1}},
    "axes": {"m": {"kind": "fixed", "levels": ["a", "b"]},
             "age": {"kind": "counter", "size": 3, "advance_while": "member", "reset_on": ["join"]},
             "status": {"kind": "status", "levels": ["out", "p", "q"], "members": ["p", "q"],
                        "given": ["status", "m"], "moves": {"out": ["out", "p"]},
                        "not_sold": {"q": {"m": ["b"]}}},
             "e": {"kind": "chance", "levels": ["lo", "hi"], "given": ["next.status", "age"]}}}


def test_block_apply_matches_csr():
    """``mv`` on ``(n, k)`` applies P (and P^T) to each column."""
    spec = parse_spec(SMALL)
    model = compile_model(spec, random_tables(spec, 11))
    P = model.csr()
    X = np.random.default_rng(0).normal(size=(model.n_states, 3))
    np.testing.assert_allclose(np.asarray(model.operator.mv(jnp.asarray(X))), P @ X, rtol=0, atol=1e-12)
    np.testing.assert_allclose(np.asarray(model.operator.transpose().mv(jnp.asarray(X))), P.T @ X,
                               rtol=0, atol=1e-12)


def test_random_tables_are_accepted_and_forbidden_mass_is_not():
    """The generator's tables pass check_table, and moving mass onto a forbidden move fails."""
    from stateworth.errors import SpecError
    spec = parse_spec(SMALL)
    tables = random_tables(spec, 3)
    compile_model(spec, tables)
    bad = tables["status"].copy()
    bad[0, 0] = [0.5, 0.25, 0.25]  # m=a, status=out -> q is not an allowed move
    with pytest.raises(SpecError, match=r"axes\.status\.table.*forbid.*status=out.*next status=q"):
        compile_model(spec, {"status": bad})


def test_rule_checker_is_not_vacuous(monkeypatch):
    """The rule check above fails on a chain that breaks a rule: mass on a forbidden move (tables
    compiled unchecked), and a counter that ages on the wrong status."""
    spec = parse_spec(SMALL)
    tables = random_tables(spec, 5)
    bad = tables["status"].copy()
    bad[0, 0] = [0.5, 0.25, 0.25]  # out -> q is not an allowed move
    model = compile_model(spec, {**tables, "status": bad}, check=False)
    with pytest.raises(AssertionError, match="mass on a move from out"):
        _check_rules(SMALL, model, model.csr())

    # the check reads the explicit matrix, so the broken counter goes where that is built
    import stateworth.rules.explicit as explicit
    real = explicit.counter_index
    monkeypatch.setattr(explicit, "counter_index", lambda s, a: np.minimum(real(s, a) + 1, 2).astype(np.int32))
    model = compile_model(spec, tables)
    with pytest.raises(AssertionError, match="counter age"):
        _check_rules(SMALL, model, model.csr())


@settings(max_examples=16, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(specs(), st.sampled_from([(0, 0.0), (3, 0.0), (0, 2.0), (3, 2.0)]))
def test_einsum_offsets_and_gather_steps_match_csr(case, limits):
    """With the pair limit lowered, factors are contracted by einsum (offset share 0) or, where
    every level has a move rule, offset by offset (share 2: always), and counters gathered (the
    paths grids with large axes take); the apply and its transpose still equal the CSR matrix."""
    from unittest import mock

    import stateworth.rules.grid_operator as operator_module

    spec_dict, seed = case
    pair_limit, share = limits
    if share:
        # a level without a move rule may move anywhere: spell that out for every random axis
        # given itself, so that it has a rule for each level (the condition of an offsets
        # step); the chain is the same
        spec_dict = {**spec_dict, "axes": {
            name: ({**ax, "moves": {lv: ax.get("moves", {}).get(lv, list(ax["levels"])) for lv in ax["levels"]}}
                   if name in (ax.get("given") or []) else ax) for name, ax in spec_dict["axes"].items()}}
    spec = parse_spec(spec_dict)
    with mock.patch.object(operator_module, "PAIR_LIMIT", pair_limit), \
            mock.patch.object(operator_module, "OFFSET_SHARE", share):
        model = compile_model(spec, random_tables(spec, seed))
        model.operator  # built on first use: here, under the lowered limits
    kinds = {type(s) for s in model.operator.plan.steps}
    if pair_limit == 0:
        assert PairStep not in kinds
    if share == 0.0:
        assert Offsets not in kinds
    P = model.csr()
    rng = np.random.default_rng(seed)
    x, y = rng.normal(size=model.n_states), rng.normal(size=model.n_states)
    px, pty = _both(model.operator, jnp.asarray(x), jnp.asarray(y))
    np.testing.assert_allclose(np.asarray(px), P @ x, rtol=0, atol=1e-12)
    np.testing.assert_allclose(np.asarray(pty), P.T @ y, rtol=0, atol=1e-12)


BANDED = {
    "model": {"name": "banded", "discount": {"annual_rate": 0.1}},
    "axes": {"m": {"kind": "fixed", "levels": ["a", "b"]},
             "age": {"kind": "counter", "size": 3, "advance_while": "member", "reset_on": ["join"]},
             "status": {"kind": "status", "levels": ["out", "p", "q"], "members": ["p", "q"],
                        "given": ["status", "m", "band"], "moves": {"out": ["out", "p"]}},
             # 20 levels, each moving at most two down or one up: 77 level pairs (more than
             # PAIR_LIMIT) but 4 offsets, so an offsets step
             "band": {"kind": "chance", "levels": [f"b{i:02d}" for i in range(20)],
                      "given": ["next.status", "band"],
                      "moves": {f"b{i:02d}": [f"b{j:02d}" for j in range(max(0, i - 2), min(20, i + 2))]
                                for i in range(20)}},
             "e": {"kind": "chance", "levels": ["lo", "hi"], "given": ["next.band", "e"]}}}


def test_banded_axis_is_applied_offset_by_offset():
    """A 20-level band whose moves span offsets -2..+1 compiles to one ``offsets`` step (not a
    dense einsum), and its apply, transpose and block apply equal the explicit CSR matrix (built
    by walking the draws forward, independent of the steps); rows sum to 1."""
    spec = parse_spec(BANDED)
    model = compile_model(spec, random_tables(spec, 4))
    steps = model.operator.plan.steps
    off = [s for s in steps if isinstance(s, Offsets)]
    assert [s.key for s in off] == ["table.band"] and off[0].offsets == (-2, -1, 0, 1)
    assert not any(isinstance(s, Contract) for s in steps)
    P = model.csr()
    rng = np.random.default_rng(1)
    x, y = rng.normal(size=model.n_states), rng.normal(size=model.n_states)
    px, pty = _both(model.operator, jnp.asarray(x), jnp.asarray(y))
    np.testing.assert_allclose(np.asarray(px), P @ x, rtol=0, atol=1e-12)
    np.testing.assert_allclose(np.asarray(pty), P.T @ y, rtol=0, atol=1e-12)
    X = rng.normal(size=(model.n_states, 2))
    np.testing.assert_allclose(np.asarray(model.operator.mv(jnp.asarray(X))), P @ X, rtol=0, atol=1e-12)
    np.testing.assert_allclose(np.asarray(P.sum(axis=1)).ravel(), 1.0, rtol=0, atol=1e-12)
    _check_rules(BANDED, model, P)
    # the same operator in float32 (the preconditioner's smoother) agrees to float32 rounding
    p32 = model.operator.astype(jnp.float32).mv(jnp.asarray(x, dtype=jnp.float32))
    np.testing.assert_allclose(np.asarray(p32), P @ x, rtol=0, atol=1e-5 * np.max(np.abs(x)))


def test_example_plan_is_pairwise_with_tables_in_step_order():
    """The example's factors are small: each is one pairwise step (tenure resolved inside the
    status step, no gather; the month cycle is a roll), the result is in grid order (no
    transpose left), and the
    operator stores each table in its step's order while `with_tables` takes the spec's order."""
    import tomllib
    from pathlib import Path

    spec = parse_spec(tomllib.loads((Path(__file__).resolve().parents[1] / "examples" / "fitness.toml").read_text()))
    model = compile_model(spec, {f.axis: masked_uniform(spec, f) for f in factors_of(spec)})
    steps = model.operator.plan.steps
    kinds = [type(s) for s in steps]
    assert kinds.count(PairStep) == len(model.factors) and Contract not in kinds and CounterGather not in kinds
    assert isinstance(steps[-1], Finish) and steps[-1].perm == tuple(range(len(steps[-1].perm)))
    status = [s for s in steps if isinstance(s, PairStep) and s.axis == spec.status_axis][0]
    assert [c for c, _ in status.counters] == [a.name for a in model.grid.axes if a.kind == "counter"]
    t = model.tables[spec.status_axis]
    stored = model.operator.arrays[f"table.{spec.status_axis}"]
    np.testing.assert_array_equal(np.asarray(stored), np.transpose(t, status.perm))
    again = model.operator.with_tables({spec.status_axis: t})
    np.testing.assert_array_equal(np.asarray(again.arrays[f"table.{spec.status_axis}"]), np.asarray(stored))


@settings(max_examples=40, deadline=None, derandomize=True)
@given(st.integers(1, 6), st.data())
def test_counter_maps_and_their_transposes_are_adjoint(size, data):
    """For every map form (unchanged, +1 capped, reset, any other): the map equals indexing by
    its next levels, and <map(x), w> = <x, map^T(w)>."""
    from stateworth.rules.pairwise import _map, _map_transpose, classify

    col = np.array(data.draw(st.lists(st.integers(0, size - 1), min_size=size, max_size=size)))
    col = data.draw(st.sampled_from([col, np.arange(size), np.minimum(np.arange(size) + 1, size - 1),
                                     np.zeros(size, dtype=int)]))
    how = classify(col)
    rng = np.random.default_rng(size)
    x = rng.normal(size=(3, size, 2))
    w = rng.normal(size=(3, size, 2))
    y = np.asarray(_map(jnp.asarray(x), 1, how))
    np.testing.assert_allclose(y, x[:, col, :], rtol=0, atol=1e-15)
    z = np.asarray(_map_transpose(jnp.asarray(w), 1, how))
    np.testing.assert_allclose(np.sum(y * w), np.sum(x * z), rtol=1e-12)


@pytest.mark.parametrize("limits", [None, (0, 2.0)])
def test_each_step_transpose_is_the_adjoint_of_its_apply(limits):
    """Step by step, on the frames the plan passes along: <apply(x), w> = <x, transpose(w)> (the
    definition of the transpose; common practice, no source), and the steps in turn give the
    explicit matrix's ``P x``. With the default limits the example's plan is pair steps, a cycle
    roll and the finish; with pairs off and offsets allowed (its move rules cover every level)
    it is offsets, roll, counter gather, einsum and finish: all six kinds."""
    import tomllib
    from pathlib import Path
    from unittest import mock

    import stateworth.rules.grid_operator as operator_module
    from stateworth.rules.steps import CycleRoll

    spec = parse_spec(tomllib.loads((Path(__file__).resolve().parents[1] / "examples" / "fitness.toml").read_text()))
    pair_limit, share = limits or (operator_module.PAIR_LIMIT, operator_module.OFFSET_SHARE)
    with mock.patch.object(operator_module, "PAIR_LIMIT", pair_limit), \
            mock.patch.object(operator_module, "OFFSET_SHARE", share):
        model = compile_model(spec, random_tables(spec, 3))
        op = model.operator  # built on first use: here, under the patched limits
    steps = op.plan.steps
    expected = {PairStep, CycleRoll, Finish} if limits is None else {Offsets, CycleRoll, CounterGather, Contract, Finish}
    assert {type(s) for s in steps} == expected
    rng = np.random.default_rng(0)
    x = rng.normal(size=model.n_states)
    frame = jnp.asarray(x.reshape(op.plan.grid_shape))
    for step in steps:
        before = jax.ShapeDtypeStruct(frame.shape, frame.dtype)
        out = step.apply(op.arrays, frame)
        w = jnp.asarray(rng.normal(size=out.shape))
        back = step.transpose(op.arrays, w, before)
        assert back.shape == frame.shape
        np.testing.assert_allclose(float(jnp.vdot(out, w)), float(jnp.vdot(frame, back)), rtol=1e-12)
        frame = out
    np.testing.assert_allclose(np.asarray(frame).reshape(-1), model.csr() @ x, rtol=0, atol=1e-12)


def test_offsets_step_gradient_matches_the_dense_contraction():
    """The marginal values differentiate ``lam . P(T) v`` with respect to the factor tables (a VJP
    of the apply). Through an offsets step that gradient equals the dense einsum's on every entry
    the move rules allow (the only entries the marginal table ranks). The dense step's gradient is
    itself checked against finite differences of exact re-solves in tests/test_valuation.py."""
    from unittest import mock

    import stateworth.rules.grid_operator as operator_module
    from stateworth.estimation.estimate import allowed_mask

    spec = parse_spec(BANDED)
    tables = random_tables(spec, 6)
    ops = {}
    for share in (0.0, 0.5):
        with mock.patch.object(operator_module, "OFFSET_SHARE", share):
            ops[share] = compile_model(parse_spec(BANDED), tables)
            ops[share].operator  # built on first use: here, under the patched share
    assert any(isinstance(s, Offsets) for s in ops[0.5].operator.plan.steps)
    assert not any(isinstance(s, Offsets) for s in ops[0.0].operator.plan.steps)
    rng = np.random.default_rng(2)
    n = ops[0.5].n_states
    lam, v = jnp.asarray(rng.normal(size=n)), jnp.asarray(rng.normal(size=n))

    def grad(model):
        def f(t):
            return jnp.dot(lam, model.operator.with_tables({"band": t}).mv(v))
        return np.asarray(jax.grad(f)(jnp.asarray(tables["band"])))

    g_off, g_dense = grad(ops[0.5]), grad(ops[0.0])
    factor = next(f for f in ops[0.5].factors if f.axis == "band")
    ok = allowed_mask(spec, factor)
    assert ok.sum() < ok.size  # the rules do forbid entries here
    np.testing.assert_allclose(g_off[ok], g_dense[ok], rtol=1e-10, atol=1e-12)
