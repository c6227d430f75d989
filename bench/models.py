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
            # (rules/operator.py) instead of a dense contraction over all its levels
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
