"""Multinomial flows of a finite population through a fitted chain, and its expected push-forward.

A population is held as groups: ``n`` people who share a state (grid codes in grid order), a
replicate index and a carried tag (a cohort's censoring horizon, or 0). One period moves every
group the way the chain moves one person, factor by factor in draw order: the ``n`` people of a
group split over the next levels of a random axis as one multinomial draw,

    (X_1, ..., X_L) ~ Multinomial(n, T[given codes, :]),

each non-empty part becomes a group, and after the last factor the fixed axes stay, counters
follow their index maps and cycles advance by one; groups that meet in the same (replicate,
tag, state) are merged. Since people move independently given their state, this is exactly the
distribution of the counts of a population of independent chains (the sequential multinomials
are the factorisation of one person's transition probability). Replicate ``r`` uses the tables
of posterior draw ``draw_of_rep[r]`` (or the point tables), so a set of replicates carries both
the chain's own randomness and the fitted tables' uncertainty.

The cost grows with the occupied (replicate, state) pairs, not with the people: a market of
millions of never-members is a handful of groups.

:func:`push_forward` is the expected counterpart, ``x_k = P^T x_{k-1}``, with the explicit
matrix (:meth:`CompiledModel.csr`) on grids up to :data:`CSR_MAX_STATES` and the structured
operator's transpose beyond; :func:`pull_back` applies ``P`` to vectors (expectations of a
function of the next state).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from stateworth.rules.counters import counter_index

#: grids up to this many states use the explicit CSR matrix for expected flows (its entries grow
#: with states x next-level combinations); larger ones the structured operator
CSR_MAX_STATES = 200_000
#: group rows a simulation holds at once, about: replicates are simulated in chunks below it
CHUNK_ROWS = 1_000_000
#: below this many (replicate, tag, state) keys groups are merged by a dense bincount, above by
#: a sort
DENSE_KEYS = 20_000_000


@dataclass
class Groups:
    """People in groups: ``state`` ``(N,)`` flat state index, ``rep`` ``(N,)`` replicate,
    ``tag`` ``(N,)`` a carried key (0 if unused), ``n`` ``(N,)`` people (> 0)."""

    state: np.ndarray
    rep: np.ndarray
    tag: np.ndarray
    n: np.ndarray

    def take(self, idx: np.ndarray) -> "Groups":
        return Groups(self.state[idx], self.rep[idx], self.tag[idx], self.n[idx])


@dataclass(frozen=True)
class FlowChain:
    """The chain as the flows read it, on flat state indices.

    Factor ``k`` (draw order): ``tables[k]`` its rows ``(D, cells, L)`` over the flattened
    given cells, stacked over ``D`` table sets (posterior draws, or the point tables alone);
    a state's cell is ``cell_base[k][state] + sum_j next_code_j * stride`` over the
    ``cell_next[k]`` pairs ``(j, stride)`` (``j``: an earlier factor whose next level it is
    given); ``stride[k]`` is the flat stride of the axis it draws. The next state's fixed and
    cycle axes are ``det_next[state]``; counters ``(counter_of, index map [c, st, st'], stride)``
    follow the status move. ``status_of[state]`` is the status code, ``member`` the member
    flag of each status level, ``status_factor`` the index of the status factor."""

    n_states: int
    tables: tuple[np.ndarray, ...]
    cell_base: tuple[np.ndarray, ...]
    cell_next: tuple[tuple[tuple[int, int], ...], ...]
    stride: tuple[int, ...]
    det_next: np.ndarray
    counters: tuple[tuple[np.ndarray, np.ndarray, int], ...]
    status_of: np.ndarray
    member: np.ndarray
    status_factor: int

    @property
    def n_tables(self) -> int:
        return max(int(t.shape[0]) for t in self.tables)


def flow_chain(model, draws: bool = True) -> FlowChain:
    """The flows' view of a compiled model: the posterior draws of every table when ``draws``
    and the model has them (a factor without draws repeats its point table), else the point
    tables alone."""
    spec, grid = model.spec, model.grid
    names = list(grid.names)
    shape = tuple(grid.shape)
    strides = np.cumprod((1,) + shape[::-1])[::-1][1:].astype(np.int64)  # C order
    codes = grid.codes()
    order = [f.axis for f in model.factors]
    D = 0
    if draws and model.draws:
        D = int(next(iter(model.draws.values())).shape[0])
    tables, base, nxt = [], [], []
    for f in model.factors:
        L = f.shape[-1]
        cells = int(np.prod(f.shape[:-1], dtype=np.int64))
        # a factor without draws keeps its point table (one set; the step reads set 0 for it)
        t = model.draws.get(f.axis) if D else None
        t = np.asarray(model.tables[f.axis] if t is None else t, dtype=np.float64).reshape(-1, cells, L)
        # the multinomial draw wants rows summing to at most 1 + 1e-12; written tables may be
        # off by up to 1e-9 (the spec's tolerance), so only those are rescaled (draws can be large)
        total = t.sum(axis=-1, keepdims=True)
        if np.abs(total - 1.0).max(initial=0.0) > 1e-13 or (t < 0).any():
            t = np.clip(t, 0.0, None)
            total = t.sum(axis=-1, keepdims=True)
            t = t / np.where(total > 0, total, 1.0)
        tables.append(t)
        gstride = np.cumprod((1,) + f.shape[:-1][::-1])[::-1][1:]
        b = np.zeros(grid.size, dtype=np.int64)
        pairs = []
        for g, st in zip(f.given, gstride):
            if g.startswith("next."):
                pairs.append((order.index(g[5:]), int(st)))
            else:
                b += codes[names.index(g)].astype(np.int64) * int(st)
        base.append(b)
        nxt.append(tuple(pairs))
    det = np.zeros(grid.size, dtype=np.int64)
    counters = []
    for i, a in enumerate(grid.axes):
        if a.kind == "fixed":
            det += codes[i].astype(np.int64) * strides[i]
        elif a.kind == "cycle":
            det += ((codes[i].astype(np.int64) + 1) % a.size) * strides[i]
        elif a.kind == "counter":
            counters.append((codes[i].astype(np.int64), counter_index(spec, a.name).astype(np.int64), int(strides[i])))
    st = spec.status_axis
    return FlowChain(n_states=int(grid.size), tables=tuple(tables), cell_base=tuple(base), cell_next=tuple(nxt),
                     stride=tuple(int(strides[names.index(a)]) for a in order), det_next=det,
                     counters=tuple(counters), status_of=codes[names.index(st)].astype(np.int64),
                     member=np.asarray(spec.member_flags()), status_factor=order.index(st))


@dataclass(frozen=True)
class StepFlows:
    """Status moves of one period, per replicate ``(R,)``: people who joined (non-member ->
    member) and who lapsed (member -> non-member)."""

    joins: np.ndarray
    lapses: np.ndarray


def step(chain: FlowChain, groups: Groups, draw_of_rep: np.ndarray, reps: int, rng: np.random.Generator, *,
         absorb_lapses: bool = False, tags: int = 1) -> tuple[Groups, StepFlows]:
    """One period of multinomial flows (see the module doc). ``draw_of_rep[r]`` is the table set
    replicate ``r`` uses; ``reps`` replicates and ``tags`` tag values in all (for merging).
    ``absorb_lapses``: people who lapse leave the population (a retention cohort), right after
    the status draw."""
    cur, rep, tag, n = groups.state, groups.rep, groups.tag, groups.n
    drawn: list[np.ndarray] = []
    joins = lapses = np.zeros(reps)
    for k, tab in enumerate(chain.tables):
        cell = chain.cell_base[k][cur]
        for j, st in chain.cell_next[k]:
            cell = cell + drawn[j] * st
        rows = tab[draw_of_rep[rep], cell] if tab.shape[0] > 1 else tab[0][cell]
        x = rng.multinomial(n, rows)
        r, lv = np.nonzero(x)
        cur, rep, tag, n = cur[r], rep[r], tag[r], x[r, lv]
        drawn = [d[r] for d in drawn] + [lv]
        if k == chain.status_factor:
            was = chain.member[chain.status_of[cur]]
            now = chain.member[lv]
            joins = np.bincount(rep, weights=n * (~was & now), minlength=reps)
            lapses = np.bincount(rep, weights=n * (was & ~now), minlength=reps)
            if absorb_lapses:
                cur, rep, tag, n = cur[now], rep[now], tag[now], n[now]
                drawn = [d[now] for d in drawn]
    nxt = chain.det_next[cur]
    for d, st in zip(drawn, chain.stride):
        nxt = nxt + d * st
    st_next = drawn[chain.status_factor]
    st_cur = chain.status_of[cur]
    for counter_of, index, st in chain.counters:
        nxt = nxt + index[counter_of[cur], st_cur, st_next] * st
    return merge(chain, Groups(nxt, rep, tag, n), reps, tags), StepFlows(joins, lapses)


def merge(chain: FlowChain, groups: Groups, reps: int, tags: int = 1) -> Groups:
    """Groups with the same (replicate, tag, state) merged into one."""
    if len(groups.n) == 0:
        return groups
    ns = chain.n_states
    key = (groups.rep.astype(np.int64) * tags + groups.tag) * ns + groups.state
    space = reps * tags * ns
    if space <= DENSE_KEYS:
        total = np.bincount(key, weights=groups.n, minlength=space)
        uk = np.flatnonzero(total)
        cnt = total[uk]
    else:
        uk, inv = np.unique(key, return_inverse=True)
        cnt = np.bincount(inv, weights=groups.n)
    rt = uk // ns
    return Groups(uk % ns, rt // tags, rt % tags, np.rint(cnt).astype(np.int64))


def replicate(groups: Groups, reps: int) -> Groups:
    """The same groups in each of ``reps`` replicates."""
    G = len(groups.n)
    return Groups(np.tile(groups.state, reps), np.repeat(np.arange(reps, dtype=np.int64), G),
                  np.tile(groups.tag, reps), np.tile(groups.n, reps))


# ---------------------------------------------------------------------------------------------
# expected flows


def chain_maps(model) -> tuple[Callable[[np.ndarray], np.ndarray], Callable[[np.ndarray], np.ndarray]]:
    """``(pull_back, push_forward)`` of the point model: ``v -> P v`` (the expectation of
    ``v`` at the next state, per state) and ``x -> P^T x`` (a distribution one period on). The
    explicit matrix on grids up to :data:`CSR_MAX_STATES`, else the structured operator."""
    if model.n_states <= CSR_MAX_STATES:
        P = model.csr()
        PT = P.T.tocsr()
        return (lambda v: np.asarray(P @ v)), (lambda x: np.asarray(PT @ x))
    import jax
    import jax.numpy as jnp

    from stateworth import config

    config.use_jax()
    apply = jax.jit(lambda op, x: op.mv(x))
    op, opT = model.operator, model.operator.transpose()
    return (lambda v: np.asarray(apply(op, jnp.asarray(v)))), (lambda x: np.asarray(apply(opT, jnp.asarray(x))))
