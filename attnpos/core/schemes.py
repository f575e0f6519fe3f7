"""Scheme specs: the one place a position scheme is defined, with the detector that recognises it.

A :class:`SchemeSpec` says what attnpos needs to know about a way of encoding position: whether moving the position
ids moves what it encodes (the position-id shift test is informative), whether it reads a table with one row per
position (it cannot go past the table), whether its scores depend on distance by construction, and how to recognise
it in a loaded model. :func:`detect` walks the detectors in ``rank`` order; each claims all layers (True), some
layers (a list of booleans, one per attention layer), or none (None/False), and the first claim on a layer wins.
A *blocker* stops detection with a clue where a model encodes position in a way none of the schemes describes.

Adding a scheme is one :func:`register` call with its detector::

    >>> spec = SchemeSpec(name="xpos", about="rotary with a decay", uses_position_ids=True, has_table=False,
    ...                   relative=True, rank=45, detect=lambda model: getattr(model.config, "use_xpos", False))
    >>> with registered(spec):
    ...     "xpos" in names()
    True

Detectors read the model's config and module names; torch is imported only inside them.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, ContextManager, Sequence

import numpy as np

from ._registry import temporarily

DetectResult = Any      # None | bool | Sequence[bool]


@dataclass(frozen=True)
class SchemeSpec:
    """One position scheme.

    Attributes:
        name: as tables, JSON and ``--scheme`` write it.
        about: where position enters, in a few words.
        uses_position_ids: moving every position id by k moves what the scheme encodes (learned or sinusoidal
            tables, RoPE's rotation), so a position-id shift is a real intervention.
        has_table: one row per position: a model cannot read a sequence longer than its table.
        relative: scores depend on the offset between positions only, by construction (RoPE — Su et al.; ALiBi —
            Press et al. 2022; relative bias — Raffel et al. 2020): a position-id shift cannot change them, a
            neutral prefix can (it moves absolute slots such as the first token).
        rank: detection order (smaller first).
        detect: ``detect(model) -> None | bool | list[bool]``; None for schemes that are only ever stated
            (``--scheme``) or declared in the config (``attnpos_scheme``).
        shifts: the shift tests that are informative for the scheme and run by default (see
            :meth:`informative_shifts`); None derives them from the facts above.
    """

    name: str
    about: str
    uses_position_ids: bool
    has_table: bool
    relative: bool
    rank: int
    detect: Callable[[Any], DetectResult] | None = None
    shifts: tuple[str, ...] | None = None

    def informative_shifts(self) -> tuple[str, ...]:
        """Which shifts can show a head tied to absolute places: ``position-ids`` where the scheme reads position
        ids and is not relative by construction (moving them moves what it encodes); ``prefix`` — neutral tokens
        placed before the text — where it is relative by construction or reads no ids (a relative scheme still
        lets a head find the first token or a template slot, and a prefix moves those; Xiao et al. 2024 on
        attention sinks)."""
        if self.shifts is not None:
            return tuple(self.shifts)
        out = []
        if self.uses_position_ids and not self.relative:
            out.append("position-ids")
        if self.relative or not self.uses_position_ids:
            out.append("prefix")
        return tuple(out)


SHIFT_KINDS = ("position-ids", "prefix")
"""The shift tests, in the order they run and are reported."""


@dataclass(frozen=True)
class Blocker:
    """A detection step that stops with a clue: ``check(model) -> clue | None``."""

    name: str
    rank: int
    check: Callable[[Any], str | None]


class Undetectable(Exception):
    """A blocker found something none of the schemes describes (its message is the clue)."""


# --------------------------------------------------------------------------------------------- the fixed table

def sinusoidal_table(n_positions: int, dim: int) -> np.ndarray:
    """The fixed table of Vaswani et al. 2017, §3.5, interleaved: PE[pos, 2i] = sin(pos / 10000^(2i/d)),
    PE[pos, 2i+1] = cos(pos / 10000^(2i/d)); float64 (n_positions, dim), dim even."""
    if dim % 2:
        raise ValueError(f"the sinusoidal table needs an even width, got {dim}")
    pos = np.arange(n_positions, dtype=np.float64)[:, None]
    i = np.arange(0, dim, 2, dtype=np.float64)[None, :]
    angle = pos / np.power(10000.0, i / dim)
    out = np.empty((n_positions, dim))
    out[:, 0::2] = np.sin(angle)
    out[:, 1::2] = np.cos(angle)
    return out


# --------------------------------------------------------------------------------------------- model facts

def position_table(model):
    """The learned or fixed position table of a model (an embedding named wpe / position_embeddings /
    embed_positions), or None."""
    import torch

    for n, m in model.named_modules():
        if isinstance(m, torch.nn.Embedding) and n.split(".")[-1] in ("wpe", "position_embeddings", "embed_positions"):
            return m.weight
    return None


def table_is_sinusoidal(table) -> bool:
    """Whether a table equals :func:`sinusoidal_table` (interleaved, or all sines then all cosines — the other
    common layout, common practice in some code bases)."""
    w = table.detach().float().cpu().numpy()
    n, d = w.shape
    if d % 2:
        return False
    ref = sinusoidal_table(n, d)
    if np.allclose(w, ref, atol=1e-4):
        return True
    half = np.concatenate([ref[:, 0::2], ref[:, 1::2]], axis=1)
    return bool(np.allclose(w, half, atol=1e-4))


def relative_embedding(model) -> str | None:
    """The name of a learned relative-position embedding module used inside attention, if there is one."""
    for nm, _ in model.named_modules():
        if nm.split(".")[-1] in ("distance_embedding", "rel_embeddings"):
            return nm
    return None


def has_rotary(model) -> bool:
    config = model.config
    return (any("rotary" in nm.lower() for nm, _ in model.named_modules())
            or bool(getattr(config, "rope_parameters", None)) or bool(getattr(config, "rope_theta", None)))


def rope_fraction(model) -> float | None:
    """The share of each head's dimensions RoPE rotates: transformers 5 keeps it in
    ``rope_parameters["partial_rotary_factor"]`` (older configs: ``rotary_pct``, ``partial_rotary_factor``;
    CodeGen and GPT-J: ``rotary_dim`` out of the head width); None when the config states none (all dimensions
    rotate). A factor that rotates no whole dimension pair counts as 0
    (the model computes ``int(head_dim * factor)`` rotated dimensions — transformers' GPT-NeoX attention)."""
    config = model.config
    rp = getattr(config, "rope_parameters", None)
    factor = rp.get("partial_rotary_factor") if isinstance(rp, dict) else None
    for name in ("partial_rotary_factor", "rotary_pct"):
        if factor is None:
            factor = getattr(config, name, None)
    heads = getattr(config, "num_attention_heads", None)
    head_dim = getattr(config, "head_dim", None) or (config.hidden_size // heads
                                                     if heads and getattr(config, "hidden_size", None) else None)
    rotary_dim = getattr(config, "rotary_dim", None)     # CodeGen, GPT-J: rotated dimensions per head
    if factor is None and isinstance(rotary_dim, int) and head_dim:
        factor = rotary_dim / head_dim
    if factor is None:
        return None
    factor = float(factor)
    if head_dim and int(head_dim * factor) == 0:
        return 0.0
    return factor


def _attn_config_alibi(config) -> bool:
    """MPT keeps its ALiBi flag in a nested attention config (an object, or a dict in older files)."""
    ac = getattr(config, "attn_config", None)
    flag = ac.get("alibi") if isinstance(ac, dict) else getattr(ac, "alibi", None)
    return flag is True


def _no_rope_layers(model):
    """SmolLM3: per layer 1 = RoPE, 0 = no position encoding."""
    config = model.config
    if getattr(config, "model_type", "") != "smollm3":
        return None
    return list(getattr(config, "no_rope_layers", None) or [])


# --------------------------------------------------------------------------------------------- detectors

def _detect_alibi(model) -> DetectResult:
    c = model.config
    return (getattr(c, "model_type", "") == "bloom" or getattr(c, "alibi", False) is True
            or getattr(c, "position_embedding_type", "") == "alibi" or _attn_config_alibi(c))


def _detect_relative_bias(model) -> DetectResult:
    c = model.config
    return getattr(c, "model_type", "") in ("t5", "mt5", "umt5", "longt5") or hasattr(c, "relative_attention_num_buckets")


def _block_relative_embedding(model) -> str | None:
    # a learned relative-position embedding inside attention (older BERT-style "relative_key" variants; DeBERTa's
    # disentangled attention, with or without an absolute table beside it) is none of our schemes: say so rather
    # than report only the table beside it
    rel = relative_embedding(model)
    if rel:
        return (f"a learned relative-position embedding inside attention ({rel}), which is none of attnpos's "
                "schemes (the nearest is relative-bias)")
    return None


def _detect_sinusoidal(model) -> DetectResult:
    t = position_table(model)
    return t is not None and table_is_sinusoidal(t)


def _detect_learned(model) -> DetectResult:
    return position_table(model) is not None


def _detect_none(model) -> DetectResult:
    flags = _no_rope_layers(model)
    if flags is not None:
        return [not f for f in flags]
    if has_rotary(model) and rope_fraction(model) == 0.0:
        return True     # rotary modules built, but a partial rotary factor of 0 rotates nothing
    return None


def _detect_rope(model) -> DetectResult:
    flags = _no_rope_layers(model)
    if flags is not None:
        return [bool(f) for f in flags]
    return has_rotary(model)


_SCHEMES: dict[str, SchemeSpec] = {}
_BLOCKERS: dict[str, Blocker] = {}


def _builtin() -> None:
    for s in (
        SchemeSpec("learned-absolute", "a trained table of position vectors added to the token embeddings",
                   uses_position_ids=True, has_table=True, relative=False, rank=70, detect=_detect_learned),
        SchemeSpec("sinusoidal", "the fixed sine/cosine table of Vaswani et al. 2017 added to the embeddings",
                   uses_position_ids=True, has_table=True, relative=False, rank=60, detect=_detect_sinusoidal),
        SchemeSpec("relative-bias", "a learned bias per (bucketed) distance added to the scores (T5)",
                   uses_position_ids=False, has_table=False, relative=True, rank=20, detect=_detect_relative_bias),
        SchemeSpec("alibi", "a fixed per-head linear penalty on distance added to the scores",
                   uses_position_ids=False, has_table=False, relative=True, rank=10, detect=_detect_alibi),
        SchemeSpec("rope", "queries and keys rotated by an angle proportional to the position",
                   uses_position_ids=True, has_table=False, relative=True, rank=90, detect=_detect_rope),
        SchemeSpec("none", "no positional encoding: only the causal mask can carry order",
                   uses_position_ids=False, has_table=False, relative=False, rank=80, detect=_detect_none),
    ):
        _SCHEMES[s.name] = s
    _BLOCKERS["relative-embedding"] = Blocker("relative-embedding", 50, _block_relative_embedding)


_builtin()


# --------------------------------------------------------------------------------------------- the registry

def specs() -> list[SchemeSpec]:
    """Every scheme, in the order the README lists them (the order of registration)."""
    return list(_SCHEMES.values())


def names() -> tuple[str, ...]:
    return tuple(_SCHEMES)


def get(name: str) -> SchemeSpec | None:
    return _SCHEMES.get(name)


def register(spec: SchemeSpec, *, replace: bool = False) -> SchemeSpec:
    if spec.name in _SCHEMES and not replace:
        raise ValueError(f"the scheme {spec.name!r} exists; pass replace=True to change it")
    if spec.name in ("mixed",):
        raise ValueError("'mixed' is what a model with several schemes reports; it cannot be a scheme")
    _SCHEMES[spec.name] = spec
    return spec


def unregister(name: str) -> None:
    _SCHEMES.pop(name, None)


def registered(spec: SchemeSpec) -> ContextManager[SchemeSpec]:
    """A scheme that exists for the duration of the block (for tests and experiments)."""
    return temporarily(_SCHEMES, spec, register)


def register_blocker(blocker: Blocker) -> Blocker:
    _BLOCKERS[blocker.name] = blocker
    return blocker


def detect(model, n_layers: int) -> list[str | None]:
    """The scheme of each of ``n_layers`` attention layers (None where nothing claims a layer).

    A scheme declared in the config (``attnpos_scheme``, as the reference models carry it) wins; then detectors
    and blockers run in rank order. Raises :class:`Undetectable` when a blocker fires before every layer is
    claimed."""
    declared = getattr(model.config, "attnpos_scheme", None)
    if declared in _SCHEMES:
        return [declared] * n_layers
    out: list[str | None] = [None] * n_layers
    steps: list[tuple[int, Any]] = [(s.rank, s) for s in _SCHEMES.values() if s.detect is not None]
    steps += [(b.rank, b) for b in _BLOCKERS.values()]
    for _, step in sorted(steps, key=lambda rs: rs[0]):
        if all(o is not None for o in out):
            break
        if isinstance(step, Blocker):
            clue = step.check(model)
            if clue:
                raise Undetectable(clue)
            continue
        claim = step.detect(model)
        if claim is None or claim is False:
            continue
        flags = [bool(claim)] * n_layers if isinstance(claim, bool) else [bool(c) for c in claim]
        flags = (flags + [False] * n_layers)[:n_layers]
        for i, f in enumerate(flags):
            if f and out[i] is None:
                out[i] = step.name
    return out


def informative_shifts(scheme_names: Sequence[str]) -> tuple[str, ...]:
    """The shifts informative for any of the layers' schemes (in :data:`SHIFT_KINDS` order); the prefix for a
    model none of whose schemes is known."""
    wanted = {k for n in scheme_names if n in _SCHEMES for k in _SCHEMES[n].informative_shifts()}
    return tuple(k for k in SHIFT_KINDS if k in wanted) or ("prefix",)


def uses_position_ids(scheme_names: Sequence[str]) -> bool:
    """Whether any of the layers' schemes reads position ids."""
    return any(getattr(_SCHEMES.get(n), "uses_position_ids", False) for n in scheme_names)


def table_schemes(scheme_names: Sequence[str]) -> list[str]:
    """The schemes among ``scheme_names`` that read a position table."""
    return sorted({n for n in scheme_names if getattr(_SCHEMES.get(n), "has_table", False)})


def readme_table() -> str:
    """The README's scheme table (Markdown), from the specs."""
    yes = lambda b: "yes" if b else "no"  # noqa: E731
    rows = ["| scheme | where position enters | position ids move it | table of positions | relative by construction "
            "| shift test run by default |",
            "|---|---|---|---|---|---|"]
    rows += [f"| `{s.name}` | {s.about} | {yes(s.uses_position_ids)} | {yes(s.has_table)} | {yes(s.relative)} "
             f"| {', '.join(s.informative_shifts())} |" for s in specs()]
    return "\n".join(rows)
