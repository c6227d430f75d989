"""The model spec: a TOML file parsed into pydantic models, then checked for consistency.

A spec declares the period and discounting, the axes of the state grid with their kinds, the move
rules, the factors (which axes each random axis is ``given``, and the draw order) and the reward
streams. See README.md, "Spec reference", for every key.

Every problem is reported with its key path (``axes.status.moves.solo``) and what would be right.
:func:`load_spec` collects *all* problems and raises one :class:`~stateworth.errors.SpecError`
whose ``problems`` attribute lists them.
"""

from __future__ import annotations

import math
import tomllib
from pathlib import Path
from typing import TYPE_CHECKING, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError

from stateworth.errors import SpecError

if TYPE_CHECKING:
    import numpy as np

AXIS_KINDS = ("status", "fixed", "counter", "cycle", "chance")
RANDOM_KINDS = ("status", "chance")
DETERMINISTIC_KINDS = ("counter", "cycle")
COUNTER_EVENTS = ("join", "lapse", "change")
PERIODS_PER_YEAR = {"month": 12, "week": 52, "quarter": 4, "year": 1}
RESERVED_STREAMS = ("member_months",)
#: Rows of a written probability table must sum to one within this tolerance.
ROW_SUM_TOLERANCE = 1e-9


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", populate_by_name=True)


class Discount(_Strict):
    """Discounting: ``beta = (1 + annual_rate) ** (-1 / periods_per_year)``.

    ``cash = "start"``: each period's cash arrives at its start (the first period undiscounted);
    ``"end"``: at its end (everything discounted one more period)."""

    annual_rate: float
    cash: Literal["start", "end"] = "start"


class ModelSection(_Strict):
    name: str = Field(min_length=1)
    currency: str = "EUR"
    period: Literal["month", "week", "quarter", "year"] = "month"
    discount: Discount
    draw_order: list[str] | None = None
    description: str | None = None


class TableRow(_Strict):
    """One entry of a written factor table: the cells it covers and the next-level probabilities.

    ``when`` maps given axes to a level or a list of levels (an omitted axis means all levels);
    later rows override earlier ones on the cells they share. Next levels left out of ``probs``
    have probability 0."""

    when: dict[str, str | list[str]] = Field(default_factory=dict)
    probs: dict[str, float]


class Propensity(_Strict):
    """A propensity band: the axis's levels are quantile bands of a logistic score of being a
    member, fitted on the panel's ``covariates`` (columns of the panel: numbers, except those
    also listed in ``categorical``, whose levels are read from the panel and enter the score as
    indicators against the first level in sorted order). The band of a panel row is derived
    from its covariates when fitting; the axis is then an ordinary chance axis whose kernel is
    estimated like any other."""

    covariates: list[str]
    categorical: list[str] = Field(default_factory=list)


class Axis(_Strict):
    kind: Literal["status", "fixed", "counter", "cycle", "chance"]
    levels: list[str] | None = None
    size: int | None = None
    description: str | None = None
    # status
    members: list[str] | None = None
    not_sold: dict[str, list[str] | dict[str, list[str]]] = Field(default_factory=dict)
    # random axes
    given: list[str] | None = None
    moves: dict[str, list[str]] = Field(default_factory=dict)
    table: list[TableRow] | None = None
    # chance: the levels are propensity bands derived from covariates (see Propensity)
    propensity: Propensity | None = None
    # counter
    advance_while: str | list[str] | None = None
    reset_on: list[str] | None = None


class OnMove(_Strict):
    from_: list[str] = Field(alias="from")
    to: list[str]
    amount: float


class RewardStream(_Strict):
    """A per-period cash flow in the model's currency.

    Per member period: ``price[plan]`` (a number, or a table by the levels of one fixed axis)
    times ``1 - fees_share``, minus ``costs[axis][level]``. One-off amounts on status moves:
    ``on_join`` (non-member -> member), ``on_lapse`` (member -> non-member), ``on_move`` (listed
    moves)."""

    description: str | None = None
    price: dict[str, float | dict[str, float]] = Field(default_factory=dict)
    fees_share: float = 0.0
    costs: dict[str, dict[str, float]] = Field(default_factory=dict)
    on_join: float = 0.0
    on_lapse: float = 0.0
    on_move: list[OnMove] = Field(default_factory=list)


class Spec(_Strict):
    model: ModelSection
    axes: dict[str, Axis]
    rewards: dict[str, RewardStream] = Field(default_factory=dict)

    # ---- derived views (valid only after check_spec passed) ----
    def axis_levels(self, name: str) -> list[str]:
        ax = self.axes[name]
        if ax.levels is not None:
            return list(ax.levels)
        return [str(i) for i in range(ax.size or 0)]

    @property
    def status_axis(self) -> str:
        return next(n for n, a in self.axes.items() if a.kind == "status")

    @property
    def draw_order(self) -> list[str]:
        if self.model.draw_order:
            return list(self.model.draw_order)
        return [n for n, a in self.axes.items() if a.kind in RANDOM_KINDS]

    @property
    def grid_order(self) -> list[str]:
        """Axis order of the state grid: fixed, then counters and cycles, then random axes in
        draw order. Fixed axes lead so that the operator is block-diagonal in its first
        dimensions."""
        fixed = [n for n, a in self.axes.items() if a.kind == "fixed"]
        det = [n for n, a in self.axes.items() if a.kind in DETERMINISTIC_KINDS]
        return fixed + det + self.draw_order

    @property
    def members(self) -> list[str]:
        return list(self.axes[self.status_axis].members or [])

    def member_flags(self) -> "np.ndarray":
        """Boolean ``(S,)`` over the status levels in order: True for a member level (a plan)."""
        import numpy as np

        m = set(self.members)
        return np.array([lv in m for lv in self.axis_levels(self.status_axis)], dtype=bool)

    @property
    def non_members(self) -> list[str]:
        m = set(self.members)
        return [lv for lv in self.axis_levels(self.status_axis) if lv not in m]

    @property
    def periods_per_year(self) -> int:
        return PERIODS_PER_YEAR[self.model.period]

    @property
    def beta(self) -> float:
        """Per-period discount factor (dimensionless)."""
        return (1.0 + self.model.discount.annual_rate) ** (-1.0 / self.periods_per_year)

    def stream_names(self) -> list[str]:
        return list(self.rewards) + ["member_months"]

    def canonical(self) -> dict[str, Any]:
        """A JSON-ready dict that identifies the spec (used in the content hash)."""
        return self.model_dump(mode="json", by_alias=True, exclude_none=True)


def _loc(loc: tuple) -> str:
    return ".".join(str(p) for p in loc)


def _pydantic_problems(err: ValidationError) -> list[str]:
    out = []
    for e in err.errors():
        loc = [p for p in e["loc"] if not (isinstance(p, str) and p in ("str", "float", "list[str]", "dict[str,float]", "dict[str,list[str]]", "list[str]"))]
        path = _loc(tuple(loc))
        if e["type"] == "extra_forbidden":
            out.append(f"{path}: unknown key; check its spelling (see README 'Spec reference')")
        elif e["type"] == "missing":
            out.append(f"{path}: required key is missing")
        elif e["type"] == "literal_error":
            out.append(f"{path}: {e['msg']} (got {e.get('input')!r})")
        else:
            out.append(f"{path}: {e['msg']} (got {e.get('input')!r})")
    # union types produce one error per branch; keep the first per path
    seen, uniq = set(), []
    for p in out:
        key = p.split(":")[0]
        if key not in seen:
            seen.add(key)
            uniq.append(p)
    return uniq


def parse_spec(data: dict[str, Any], source: str = "<spec>") -> Spec:
    """Validate a spec given as a dict (already parsed TOML). Raises SpecError with all problems
    (:func:`spec_problems`: unknown keys do not hide the cross-reference problems)."""
    spec, problems = spec_problems(data)
    if problems:
        raise _spec_error(source, problems)
    assert spec is not None
    return spec


def spec_problems(data: dict[str, Any]) -> tuple[Spec | None, list[str]]:
    """``(spec, problems)``: every problem of a spec dict at once (the spec is None when any).

    A key pydantic does not know (a misspelt key) stops it from building the spec, which would
    hide every cross-reference problem behind the first typo. An unknown key contributes nothing
    to the spec, so when unknown keys are all pydantic refuses, they are taken out of a copy and
    the cross-reference checks (:func:`check_spec`) run on the rest. A value of the wrong type
    (or a required key missing) is listed alone with the other refused values: without it the
    rest cannot be read as meant (a plan dropped from ``members`` would make every mention of
    it look wrong)."""
    try:
        spec = Spec.model_validate(data)
    except ValidationError as err:
        problems = _pydantic_problems(err)
        if any(e["type"] != "extra_forbidden" for e in err.errors()):
            return None, problems
        try:
            rest = Spec.model_validate(_without(data, [_data_path(data, e["loc"]) for e in err.errors()]))
        except ValidationError:  # pragma: no cover - removing unknown keys leaves a readable spec
            return None, problems
        return None, problems + [pr for pr in check_spec(rest) if pr not in problems]
    problems = check_spec(spec)
    return (None if problems else spec), problems


def _data_path(data: Any, loc: tuple) -> tuple:
    """The part of a pydantic error location that exists in the data (pydantic adds the names
    of union branches, ``str`` or ``list[str]``, which are not keys)."""
    out: list = []
    cur = data
    for part in loc:
        if isinstance(cur, dict) and part in cur:
            out.append(part)
            cur = cur[part]
        elif isinstance(cur, list) and isinstance(part, int) and 0 <= part < len(cur):
            out.append(part)
            cur = cur[part]
    return tuple(out)


def _without(data: Any, paths: list[tuple]) -> Any:
    """A deep copy of ``data`` without the dict keys at ``paths``."""
    import copy

    out = copy.deepcopy(data)
    for path in paths:
        parent = out
        for part in path[:-1]:
            parent = parent[part]
        parent.pop(path[-1], None)
    return out


def load_spec(path: str | Path) -> Spec:
    """Read and validate a TOML spec file."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise SpecError("no such file; give the path to a .toml spec", where=str(path)) from None
    except (IsADirectoryError, UnicodeDecodeError) as e:
        raise SpecError(f"cannot read as UTF-8 text ({e.__class__.__name__})", where=str(path)) from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise SpecError(f"not valid TOML: {e}", where=str(path)) from None
    return parse_spec(data, source=str(path))


def _spec_error(source: str, problems: list[str]) -> SpecError:
    msg = problems[0]
    if len(problems) > 1:
        msg += f" (and {len(problems) - 1} more problem(s); `stateworth check` lists them all)"
    err = SpecError(msg, where=source)
    err.problems = [f"{source}: {p}" for p in problems]  # type: ignore[attr-defined]
    return err


def _fmt(levels: list[str], limit: int = 12) -> str:
    # long lists (hundreds of markets) would drown the one-line message
    if len(levels) > limit:
        return ", ".join(levels[: limit - 2]) + f", ... {levels[-1]} ({len(levels)} in all)"
    return ", ".join(levels)


def check_spec(spec: Spec) -> list[str]:
    """Cross-reference checks pydantic cannot express. Returns a list of problems (empty = ok)."""
    p: list[str] = []
    rate = spec.model.discount.annual_rate
    if not (math.isfinite(rate) and 0.0 < rate < 1.0):
        p.append(f"model.discount.annual_rate: must lie strictly between 0 and 1 (got {rate}); "
                 "write 10 % a year as 0.10")
    if not spec.axes:
        p.append("axes: declare at least a status axis")
        return p
    statuses = [n for n, a in spec.axes.items() if a.kind == "status"]
    if len(statuses) == 0:
        p.append("axes: no axis has kind = \"status\"; exactly one is required")
    elif len(statuses) > 1:
        p.append(f"axes.{statuses[1]}.kind: more than one status axis ({_fmt(statuses)}); "
                 "exactly one is allowed, make the others kind = \"chance\"")

    levels: dict[str, list[str]] = {}
    for name, ax in spec.axes.items():
        where = f"axes.{name}"
        if "." in name or not name:
            p.append(f"{where}: axis names may not contain '.'")
        if ax.levels is not None and ax.size is not None:
            if len(ax.levels) != ax.size:
                p.append(f"{where}.size: {ax.size} does not match the {len(ax.levels)} levels; give one of the two")
        if ax.levels is None and ax.size is None:
            p.append(f"{where}: give 'levels' (a list of names) or 'size' (a count)")
            levels[name] = []
            continue
        if ax.levels is not None:
            if len(ax.levels) == 0:
                p.append(f"{where}.levels: must not be empty")
            dup = sorted({lv for lv in ax.levels if ax.levels.count(lv) > 1})
            if dup:
                p.append(f"{where}.levels: duplicated level(s) {_fmt(dup)}")
            levels[name] = list(ax.levels)
        else:
            if ax.size is None or ax.size < 1:
                p.append(f"{where}.size: must be a positive whole number (got {ax.size})")
                levels[name] = []
                continue
            if ax.kind in ("status", "chance", "fixed"):
                p.append(f"{where}: a {ax.kind} axis needs named 'levels', not only a size")
            levels[name] = [str(i) for i in range(ax.size)]
        # keys that do not belong to this kind
        wrong = []
        if ax.kind != "status":
            if ax.members is not None:
                wrong.append("members")
            if ax.not_sold:
                wrong.append("not_sold")
        if ax.kind not in RANDOM_KINDS:
            if ax.given is not None:
                wrong.append("given")
            if ax.moves:
                wrong.append("moves")
            if ax.table is not None:
                wrong.append("table")
        if ax.kind != "chance" and ax.propensity is not None:
            wrong.append("propensity")
        if ax.kind != "counter":
            if ax.advance_while is not None:
                wrong.append("advance_while")
            if ax.reset_on is not None:
                wrong.append("reset_on")
        for w in wrong:
            p.append(f"{where}.{w}: not used by a {ax.kind} axis; remove it")

    if len(statuses) != 1:
        return p
    st = statuses[0]
    st_ax = spec.axes[st]
    st_levels = levels.get(st, [])
    members = st_ax.members or []
    if not members:
        p.append(f"axes.{st}.members: list the member levels (plans), e.g. members = [\"{st_levels[-1] if st_levels else 'plan'}\"]")
    for m in members:
        if m not in st_levels:
            p.append(f"axes.{st}.members: '{m}' is not a level of {st}; levels are {_fmt(st_levels)}")
    if members and st_levels and set(st_levels) <= set(members):
        p.append(f"axes.{st}.members: every level is a member level; keep at least one non-member level (e.g. 'prospect')")

    fixed = [n for n, a in spec.axes.items() if a.kind == "fixed"]
    random_axes = [n for n, a in spec.axes.items() if a.kind in RANDOM_KINDS]
    order = spec.model.draw_order or random_axes
    if spec.model.draw_order is not None:
        if sorted(order) != sorted(random_axes) or len(set(order)) != len(order):
            p.append(f"model.draw_order: must list each random axis (status and chance) exactly once: {_fmt(random_axes)}")
            order = random_axes
    position = {n: i for i, n in enumerate(order)}

    for name in random_axes:
        ax = spec.axes[name]
        where = f"axes.{name}"
        lv = levels.get(name, [])
        given = ax.given if ax.given is not None else []
        if ax.given is None:
            p.append(f"{where}.given: list the axes its next value depends on, e.g. given = [\"{name}\"]")
        for g in given:
            if g.startswith("next."):
                base = g[5:]
                if base not in spec.axes:
                    p.append(f"{where}.given: unknown axis '{base}' in '{g}'; axes are {_fmt(list(spec.axes))}")
                elif spec.axes[base].kind not in RANDOM_KINDS:
                    p.append(f"{where}.given: '{g}': only random axes (status, chance) can be given by their next value; "
                             f"use '{base}' (its current value)")
                elif position.get(base, 1e9) >= position.get(name, -1):
                    p.append(f"{where}.given: '{g}' is drawn at or after {name} (draw order {_fmt(order)}); "
                             f"a factor may only use next values of axes drawn before it")
            elif g not in spec.axes:
                p.append(f"{where}.given: unknown axis '{g}'; axes are {_fmt(list(spec.axes))}")
        if len(set(given)) != len(given):
            p.append(f"{where}.given: an axis is listed twice")
        for frm, tos in ax.moves.items():
            if frm not in lv:
                p.append(f"{where}.moves.{frm}: '{frm}' is not a level of {name}; levels are {_fmt(lv)}")
            for t in tos:
                if t not in lv:
                    p.append(f"{where}.moves.{frm}: '{t}' is not a level of {name}; levels are {_fmt(lv)}")
        if ax.table is not None:
            for i, row in enumerate(ax.table):
                rw = f"{where}.table[{i}]"
                for g, val in row.when.items():
                    if g not in given:
                        p.append(f"{rw}.when.{g}: '{g}' is not in {where}.given ({_fmt(given)})")
                        continue
                    base = g[5:] if g.startswith("next.") else g
                    for v in ([val] if isinstance(val, str) else val):
                        if v not in levels.get(base, []):
                            p.append(f"{rw}.when.{g}: '{v}' is not a level of {base}; levels are {_fmt(levels.get(base, []))}")
                total = 0.0
                for k, pr in row.probs.items():
                    if k not in lv:
                        p.append(f"{rw}.probs.{k}: '{k}' is not a level of {name}; levels are {_fmt(lv)}")
                    if not (math.isfinite(pr) and pr >= 0.0):
                        p.append(f"{rw}.probs.{k}: probabilities must be finite and >= 0 (got {pr})")
                    total += pr if math.isfinite(pr) else 0.0
                if abs(total - 1.0) > ROW_SUM_TOLERANCE:
                    p.append(f"{rw}.probs: sums to {total:.12g}; a row must sum to 1 within {ROW_SUM_TOLERANCE:g}")

    bands = [n for n, a in spec.axes.items() if a.kind == "chance" and a.propensity is not None]
    if len(bands) > 1:
        p.append(f"axes.{bands[1]}.propensity: only one propensity band axis is allowed ({_fmt(bands)})")
    for name in bands:
        cov = spec.axes[name].propensity.covariates
        where = f"axes.{name}.propensity.covariates"
        if not cov:
            p.append(f"{where}: list at least one numeric panel column, e.g. covariates = [\"age\"]")
        if len(set(cov)) != len(cov):
            p.append(f"{where}: a covariate is listed twice")
        for c in cov:
            if c in spec.axes or c in ("account", "period", "revenue"):
                p.append(f"{where}: '{c}' is an axis or reserved panel column; name a covariate column")
        for c in spec.axes[name].propensity.categorical:
            if c not in cov:
                p.append(f"axes.{name}.propensity.categorical: '{c}' is not in covariates ({_fmt(cov)}); list it "
                         "there too")
        if len(levels.get(name, [])) < 2:
            p.append(f"axes.{name}.levels: a propensity band axis needs at least 2 bands")

    for plan, rule in st_ax.not_sold.items():
        where = f"axes.{st}.not_sold.{plan}"
        if plan not in members:
            p.append(f"{where}: '{plan}' is not a member level; members are {_fmt(members)}")
        for fax, flevels in _not_sold_items(rule, fixed, levels):
            if fax is None:
                p.append(f"{where}: levels {_fmt(flevels)} do not all belong to one fixed axis "
                         f"({_fmt(fixed) or 'none declared'}); write {{ AXIS = [LEVELS] }}")
                continue
            if fax not in fixed:
                p.append(f"{where}.{fax}: '{fax}' is not a fixed axis; fixed axes are {_fmt(fixed) or 'none'}")
                continue
            for fl in flevels:
                if fl not in levels[fax]:
                    p.append(f"{where}.{fax}: '{fl}' is not a level of {fax}; levels are {_fmt(levels[fax])}")

    for name, ax in spec.axes.items():
        if ax.kind != "counter":
            continue
        where = f"axes.{name}"
        aw = ax.advance_while if ax.advance_while is not None else "always"
        if isinstance(aw, str):
            if aw not in ("member", "non_member", "always"):
                p.append(f"{where}.advance_while: '{aw}' is not one of member, non_member, always, or a list of {st} levels")
        else:
            for lvl in aw:
                if lvl not in st_levels:
                    p.append(f"{where}.advance_while: '{lvl}' is not a level of {st}; levels are {_fmt(st_levels)}")
        for ev in ax.reset_on or []:
            if ev not in COUNTER_EVENTS:
                p.append(f"{where}.reset_on: '{ev}' is not an event; events are {_fmt(list(COUNTER_EVENTS))}")

    for sname, rs in spec.rewards.items():
        where = f"rewards.{sname}"
        if sname in RESERVED_STREAMS:
            p.append(f"{where}: '{sname}' is built in (1 per member period); pick another name")
        if not (0.0 <= rs.fees_share < 1.0):
            p.append(f"{where}.fees_share: a share in [0, 1) (got {rs.fees_share}); 7 % is 0.07")
        for plan, val in rs.price.items():
            if plan not in members:
                p.append(f"{where}.price.{plan}: '{plan}' is not a member level; members are {_fmt(members)}")
            if isinstance(val, dict):
                owners = [f for f in fixed if all(k in levels[f] for k in val)]
                if not owners:
                    p.append(f"{where}.price.{plan}: keys {_fmt(list(val))} are not levels of one fixed axis "
                             f"({_fmt(fixed) or 'none declared'})")
                else:
                    fax = owners[0]
                    unsold = _unsold_levels(st_ax, plan, fax, fixed, levels)
                    missing = [fl for fl in levels[fax] if fl not in val and fl not in unsold]
                    if missing:
                        p.append(f"{where}.price.{plan}: no price for {fax} level(s) {_fmt(missing)}")
                for k, v in val.items():
                    if not math.isfinite(v):
                        p.append(f"{where}.price.{plan}.{k}: must be a finite number")
            elif not math.isfinite(val):
                p.append(f"{where}.price.{plan}: must be a finite number")
        for cax, table in rs.costs.items():
            if cax not in spec.axes:
                p.append(f"{where}.costs.{cax}: unknown axis; axes are {_fmt(list(spec.axes))}")
                continue
            for lvl in table:
                if lvl not in levels.get(cax, []):
                    p.append(f"{where}.costs.{cax}.{lvl}: not a level of {cax}; levels are {_fmt(levels.get(cax, []))}")
        for i, mv in enumerate(rs.on_move):
            for side, lv_list in (("from", mv.from_), ("to", mv.to)):
                for lvl in lv_list:
                    if lvl not in st_levels:
                        p.append(f"{where}.on_move[{i}].{side}: '{lvl}' is not a level of {st}; levels are {_fmt(st_levels)}")
    return p


def _not_sold_items(rule, fixed: list[str], levels: dict[str, list[str]]):
    """Normalise a not_sold entry to (fixed axis, [levels]) pairs; axis None if not inferable."""
    if isinstance(rule, dict):
        return list(rule.items())
    owners = [f for f in fixed if all(lv in levels.get(f, []) for lv in rule)]
    return [(owners[0] if len(owners) == 1 else None, list(rule))]


def _unsold_levels(st_ax: Axis, plan: str, fax: str, fixed: list[str], levels) -> set[str]:
    rule = st_ax.not_sold.get(plan)
    if rule is None:
        return set()
    return {lv for a, lvs in _not_sold_items(rule, fixed, levels) if a == fax for lv in lvs}


def not_sold_pairs(spec: Spec) -> list[tuple[str, str, str]]:
    """(plan, fixed axis, fixed level) triples where the plan is not sold."""
    fixed = [n for n, a in spec.axes.items() if a.kind == "fixed"]
    levels = {n: spec.axis_levels(n) for n in spec.axes}
    out = []
    for plan, rule in spec.axes[spec.status_axis].not_sold.items():
        for fax, flevels in _not_sold_items(rule, fixed, levels):
            for fl in flevels:
                out.append((plan, fax, fl))
    return out
