"""Head and layer keys: the one grammar every command, result, view and the findings file use.

A key names a head, a layer or the whole model:

=====================  ==================================================
``"model"``            the whole model
``"L3"``               layer 3 of the main stack
``"L3.H2"``            head 2 of layer 3 of the main stack
``"decoder:L1.H0"``    head 0 of layer 1 of the ``decoder`` stack
=====================  ==================================================

Parsing is forgiving about case and spaces (``"l3.h2"``, ``"Decoder : L1 . H0"``, ``"main:L3"``) and accepts the
short stack names an older terminal table printed (``enc:``, ``dec:``); the formatted form is canonical: stack
prefix in lower case and left out for the main stack, ``L`` and ``H`` in upper case. Layers and heads count from 0
and have at most six digits. Anything else is an :class:`~attnpos.errors.AttnposError`.

>>> parse_key("dec:l1.h0")
HeadKey(stack='decoder', layer=1, head=0)
>>> str(parse_key(" main:L3 . h2 ")), str(parse_key("L4")), str(parse_key("model"))
('L3.H2', 'L4', 'model')
>>> head_key("encoder", 0, 5), layer_key("main", 2)
('encoder:L0.H5', 'L2')
>>> compact(["L0.H0", "L0.H1", "L0.H2", "L0.H7", "L3.H1", "decoder:L0.H0"])
'L0.H0–2,7 · L3.H1 · decoder:L0.H0'
"""

from __future__ import annotations

import re
from typing import Any, Iterable, NamedTuple

from ..errors import AttnposError

MAIN = "main"
"""The stack of a decoder-only or encoder-only model; left out of the canonical key."""

STACKS = ("main", "encoder", "decoder", "cross")
"""The stacks attnpos names itself (``cross``: a decoder's cross-attention over the encoder's positions)."""

ALIASES = {"enc": "encoder", "dec": "decoder", "cro": "cross"}
"""Short stack names accepted when parsing (the first three letters, as older terminal tables printed them)."""

MAX_INDEX = 999_999
"""The largest layer or head index a key can hold (six digits)."""

_STACK = r"[a-z][a-z0-9_-]{0,31}"
STACK_RE = re.compile(_STACK + r"\Z", re.ASCII)
_KEY_RE = re.compile(
    r"""\s*
    (?:(?P<stack>""" + _STACK + r""")\s*:\s*)?
    (?:
        (?P<model>model)
      | l\s*(?P<layer>[0-9]{1,6})(?:\s*\.\s*h\s*(?P<head>[0-9]{1,6}))?
    )
    \s*\Z""",
    re.IGNORECASE | re.VERBOSE | re.ASCII,
)

HELP = ('Write a key as "model", "L<layer>" (e.g. "L3"), "L<layer>.H<head>" (e.g. "L0.H1"), with a stack prefix '
        'for encoder-decoder models (e.g. "decoder:L1.H0"). Layers and heads count from 0.')


class HeadKey(NamedTuple):
    """A parsed key: ``stack`` and ``layer``/``head`` (None where the key names a layer or the model)."""

    stack: str
    layer: int | None
    head: int | None

    @property
    def kind(self) -> str:
        """``"model"``, ``"layer"`` or ``"head"``."""
        return "model" if self.layer is None else "layer" if self.head is None else "head"

    def __str__(self) -> str:
        return format_key(self.stack, self.layer, self.head)


def normal_stack(stack: Any) -> str:
    """The canonical name of a stack (``None``/``""`` → ``"main"``, ``"Dec"`` → ``"decoder"``)."""
    if stack in (None, ""):
        return MAIN
    s = str(stack).strip().lower()
    s = ALIASES.get(s, s)
    if not STACK_RE.match(s):
        raise AttnposError(f"{stack!r} is not a stack name; a stack is a short lowercase word such as "
                           f"{', '.join(repr(x) for x in STACKS)}. {HELP}")
    return s


def _index(value: Any, what: str) -> int:
    if isinstance(value, bool):
        raise AttnposError(f"The {what} {value!r} is not a number. {HELP}")
    try:
        number = int(value) if not isinstance(value, float) or value.is_integer() else None
    except (TypeError, ValueError):
        number = None
    if number is None:
        raise AttnposError(f"The {what} {value!r} is not a whole number. {HELP}")
    if not 0 <= number <= MAX_INDEX:
        raise AttnposError(f"The {what} {number} is outside 0 … {MAX_INDEX}. {HELP}")
    return number


def format_key(stack: Any, layer: int | None = None, head: int | None = None) -> str:
    """The canonical key string; ``layer=None`` gives ``"model"``."""
    if layer is None:
        return "model"
    s = normal_stack(stack)
    core = f"L{_index(layer, 'layer')}" + ("" if head is None else f".H{_index(head, 'head')}")
    return core if s == MAIN else f"{s}:{core}"


def head_key(stack: Any, layer: int, head: int) -> str:
    """``L3.H2``, ``decoder:L1.H0``."""
    return format_key(stack, layer, head)


def layer_key(stack: Any, layer: int) -> str:
    """``L3``, ``decoder:L1``."""
    return format_key(stack, layer)


def parse_key(text: Any) -> HeadKey:
    """A key string → :class:`HeadKey` (``"model"`` → ``HeadKey("main", None, None)``)."""
    if isinstance(text, HeadKey):
        return text
    if not isinstance(text, str):
        raise AttnposError(f"A key must be a string such as 'L3.H2', not {type(text).__name__}. {HELP}")
    m = _KEY_RE.match(text)
    if m is None:
        raise AttnposError(f"{text!r} is not a head, layer or model key. {HELP}")
    stack = normal_stack(m.group("stack"))
    if m.group("model"):
        if stack != MAIN:
            raise AttnposError(f"{text!r} puts a stack prefix on the whole model; write 'model', or a layer or head "
                               f"of that stack (e.g. '{stack}:L0'). {HELP}")
        return HeadKey(MAIN, None, None)
    head = m.group("head")
    return HeadKey(stack, int(m.group("layer")), None if head is None else int(head))


def parse_head(text: Any) -> HeadKey:
    """Like :func:`parse_key`, but the key must name one head."""
    k = parse_key(text)
    if k.head is None:
        raise AttnposError(f"{text!r} names a {k.kind}, not one head; write e.g. 'L3.H2'. {HELP}")
    return k


def parse_keys(text: str | Iterable[Any]) -> list[HeadKey]:
    """A comma-separated string of keys (or an iterable of keys / ``(stack, layer, head)`` tuples) → keys, in
    order, without repeats."""
    items: Iterable[Any] = [t for t in text.split(",") if t.strip()] if isinstance(text, str) else text
    out: list[HeadKey] = []
    for item in items:
        if isinstance(item, (tuple, list)) and not isinstance(item, HeadKey):
            if len(item) == 2:
                item = HeadKey(MAIN, _index(item[0], "layer"), _index(item[1], "head"))
            elif len(item) == 3:
                item = HeadKey(normal_stack(item[0]), _index(item[1], "layer"), _index(item[2], "head"))
            else:
                raise AttnposError(f"{item!r} is not a (layer, head) or (stack, layer, head) pair. {HELP}")
        out.append(parse_key(item))
    return list(dict.fromkeys(out))


def sort_key(key: Any) -> tuple:
    """Order of keys: the model, then the main stack, then other stacks by name; layer, then head."""
    k = parse_key(key)
    if k.layer is None:
        return (0, "", -1, -1)
    return (1 if k.stack == MAIN else 2, k.stack, k.layer, -1 if k.head is None else k.head)


def compact(keys: Iterable[Any]) -> str:
    """Keys as a short line: heads grouped per layer with runs as ranges (``L0.H0–2,7 · L3.H1``)."""
    per_layer: dict[tuple, list[int]] = {}
    others: list[str] = []
    for key in keys:
        k = parse_key(key)
        if k.head is None:
            others.append(str(k))
        else:
            per_layer.setdefault((k.stack, k.layer), []).append(k.head)
    parts = list(dict.fromkeys(others))
    for (stack, layer), heads in sorted(per_layer.items(), key=lambda kv: sort_key(format_key(*kv[0]))):
        hs = sorted(set(heads))
        runs, a = [], hs[0]
        for prev, cur in zip(hs, hs[1:] + [None]):
            if cur != prev + 1 if cur is not None else True:
                runs.append(f"{a}" if a == prev else f"{a}–{prev}")
                a = cur
        parts.append(f"{layer_key(stack, layer)}.H" + ",".join(runs))
    return " · ".join(parts)


def compact_lines(keys: Iterable[Any], width: int = 96, indent: str = "    ") -> list[str]:
    """:func:`compact`, wrapped into lines of at most ``width`` characters (breaking only between layers), for a
    terminal: hundreds of heads become a few short lines instead of one endless one."""
    parts = compact(keys).split(" · ") if keys else []
    lines, cur = [], ""
    for p in (p for p in parts if p):
        if cur and len(indent) + len(cur) + 3 + len(p) > width:
            lines.append(indent + cur)
            cur = p
        else:
            cur = f"{cur} · {p}" if cur else p
    if cur:
        lines.append(indent + cur)
    return lines
