"""Reference models for benchmarks: one generator, sizes from 10^4 to 1.4 x 10^6 states.

Axes like the example: market (fixed), tenure (counter, +1 a month while a member, reset on join
and lapse), status (prospect, lapsed, three plans), engagement (chance, 5 bands, drawn after the
status and given it, moves up to two bands), propensity band (chance, sticky, moves up to two
bands). Tables are
random but persistent: monthly churn of a few per cent falling with tenure and engagement, join
and re-join rates below 2 %, plan moves about 1 %, beta from 10 % a year.
"""

from __future__ import annotations

import numpy as np

#: name -> (markets, tenure levels, propensity bands); states = M * T * 5 * 5 * B
SIZES = {
    "10k": (4, 25, 4),
    "100k": (8, 50, 10),
    "360k": (12, 60, 20),
    "1.4M": (28, 50, 40),
    "10M": (200, 50, 40),
}
#: sizes `make bench` runs by default (10M is run once, by stateworth alone, for time and memory)
DEFAULT = ["10k", "100k", "360k", "1.4M", "10M"]


def _within(levels: int, step: int, name: str) -> dict[str, list[str]]:
    """Move rules: each level to the levels at most ``step`` away."""
    return {name.format(i): [name.format(j) for j in range(max(0, i - step), min(levels, i + step + 1))]
            for i in range(levels)}


def spec_dict(markets: int, tenure: int, bands: int) -> dict:
    return {
        "model": {"name": f"bench-{markets}x{tenure}x{bands}", "currency": "EUR",
                  "discount": {"annual_rate": 0.10, "cash": "start"}},
        "axes": {
            "market": {"kind": "fixed", "levels": [f"m{i:02d}" for i in range(markets)]},
            "tenure": {"kind": "counter", "size": tenure, "advance_while": "member", "reset_on": ["join", "lapse"]},
            "status": {"kind": "status", "levels": ["prospect", "lapsed", "basic", "plus", "max"],
                       "members": ["basic", "plus", "max"],
                       "given": ["market", "tenure", "status", "engagement", "band"],
                       "moves": {"prospect": ["prospect", "basic", "plus"],
                                 "lapsed": ["lapsed", "basic", "plus", "max"],
                                 "basic": ["lapsed", "basic", "plus"],
                                 "plus": ["lapsed", "basic", "plus", "max"],
                                 "max": ["lapsed", "plus", "max"]}},
            "engagement": {"kind": "chance", "levels": [f"e{i}" for i in range(5)],
                           "given": ["next.status", "engagement"], "moves": _within(5, 2, "e{:d}")},
            # the rule "a band moves at most two levels a month" makes the band an offsets step
            # (rules/steps.py) instead of a dense contraction over all its levels
            "band": {"kind": "chance", "levels": [f"b{i:02d}" for i in range(bands)], "given": ["band"],
                     "moves": _within(bands, 2, "b{:02d}")},
        },
        "rewards": {"revenue": {"price": {"basic": 19.0, "plus": 29.0, "max": 49.0}, "fees_share": 0.2,
                                "on_join": -10.0}},
    }


def tables(markets: int, tenure: int, bands: int, seed: int = 0) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    M, T, S, E, B = markets, tenure, 5, 5, bands
    P = np.zeros((M, T, S, E, B, S))
    mk = rng.uniform(0.7, 1.3, size=M)[:, None, None, None]
    t = np.arange(T)[None, :, None, None]
    e = np.arange(E)[None, None, :, None]
    b = np.arange(B)[None, None, None, :] / max(B - 1, 1)
    join = 0.004 + 0.012 * b * mk * np.ones((M, T, E, B))
    rejoin = 0.01 + 0.015 * b * mk * np.ones((M, T, E, B))
    churn = (0.02 + 0.05 * np.exp(-t / 6.0)) * (1.4 - 0.2 * e) * (1.2 - 0.4 * b) * mk
    churn = np.clip(churn * np.ones((M, T, E, B)), 0.003, 0.3)
    up = 0.01 * (0.5 + b) * np.ones((M, T, E, B))
    down = 0.008 * np.ones((M, T, E, B))
    # prospect: basic or plus
    P[:, :, 0, :, :, 2] = join * 0.7
    P[:, :, 0, :, :, 3] = join * 0.3
    P[:, :, 0, :, :, 0] = 1 - join
    # lapsed
    P[:, :, 1, :, :, 2] = rejoin * 0.6
    P[:, :, 1, :, :, 3] = rejoin * 0.3
    P[:, :, 1, :, :, 4] = rejoin * 0.1
    P[:, :, 1, :, :, 1] = 1 - rejoin
    # basic
    P[:, :, 2, :, :, 1] = churn
    P[:, :, 2, :, :, 3] = up
    P[:, :, 2, :, :, 2] = 1 - churn - up
    # plus
    P[:, :, 3, :, :, 1] = churn * 0.9
    P[:, :, 3, :, :, 2] = down
    P[:, :, 3, :, :, 4] = up * 0.5
    P[:, :, 3, :, :, 3] = 1 - churn * 0.9 - down - up * 0.5
    # max
    P[:, :, 4, :, :, 1] = churn * 0.8
    P[:, :, 4, :, :, 3] = down
    P[:, :, 4, :, :, 4] = 1 - churn * 0.8 - down
    # engagement given next status: non-members drift down to e0; members move up to two bands a
    # month. Band: sticky, moves up to two bands. The explicit matrix then has about 38 non-zeros
    # a row (13.5 M at 360,000 states), the order of the reference model in DESIGN.md (20 M).
    Eng = np.zeros((S, E, E))
    for s in range(S):
        for i in range(E):
            if s < 2:
                Eng[s, i, max(i - 1, 0)] += 0.8
                Eng[s, i, max(i - 2, 0)] += 0.2
            else:
                w = np.array([0.05, 0.15, rng.uniform(0.5, 0.7), 0.15 * rng.uniform(0.6, 1.4), 0.05])
                for k, d in enumerate(range(-2, 3)):
                    Eng[s, i, min(max(i + d, 0), E - 1)] += w[k]
                Eng[s, i] /= Eng[s, i].sum()
    Band = np.zeros((B, B))
    for i in range(B):
        for d, w in ((-2, 0.01), (-1, 0.02), (0, 0.94), (1, 0.02), (2, 0.01)):
            Band[i, min(max(i + d, 0), B - 1)] += w
    return {"status": P, "engagement": Eng, "band": Band}


def build(size: str = "360k", seed: int = 0):
    """Compile the reference model of the given size name (see SIZES)."""
    from stateworth.rules import compile_model, parse_spec
    M, T, B = SIZES[size]
    return compile_model(parse_spec(spec_dict(M, T, B), source=f"bench:{size}"), tables(M, T, B, seed),
                         source=f"bench:{size}")


# ---- the wider family: shapes the generator above never makes --------------------------------
# Each builder returns (spec dict, tables) of random but plausible persistent tables. Sizes by
# name: "small" (a few thousand states, for tests) and "large" (benchmark rows).


def _rows(rng, shape, stay, moves):
    """A table of ``shape[:-1]`` cells over ``shape[-1]`` next levels: ``stay`` on the current
    level (an array broadcast over the cells, indexed by the level in the last given dim), the
    rest spread over ``moves`` (a boolean (K, K) allow mask) with random weights."""
    K = shape[-1]
    w = rng.uniform(0.2, 1.0, size=shape) * moves
    w = np.where(np.eye(K, dtype=bool), 0.0, w)
    w = w / np.maximum(w.sum(axis=-1, keepdims=True), 1e-300)
    t = (1.0 - stay)[..., None] * w
    return t + stay[..., None] * np.eye(K)


def weekly(size: str = "large", seed: int = 0) -> tuple[dict, dict[str, np.ndarray]]:
    """A weekly business: regions (fixed) x tenure in weeks (counter, capped at 104 for "large")
    x season (13 four-week periods, a cycle) x status (prospect, lapsed, 6 plans) x usage band
    (4 levels, dense). beta = 0.9985 a week (8.1 % a year); joining and churn vary by season,
    churn falls with tenure and usage. "large": 8 x 104 x 13 x 8 x 4 = 346,112 states."""
    R, T, C = {"large": (8, 104, 13), "medium": (1, 104, 13), "small": (2, 12, 13)}[size]
    P, U = 6, 4
    S = 2 + P
    rng = np.random.default_rng(seed)
    plans = [f"plan{i}" for i in range(P)]
    status = ["prospect", "lapsed"] + plans
    spec = {
        "model": {"name": f"weekly-{size}", "currency": "EUR", "period": "week",
                  "discount": {"annual_rate": 0.0812, "cash": "start"}},
        "axes": {
            "region": {"kind": "fixed", "levels": [f"r{i}" for i in range(R)]},
            "tenure": {"kind": "counter", "size": T, "advance_while": "member", "reset_on": ["join", "lapse"]},
            "season": {"kind": "cycle", "size": C},
            "status": {"kind": "status", "levels": status, "members": plans,
                       "given": ["region", "season", "tenure", "status", "usage"]},
            "usage": {"kind": "chance", "levels": [f"u{i}" for i in range(U)], "given": ["next.status", "usage"]},
        },
        "rewards": {"revenue": {"price": {p: 4.0 + 2.5 * i for i, p in enumerate(plans)}, "fees_share": 0.1}},
    }
    season = 1.0 + 0.6 * np.sin(2 * np.pi * np.arange(C) / C)[None, :, None, None]
    reg = rng.uniform(0.7, 1.3, size=R)[:, None, None, None]
    t = np.arange(T)[None, None, :, None]
    u = np.arange(U)[None, None, None, :]
    tab = np.zeros((R, C, T, S, U, S))
    join = 0.002 * season * reg * np.ones((R, C, T, U))
    rejoin = 0.004 * season * reg * np.ones((R, C, T, U))
    mix = rng.dirichlet(np.ones(P) * 2)
    tab[:, :, :, 0, :, 0] = 1 - join
    tab[:, :, :, 1, :, 1] = 1 - rejoin
    for j in range(P):
        tab[:, :, :, 0, :, 2 + j] = join * mix[j]
        tab[:, :, :, 1, :, 2 + j] = rejoin * mix[j]
    churn = np.clip((0.004 + 0.02 * np.exp(-t / 10.0)) * (1.5 - 0.3 * u) * (2.0 - season) * reg, 5e-4, 0.2)
    for j in range(P):
        sw = 0.002 * np.ones((R, C, T, U))
        tab[:, :, :, 2 + j, :, 1] = churn
        if j > 0:
            tab[:, :, :, 2 + j, :, 1 + j] = sw
        if j < P - 1:
            tab[:, :, :, 2 + j, :, 3 + j] = sw
        tab[:, :, :, 2 + j, :, 2 + j] = 1 - tab[:, :, :, 2 + j].sum(axis=-1)
    use = np.zeros((S, U, U))
    use[:2] = np.eye(U)[[0] * U]
    use[2:] = _rows(rng, (P, U, U), np.full((P, U), 0.8), np.ones((U, U), dtype=bool))
    return spec, {"status": tab, "usage": use}


def flat(size: str = "large", seed: int = 0) -> tuple[dict, dict[str, np.ndarray]]:
    """No fixed axis and several dense chance axes without move rules: status (prospect, lapsed,
    3 plans) x tenure (counter) x usage (U) x affinity (A) x device (D), each chance axis moving
    anywhere. "large": 5 x 24 x 8 x 10 x 12 = 115,200 states."""
    T, U, A, D = {"large": (24, 8, 10, 12), "small": (6, 3, 4, 3)}[size]
    rng = np.random.default_rng(seed)
    spec = {
        "model": {"name": f"flat-{size}", "currency": "EUR", "discount": {"annual_rate": 0.10}},
        "axes": {
            "tenure": {"kind": "counter", "size": T, "advance_while": "member", "reset_on": ["join", "lapse"]},
            "status": {"kind": "status", "levels": ["prospect", "lapsed", "a", "b", "c"], "members": ["a", "b", "c"],
                       "given": ["tenure", "status", "usage", "affinity"]},
            "usage": {"kind": "chance", "levels": [f"u{i}" for i in range(U)], "given": ["next.status", "usage"]},
            "affinity": {"kind": "chance", "levels": [f"a{i}" for i in range(A)], "given": ["affinity", "device"]},
            "device": {"kind": "chance", "levels": [f"d{i}" for i in range(D)], "given": ["device"]},
        },
        "rewards": {"revenue": {"price": {"a": 10.0, "b": 20.0, "c": 35.0}, "on_join": -5.0}},
    }
    S = 5
    aff = np.linspace(0, 1, A)[None, None, :]  # (T, U, A) cells
    us = np.linspace(0, 1, U)[None, :, None]
    t = np.arange(T)[:, None, None]
    tab = np.zeros((T, S, U, A, S))
    join = (0.004 + 0.02 * aff) * np.ones((T, U, A))
    tab[:, 0, :, :, 0] = 1 - join
    tab[:, 0, :, :, 2] = 0.6 * join
    tab[:, 0, :, :, 3] = 0.4 * join
    tab[:, 1, :, :, 1] = 1 - 1.5 * join
    tab[:, 1, :, :, 2] = 0.5 * 1.5 * join
    tab[:, 1, :, :, 3] = 0.3 * 1.5 * join
    tab[:, 1, :, :, 4] = 0.2 * 1.5 * join
    churn = np.clip((0.02 + 0.05 * np.exp(-t / 5.0)) * (1.4 - us) * (1.3 - 0.6 * aff), 0.002, 0.3)
    for j, (down, up) in enumerate([(None, 3), (2, 4), (3, None)]):
        s = 2 + j
        tab[:, s, :, :, 1] = churn
        if down is not None:
            tab[:, s, :, :, down] = 0.006
        if up is not None:
            tab[:, s, :, :, up] = 0.01
        tab[:, s, :, :, s] = 1 - tab[:, s].sum(axis=-1)
    use = np.zeros((S, U, U))
    use[:2] = np.eye(U)[[0] * U]
    use[2:] = _rows(rng, (3, U, U), np.full((3, U), 0.6), np.ones((U, U), dtype=bool))
    # given ["affinity", "device"]: drawn as (device, affinity, affinity') and laid out in given order
    affinity = np.transpose(_rows(rng, (D, A, A), np.full((D, A), 0.7), np.ones((A, A), dtype=bool)), (1, 0, 2))
    device = _rows(rng, (D, D), np.full(D, 0.9), np.ones((D, D), dtype=bool))
    return spec, {"status": tab, "usage": use, "affinity": affinity, "device": device}


def two_counters(size: str = "large", seed: int = 0) -> tuple[dict, dict[str, np.ndarray]]:
    """Tenure and months since lapse at once: market (fixed) x tenure (member months, reset on
    join and lapse) x since_lapse (former-member months, reset on lapse, advancing while a
    non-member) x status x engagement. Re-joining falls with months since lapse, churn with
    tenure. "large": 12 x 36 x 25 x 5 x 5 = 270,000 states."""
    M, T, L = {"large": (12, 36, 25), "small": (2, 6, 5)}[size]
    E, S = 5, 5
    rng = np.random.default_rng(seed)
    spec = {
        "model": {"name": f"two-counters-{size}", "currency": "EUR", "discount": {"annual_rate": 0.10}},
        "axes": {
            "market": {"kind": "fixed", "levels": [f"m{i}" for i in range(M)]},
            "tenure": {"kind": "counter", "size": T, "advance_while": "member", "reset_on": ["join", "lapse"]},
            "since_lapse": {"kind": "counter", "size": L, "advance_while": "non_member", "reset_on": ["lapse"]},
            "status": {"kind": "status", "levels": ["prospect", "lapsed", "basic", "plus", "max"],
                       "members": ["basic", "plus", "max"],
                       "given": ["market", "tenure", "since_lapse", "status", "engagement"],
                       "moves": {"prospect": ["prospect", "basic", "plus"],
                                 "lapsed": ["lapsed", "basic", "plus", "max"],
                                 "basic": ["lapsed", "basic", "plus"],
                                 "plus": ["lapsed", "basic", "plus", "max"],
                                 "max": ["lapsed", "plus", "max"]}},
            "engagement": {"kind": "chance", "levels": [f"e{i}" for i in range(E)],
                           "given": ["next.status", "engagement"], "moves": _within(E, 2, "e{:d}")},
        },
        "rewards": {"revenue": {"price": {"basic": 19.0, "plus": 29.0, "max": 49.0}, "on_join": -10.0,
                                "on_move": [{"from": ["lapsed"], "to": ["basic", "plus", "max"], "amount": -5.0}]}},
    }
    mk = rng.uniform(0.7, 1.3, size=M)[:, None, None, None]
    t = np.arange(T)[None, :, None, None]
    lp = np.arange(L)[None, None, :, None]
    e = np.arange(E)[None, None, None, :]
    tab = np.zeros((M, T, L, S, E, S))
    join = 0.008 * mk * np.ones((M, T, L, E))
    rejoin = (0.005 + 0.04 * np.exp(-lp / 4.0)) * mk * np.ones((M, T, L, E))
    churn = np.clip((0.02 + 0.05 * np.exp(-t / 6.0)) * (1.4 - 0.2 * e) * mk, 0.003, 0.3) * np.ones((M, T, L, E))
    tab[..., 0, :, 0] = 1 - join
    tab[..., 0, :, 2] = 0.7 * join
    tab[..., 0, :, 3] = 0.3 * join
    tab[..., 1, :, 1] = 1 - rejoin
    tab[..., 1, :, 2] = 0.6 * rejoin
    tab[..., 1, :, 3] = 0.3 * rejoin
    tab[..., 1, :, 4] = 0.1 * rejoin
    tab[..., 2, :, 1] = churn
    tab[..., 2, :, 3] = 0.01
    tab[..., 2, :, 2] = 1 - churn - 0.01
    tab[..., 3, :, 1] = 0.9 * churn
    tab[..., 3, :, 2] = 0.008
    tab[..., 3, :, 4] = 0.005
    tab[..., 3, :, 3] = 1 - 0.9 * churn - 0.013
    tab[..., 4, :, 1] = 0.8 * churn
    tab[..., 4, :, 3] = 0.008
    tab[..., 4, :, 4] = 1 - 0.8 * churn - 0.008
    eng = np.zeros((S, E, E))
    for s in range(S):
        for i in range(E):
            if s < 2:
                eng[s, i, max(i - 1, 0)] += 0.8
                eng[s, i, max(i - 2, 0)] += 0.2
            else:
                w = np.array([0.05, 0.15, rng.uniform(0.5, 0.7), 0.15, 0.05])
                for k, d in enumerate(range(-2, 3)):
                    eng[s, i, min(max(i + d, 0), E - 1)] += w[k]
                eng[s, i] /= eng[s, i].sum()
    return spec, {"status": tab, "engagement": eng}


FAMILY = {"weekly": weekly, "flat": flat, "two_counters": two_counters}


def build_family(name: str, size: str = "large", seed: int = 0):
    """Compile a model of the wider family (see :data:`FAMILY`)."""
    from stateworth.rules import compile_model, parse_spec

    spec, tabs = FAMILY[name](size, seed)
    return compile_model(parse_spec(spec, source=f"bench:{name}-{size}"), tabs, source=f"bench:{name}-{size}")
