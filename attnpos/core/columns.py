"""The head table's columns: one schema that drives the pandas table, the scan JSON (both ways) and the views.

Each :class:`Column` has a name (the pandas column), a kind (``text``, ``int``, ``number``, ``tags``, or
``support`` — a mapping of role name to a share), the path of
its value inside one head's entry of the scan JSON, and a line saying what it holds. The score split's parts are
listed once in :data:`SPLIT_PARTS`; their share columns (and intervals) are generated from it.

>>> [c.name for c in HEAD][:6]
['stack', 'layer', 'head', 'role', 'tags', 'evidence']
>>> entry = to_entry({"stack": "main", "layer": 0, "head": 1, "mass_previous": 0.7, "share_slot_lo": 0.1})
>>> entry["mass"]["previous"], entry["shares_interval"]["slot"][0]
(0.7, 0.1)
>>> from_entry(entry)["mass_previous"]
0.7
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Mapping

KINDS = ("text", "int", "number", "tags", "support")


@dataclass(frozen=True)
class Part:
    """One part of the score split."""

    name: str
    about: str
    colour: str


SPLIT_PARTS: tuple[Part, ...] = (
    Part("distance", "a free function of δ = i − j (linear trends in δ belong here)", "#3F6E9A"),
    Part("slot", "a free function of the key's absolute index j", "#B8613F"),
    Part("content", "a free function of the key's token", "#6C8C4F"),
    Part("pair", "a function of both absolute positions (i, j): what the residual shares across texts at the same "
                 "pair", "#7B5C99"),
    Part("residual", "what is left: query–key content interaction", "#9A948A"),
)
"""The parts of the score split, in the order shares are stored and drawn."""

PART_NAMES = tuple(p.name for p in SPLIT_PARTS)


@dataclass(frozen=True)
class Column:
    name: str
    kind: str
    path: tuple
    about: str


def _share_columns() -> list[Column]:
    out = [Column(f"share_{p.name}", "number", ("shares", p.name), f"share of the {p.name} part") for p in SPLIT_PARTS]
    for p in SPLIT_PARTS:
        out.append(Column(f"share_{p.name}_lo", "number", ("shares_interval", p.name, 0), "90% interval, low"))
        out.append(Column(f"share_{p.name}_hi", "number", ("shares_interval", p.name, 1), "90% interval, high"))
    return out


HEAD: tuple[Column, ...] = (
    Column("stack", "text", ("stack",), "main, encoder, decoder or cross"),
    Column("layer", "int", ("layer",), "layer index within the stack, from 0"),
    Column("head", "int", ("head",), "head index within the layer, from 0"),
    Column("role", "text", ("role",), "the primary role"),
    Column("tags", "tags", ("tags",), "every role whose criterion holds, primary first"),
    Column("evidence", "text", ("evidence",), "the sentence that decided the primary role"),
    Column("role_support", "number", ("role_support",), "share of bootstrap resamples over texts in which the "
                                                        "primary role's criterion holds"),
    Column("role_between", "tags", ("role_between",), "when no role holds in at least ROLE_SUPPORT of the "
                                                      "resamples: the two roles the head sits between"),
    Column("tag_support", "support", ("tag_support",), "per role: the share of resamples in which its criterion "
                                                       "holds"),
    Column("mass_previous", "number", ("mass", "previous"), "mean weight on the token just before"),
    Column("mass_next", "number", ("mass", "next"), "mean weight on the token just after"),
    Column("mass_first", "number", ("mass", "first"), "mean weight on the first token (slot 0)"),
    Column("mass_self", "number", ("mass", "self"), "mean weight on the query's own token"),
    *_share_columns(),
    Column("slope", "number", ("slope",), "best linear fit of the profile over δ ≥ 0, positive when scores fall "
                                          "with distance (ALiBi units: score per token)"),
    Column("slope_lo", "number", ("slope_interval", 0), "90% interval, low"),
    Column("slope_hi", "number", ("slope_interval", 1), "90% interval, high"),
    Column("entropy_ratio", "number", ("entropy_ratio",), "entropy over log(visible keys); 1 = uniform"),
    Column("anchor_slot", "number", ("anchor", "slot"), "the slot with the highest mean weight from far queries"),
    Column("anchor_weight", "number", ("anchor", "weight"), "that slot's mean weight"),
    Column("induction", "number", ("induction",), "mean weight on the induction target (repeated random tokens)"),
    Column("induction_se", "number", ("induction_se",), "standard error of the induction score over the random "
                                                        "sequences"),
    Column("shift_kind", "text", ("shift", "kind"), "which shifts ran: position-ids, prefix, or both (joined by +)"),
    Column("shift_offset", "number", ("shift", "offset"), "how far positions were moved"),
    Column("shift_change", "number", ("shift", "change"), "mean total-variation change of the weights (the largest "
                                                          "over the shifts that ran)"),
    Column("shift_verdict", "text", ("shift", "verdict"), "relative, absolute, mixed, no-position or n/a, over the "
                                                          "shifts that ran"),
    Column("shift_change_ids", "number", ("shift", "position-ids", "change"), "change under the position-id shift"),
    Column("shift_verdict_ids", "text", ("shift", "position-ids", "verdict"), "verdict of the position-id shift"),
    Column("shift_change_prefix", "number", ("shift", "prefix", "change"), "change under the neutral prefix"),
    Column("shift_verdict_prefix", "text", ("shift", "prefix", "verdict"), "verdict of the neutral prefix"),
    Column("shift_spread", "number", ("shift", "spread"), "mean total-variation distance of the unshifted weights "
                                                          "from uniform (below the relative threshold: no-position)"),
)
"""Columns of the head table, in order."""


def names() -> list[str]:
    return [c.name for c in HEAD]


def number_columns() -> list[str]:
    return [c.name for c in HEAD if c.kind == "number"]


def get(name: str) -> Column | None:
    return next((c for c in HEAD if c.name == name), None)


def register(column: Column) -> Column:
    """Add a column (at the end). For extensions and tests; the JSON round trip picks it up."""
    global HEAD
    if column.kind not in KINDS:
        raise ValueError(f"kind must be one of {KINDS}")
    if get(column.name) is not None:
        raise ValueError(f"the column {column.name!r} exists")
    HEAD = HEAD + (column,)
    return column


def _number(x: Any) -> float:
    if x is None:
        return math.nan
    if isinstance(x, bool):
        raise TypeError("a flag where a number belongs")
    return float(x)


def _put(entry: dict, path: tuple, value: Any) -> None:
    node = entry
    for k, nxt in zip(path[:-1], path[1:]):
        if isinstance(nxt, int):
            lst = node.setdefault(k, [None, None])
            while len(lst) <= nxt:
                lst.append(None)
            lst[nxt] = value
            return
        node = node.setdefault(k, {})
    node[path[-1]] = value


def _get(entry: Mapping, path: tuple) -> Any:
    node: Any = entry
    for k in path:
        if isinstance(k, int):
            if not isinstance(node, (list, tuple)) or len(node) <= k:
                return None
            node = node[k]
        else:
            if not isinstance(node, Mapping):
                return None
            node = node.get(k)
        if node is None:
            return None
    return node


def _finite_or_none(x: Any) -> Any:
    try:
        f = float(x)
    except (TypeError, ValueError):
        return None
    return f if math.isfinite(f) else None


def to_entry(row: Mapping[str, Any]) -> dict:
    """One head-table row → its (nested) JSON entry; missing numbers become None."""
    entry: dict = {}
    for c in HEAD:
        v = row.get(c.name)
        if c.kind == "number":
            v = _finite_or_none(v)
        elif c.kind == "int":
            v = int(v)
        elif c.kind == "tags":
            v = [str(t) for t in (v if isinstance(v, (list, tuple)) else [])]
        elif c.kind == "support":
            v = {str(k): _finite_or_none(x) for k, x in v.items()} if isinstance(v, Mapping) else {}
        elif c.kind == "text":
            v = v if isinstance(v, str) else None
        _put(entry, c.path, v)
    return entry


def from_entry(entry: Mapping[str, Any]) -> dict:
    """One head's JSON entry → a flat row (numbers as float, NaN when missing). Raises ``TypeError``/``ValueError``
    on a value of the wrong kind."""
    row: dict = {}
    for c in HEAD:
        v = _get(entry, c.path)
        if c.kind == "number":
            row[c.name] = _number(v)
        elif c.kind == "int":
            if v is None or isinstance(v, bool) or int(v) != v:
                raise ValueError(f"{c.name} must be a whole number, not {v!r}")
            row[c.name] = int(v)
        elif c.kind == "tags":
            if v is not None and not (isinstance(v, list) and all(isinstance(t, str) for t in v)):
                raise ValueError(f"{c.name} must be a list of role names, not {v!r}")
            row[c.name] = list(v or [])
        elif c.kind == "support":
            if v is not None and not (isinstance(v, Mapping) and all(isinstance(k, str) for k in v)):
                raise ValueError(f"{c.name} must map role names to shares, not {v!r}")
            row[c.name] = {k: _number(x) for k, x in (v or {}).items()}
        else:
            if v is not None and not isinstance(v, str):
                raise ValueError(f"{c.name} must be text, not {v!r}")
            row[c.name] = v
    return row
