"""Role specs: the one place a head role is defined.

A :class:`RoleSpec` holds everything the package says about a role: its name, its precedence (most specific
first), the check that decides it from a head-table row (returning the evidence sentence), the rule as the README
prints it, its colour, its short word and its one- or two-letter code for dense grids (so a role survives greyscale),
and the head-table column that measures how strongly a head has it. The head table (:mod:`attnpos.roles`), the
views' palette and legend, the report and the README's role table all read the specs here, in this order.

Thresholds come from :mod:`attnpos.core.thresholds`, where each value is justified.

Adding a role is one call (in a test, or in code that extends attnpos)::

    >>> spec = RoleSpec(name="self", rule="mass.self ≥ 0.5", about="looks at its own token",
    ...                 check=lambda row, ctx: "mass.self ≥ 0.5" if (row.get("mass_self") or 0) >= 0.5 else None,
    ...                 colour="#117733", short="self", code="Sf", strength="mass_self", rank=15)
    >>> with registered(spec):
    ...     [r.name for r in specs()][:3]
    ['induction', 'self', 'previous-token']
    >>> "self" in names()
    False
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Callable, ContextManager, Mapping

import numpy as np

from . import thresholds as th
from ._registry import temporarily

FALLBACK = "mixed"
"""The role of a head for which no other criterion holds."""


@dataclass(frozen=True)
class HeadContext:
    """What a check may need beyond the head's row: whether the head's layer is causal."""

    causal: bool = True


@dataclass(frozen=True)
class RoleSpec:
    """One role.

    Attributes:
        name: the role's name, as tables, JSON and findings write it.
        rule: the criterion in one line (the README's role table prints it).
        about: what the role means, in a few words (legends, tooltips).
        check: ``check(row, ctx) -> evidence sentence | None`` — None when the criterion does not hold. ``row``
            maps head-table columns to values (NaN or missing when not measured); ``ctx`` is a
            :class:`HeadContext`. None for the fallback role.
        colour: the role's colour (hex); the palette is colour-blind safe and the role is always written beside it.
        short: a short word for roomy cells.
        code: one or two letters for dense grids and greyscale prints.
        strength: the head-table column that measures how strongly a head has the role (larger = stronger), or None.
        rank: precedence; when several criteria hold, the smallest rank is the primary role.
        holds: optional, the same criterion for many rows at once: ``holds(cols, causal) -> bool array`` where
            ``cols`` maps columns to arrays of one shape (numbers, or objects for text columns; a missing column
            reads as NaN) and ``causal`` is a bool array of that shape. It must hold exactly where ``check`` gives
            a sentence (the bootstrap's support checks every resample of every head with it); without it the
            check runs row by row.
    """

    name: str
    rule: str
    about: str
    check: Callable[[Mapping[str, Any], HeadContext], str | None] | None
    colour: str
    short: str
    code: str
    strength: str | None
    rank: int
    holds: Callable[[Mapping[str, Any], Any], Any] | None = None


def _num(row: Mapping[str, Any], key: str) -> float:
    v = row.get(key)
    try:
        v = float(v)
    except (TypeError, ValueError):
        return math.nan
    return v


def _ok(*xs: float) -> bool:
    return all(math.isfinite(x) for x in xs)


def _f(x: float, nd: int = 2) -> str:
    return "—" if not math.isfinite(x) else f"{x:.{nd}f}"


def _at_least(column: str, threshold_name: str, label: str):
    """A check that holds when the head's ``column`` is at least the threshold ``th.<threshold_name>`` (read when
    the check runs, so a changed threshold takes effect)."""
    def check(row, ctx):
        x, t = _num(row, column), getattr(th, threshold_name)
        if _ok(x) and x >= t:
            return f"{label} {_f(x)} ≥ {t}"
        return None
    return check


_induction = _at_least("induction", "INDUCTION_SCORE", "induction score")
_previous = _at_least("mass_previous", "NEIGHBOUR_MASS", "mass.previous")
_next = _at_least("mass_next", "NEIGHBOUR_MASS", "mass.next")


# the same criteria over arrays of rows (RoleSpec.holds): NaN, ±inf, None and text read as in _num / _ok
def _as_float(v) -> float:
    try:
        return float(v)
    except (TypeError, ValueError):
        return math.nan


_AS_FLOAT = np.frompyfunc(_as_float, 1, 1)


def _col(cols: Mapping[str, Any], key: str, shape) -> np.ndarray:
    v = cols.get(key)
    if v is None:
        return np.full(shape, np.nan)
    a = np.asarray(v)
    if a.dtype.kind not in "fiub":
        a = _AS_FLOAT(a).astype(np.float64)
    return np.broadcast_to(a.astype(np.float64, copy=False), shape)


def _text_is(cols: Mapping[str, Any], key: str, value: str, shape) -> np.ndarray:
    v = cols.get(key)
    if v is None:
        return np.zeros(shape, dtype=bool)
    a = np.asarray(v, dtype=object)
    return np.broadcast_to(np.frompyfunc(lambda x: x == value, 1, 1)(a).astype(bool), shape)


def _fin(*xs) -> np.ndarray:
    out = np.isfinite(xs[0])
    for x in xs[1:]:
        out = out & np.isfinite(x)
    return out


def _at_least_v(column: str, threshold_name: str):
    def holds(cols, causal):
        x = _col(cols, column, np.shape(causal))
        return _fin(x) & (x >= getattr(th, threshold_name))
    return holds


def _anchor_v(cols, causal):
    sh = np.shape(causal)
    w, slot = _col(cols, "anchor_weight", sh), _col(cols, "anchor_slot", sh)
    return _fin(w, slot) & (w >= th.ANCHOR_WEIGHT)


def _local_v(cols, causal):
    sh = np.shape(causal)
    s, d = _col(cols, "slope", sh), _col(cols, "share_distance", sh)
    return _fin(s, d) & (s >= th.LOCAL_SLOPE) & (d >= th.LOCAL_SHARE)


def _counting_v(cols, causal):
    e = _col(cols, "entropy_ratio", np.shape(causal))
    return np.asarray(causal, dtype=bool) & _fin(e) & (e >= th.COUNTING_ENTROPY)


def _pair_v(cols, sh) -> np.ndarray:
    x = _col(cols, "share_pair", sh)
    return np.where(np.isfinite(x), x, 0.0)


def _positional_v(cols, causal):
    sh = np.shape(causal)
    return _text_is(cols, "shift_verdict", "absolute", sh) | (_pair_v(cols, sh) >= th.POSITIONAL_PAIR_SHARE)


def _content_v(cols, causal):
    sh = np.shape(causal)
    pos = _col(cols, "share_distance", sh) + _col(cols, "share_slot", sh) + _pair_v(cols, sh)
    cont = _col(cols, "share_content", sh) + _col(cols, "share_residual", sh)
    return (~_text_is(cols, "shift_verdict", "absolute", sh) & _fin(pos, cont) & (pos < th.CONTENT_MAX_POSITIONAL)
            & (cont >= th.CONTENT_MIN_SHARE))


def _anchor(row, ctx):
    w, slot = _num(row, "anchor_weight"), _num(row, "anchor_slot")
    if _ok(w, slot) and w >= th.ANCHOR_WEIGHT:
        return f"mean weight {_f(w)} ≥ {th.ANCHOR_WEIGHT} on slot {int(slot)}"
    return None


def _local(row, ctx):
    s, d = _num(row, "slope"), _num(row, "share_distance")
    if _ok(s, d) and s >= th.LOCAL_SLOPE and d >= th.LOCAL_SHARE:
        return f"slope {_f(s, 3)} ≥ {th.LOCAL_SLOPE}, distance share {_f(d)} ≥ {th.LOCAL_SHARE}"
    return None


def _counting(row, ctx):
    e = _num(row, "entropy_ratio")
    if ctx.causal and _ok(e) and e >= th.COUNTING_ENTROPY:
        return (f"entropy {_f(e)} × log(visible keys) ≥ {th.COUNTING_ENTROPY} "
                "(the untrained default: compare with an untrained copy)")
    return None


def _pair(row) -> float:
    """The position-pair share (0 in files written before the split had it)."""
    x = _num(row, "share_pair")
    return x if math.isfinite(x) else 0.0


def _positional(row, ctx):
    moved = row.get("shift_verdict") == "absolute"
    pair = _pair(row)
    if moved:
        return (f"shift test absolute (change {_f(_num(row, 'shift_change'), 3)} under {row.get('shift_kind')}); "
                f"position-pair share {_f(pair)}")
    if pair >= th.POSITIONAL_PAIR_SHARE:
        return f"position-pair share {_f(pair)} ≥ {th.POSITIONAL_PAIR_SHARE}"
    return None


def _content(row, ctx):
    if row.get("shift_verdict") == "absolute":
        return None                      # the intervention says the head is tied to absolute places
    pos = _num(row, "share_distance") + _num(row, "share_slot") + _pair(row)
    cont = _num(row, "share_content") + _num(row, "share_residual")
    if _ok(pos, cont) and pos < th.CONTENT_MAX_POSITIONAL and cont >= th.CONTENT_MIN_SHARE:
        return (f"distance+slot+pair {_f(pos)} < {th.CONTENT_MAX_POSITIONAL}, content+residual "
                f"{_f(cont)} ≥ {th.CONTENT_MIN_SHARE}")
    return None


# Colours: derived from the Okabe & Ito (2008) colour-blind-safe set (common practice; hex values from memory),
# assigned to our roles in our own order; `positional` takes the wine of Paul Tol's muted scheme (hex from memory),
# dark enough to stay apart from the others in greyscale, with its code beside it as for every role.
_BUILTIN = (
    RoleSpec("induction", f"induction score ≥ {th.INDUCTION_SCORE} on repeated random tokens",
             "copies: attends to the token after the earlier copy of the current token",
             _induction, "#F0E442", "induct", "In", "induction", 10,
             _at_least_v("induction", "INDUCTION_SCORE")),
    RoleSpec("previous-token", f"mass.previous ≥ {th.NEIGHBOUR_MASS}", "at least half the weight on the token just before",
             _previous, "#0072B2", "prev", "Pv", "mass_previous", 20,
             _at_least_v("mass_previous", "NEIGHBOUR_MASS")),
    RoleSpec("next-token", f"mass.next ≥ {th.NEIGHBOUR_MASS}", "at least half the weight on the token just after (encoders)",
             _next, "#56B4E9", "next", "Nx", "mass_next", 30,
             _at_least_v("mass_next", "NEIGHBOUR_MASS")),
    RoleSpec("anchor", f"mean weight on one slot (queries ≥ {th.ANCHOR_MIN_DISTANCE} tokens away) ≥ {th.ANCHOR_WEIGHT}",
             "a large share of weight on one fixed slot whatever the query (first token, template slot)",
             _anchor, "#D55E00", "anchor", "An", "anchor_weight", 40, _anchor_v),
    RoleSpec("local", f"slope ≥ {th.LOCAL_SLOPE} per token and shares.distance ≥ {th.LOCAL_SHARE}",
             "scores fall with distance, and distance explains much of their variance",
             _local, "#009E73", "local", "Lo", "share_distance", 50, _local_v),
    RoleSpec("positional", f"shift test absolute, or shares.pair ≥ {th.POSITIONAL_PAIR_SHARE}",
             "scores follow the absolute positions of query and key (a learned absolute table's p_iᵀ W p_j): the "
             "head keeps its places when the text moves",
             _positional, "#882255", "posn", "Ps", "share_pair", 55, _positional_v),
    RoleSpec("counting", f"entropy ≥ {th.COUNTING_ENTROPY} × log(visible keys) (causal models)",
             "near-uniform over the causal prefix — the architecture's default; compare with an untrained copy",
             _counting, "#E69F00", "count", "Ct", "entropy_ratio", 60, _counting_v),
    RoleSpec("content", (f"shares.distance + shares.slot + shares.pair < {th.CONTENT_MAX_POSITIONAL} and "
                         f"shares.content + shares.residual ≥ {th.CONTENT_MIN_SHARE}, and the shift test not absolute"),
             "position explains little; key content and query–key interaction explain most",
             _content, "#CC79A7", "content", "Co", "share_content", 70, _content_v),
    RoleSpec(FALLBACK, "none of the above", "no criterion holds", None, "#8C8C8C", "mixed", "Mx",
             "share_residual", 1000),
)

_REGISTRY: dict[str, RoleSpec] = {s.name: s for s in _BUILTIN}


def specs() -> list[RoleSpec]:
    """Every role, in precedence order (most specific first; the fallback last)."""
    return sorted(_REGISTRY.values(), key=lambda s: (s.rank, s.name))


def names() -> tuple[str, ...]:
    """Role names in precedence order."""
    return tuple(s.name for s in specs())


def get(name: str) -> RoleSpec | None:
    """The spec of a role, or None for a name that is not a role."""
    return _REGISTRY.get(name)


def register(spec: RoleSpec, *, replace: bool = False) -> RoleSpec:
    """Add a role (or, with ``replace``, change one). Its check then runs for every head of every new head table."""
    if spec.name in _REGISTRY and not replace:
        raise ValueError(f"the role {spec.name!r} exists; pass replace=True to change it")
    if spec.name != FALLBACK and spec.check is None:
        raise ValueError(f"the role {spec.name!r} needs a check")
    _REGISTRY[spec.name] = spec
    return spec


def unregister(name: str) -> None:
    if name == FALLBACK:
        raise ValueError("the fallback role cannot be removed")
    _REGISTRY.pop(name, None)


def registered(spec: RoleSpec) -> ContextManager[RoleSpec]:
    """A role that exists for the duration of the block (for tests and experiments)."""
    return temporarily(_REGISTRY, spec, register)


def criteria(row: Mapping[str, Any], causal: bool = True) -> dict[str, str]:
    """The roles whose criterion holds for one head (in precedence order), each with its evidence sentence."""
    ctx = HeadContext(causal=bool(causal))
    out: dict[str, str] = {}
    for s in specs():
        if s.check is not None:
            ev = s.check(row, ctx)
            if ev:
                out[s.name] = ev
    return out


def criteria_arrays(cols: Mapping[str, Any], causal, row_at: Callable[[tuple], Mapping[str, Any]] | None = None):
    """For many rows at once: ``(names, holds)`` with the roles whose criteria are checked (precedence order, the
    fallback left out) and a bool array ``holds[..., r]`` — whether role r's criterion holds — of the shape of
    ``causal`` plus one axis. ``cols`` as for :attr:`RoleSpec.holds`; a role without ``holds`` runs its check on
    ``row_at(index)`` for every index (needed then). Agrees with :func:`criteria` row by row."""
    causal = np.asarray(causal, dtype=bool)
    checked = [s for s in specs() if s.check is not None]
    out = np.zeros(causal.shape + (len(checked),), dtype=bool)
    for r, s in enumerate(checked):
        if s.holds is not None:
            out[..., r] = s.holds(cols, causal)
        else:
            if row_at is None:
                raise ValueError(f"the role {s.name!r} has no array form of its check; pass row_at")
            for idx in np.ndindex(causal.shape):
                out[idx + (r,)] = bool(s.check(row_at(idx), HeadContext(causal=bool(causal[idx]))))
    return [s.name for s in checked], out


def assign(row: Mapping[str, Any], causal: bool = True) -> tuple[str, list[str], str]:
    """``(primary role, every role that holds, the primary role's evidence)`` for one head-table row."""
    found = criteria(row, causal)
    if not found:
        parts = (f"prev {_f(_num(row, 'mass_previous'))}, first {_f(_num(row, 'mass_first'))}, "
                 f"entropy {_f(_num(row, 'entropy_ratio'))}, slope {_f(_num(row, 'slope'), 3)}")
        return FALLBACK, [FALLBACK], f"no criterion holds ({parts})"
    tags = list(found)
    return tags[0], tags, found[tags[0]]


def readme_table() -> str:
    """The README's role table (Markdown), from the specs."""
    rows = ["| role | criterion |", "|---|---|"] + [f"| `{s.name}` | {s.rule} |" for s in specs()]
    return "\n".join(rows)
