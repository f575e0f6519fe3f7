r"""RoPE context-extension variants ("scalings"): their grammar, the rope parameters transformers expects for each,
and their inverse frequencies and attention factor — torch-free, so a bad request is refused before a model loads.

A variant is written ``KIND[:FACTOR[:A:B]]``:

=================================  =====================================================================================
``linear[:F]``                     position interpolation: every frequency divided by F (Chen et al. 2023)
``dynamic[:F]``                    dynamic NTK-style scaling: the base grows with the sequence length once it passes the
                                   training length (common practice, no paper; transformers' ``dynamic``)
``yarn[:F[:BETA_FAST:BETA_SLOW]]`` YaRN: fast pairs kept, slow pairs interpolated by F, a ramp between, and an attention
                                   factor 0.1·ln F + 1 (Peng et al. 2024)
``llama3[:F[:LOW:HIGH]]``          the Llama 3 rule: wavelengths longer than L/LOW divided by F, shorter than L/HIGH
                                   kept, smooth between (Meta's Llama 3.1 release; LOW 1, HIGH 4 from memory)
=================================  =====================================================================================

F defaults to the stretch asked (``to`` / training length) except for ``dynamic`` (:data:`DYNAMIC_FACTOR`). Every
factor must be above 1 (a factor of 1 is the unscaled model, which is always measured anyway). LongRoPE
(Ding et al. 2024) is refused: transformers needs its per-dimension ``short_factor``/``long_factor`` lists, which
come from a search over a fine-tuning set and cannot be derived from the checkpoint.

The frequencies here follow transformers' own rope-initialisation functions
(``transformers.modeling_rope_utils.ROPE_INIT_FUNCTIONS``), which is what the reloaded model uses; the tests compare
the two for several configs.

Example::

    >>> v = parse("yarn:4", stretch=4.0)
    >>> v.name, v.kind, v.factor
    ('yarn:4', 'yarn', 4.0)
    >>> sorted(v.rope_parameters({"rope_theta": 10000.0, "rope_type": "default"}, 128)[0])
    ['beta_fast', 'beta_slow', 'factor', 'original_max_position_embeddings', 'rope_theta', 'rope_type']
    >>> round(attention_factor(v), 4)
    1.1386
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..errors import AttnposError

#: the factor of ``dynamic`` when none is given. 2 is the value transformers' documentation uses in its dynamic
#: scaling example (from memory); the NTK-style rule grows the base further as the sequence gets longer, so a
#: small factor already stretches a 4× longer sequence.
DYNAMIC_FACTOR = 2.0

#: YaRN's ramp ends (rotations within the training length), the paper's defaults and transformers' (Peng et al. 2024)
YARN_BETA_FAST, YARN_BETA_SLOW = 32.0, 1.0

#: the Llama 3 rule's wavelength bounds as fractions of the training length (Meta's Llama 3.1 config, from memory)
LLAMA3_LOW, LLAMA3_HIGH = 1.0, 4.0

SOURCES = {
    "none": "the checkpoint as trained",
    "linear": "position interpolation (Chen et al. 2023)",
    "dynamic": "dynamic NTK-style scaling (common practice, no paper)",
    "yarn": "YaRN (Peng et al. 2024)",
    "llama3": "the Llama 3 rule (Meta, Llama 3.1)",
}

KINDS = ("linear", "dynamic", "yarn", "llama3")

LONGROPE_REFUSAL = (
    "LongRoPE (Ding et al. 2024) is not offered: transformers' longrope needs per-dimension short_factor and "
    "long_factor lists, which LongRoPE finds by a search on fine-tuning data; they cannot be derived from the "
    "checkpoint, and made-up lists would measure something else. Use linear, dynamic, yarn or llama3."
)


@dataclass(frozen=True)
class Variant:
    """One way of running a RoPE checkpoint past its training length.

    ``kind`` is ``none`` (the checkpoint as trained) or one of :data:`KINDS`; ``factor`` the stretch factor;
    ``extra`` the kind's other parameters (YaRN's betas, the Llama 3 bounds)."""

    name: str
    kind: str
    factor: float = 1.0
    extra: dict = field(default_factory=dict)

    @property
    def source(self) -> str:
        return SOURCES[self.kind]

    def rope_parameters(self, base: dict, training_length: int) -> tuple[dict, int | None]:
        """The ``rope_parameters`` dict transformers 5 expects for this variant, built on the model's own (``base``:
        its ``rope_theta``, ``partial_rotary_factor``), and the ``max_position_embeddings`` the config needs beside
        it (None: leave it). ``dynamic`` reads the length where scaling starts from ``max_position_embeddings``, so
        it is set to the training length; the others get the extended length (training length × factor)."""
        L = int(training_length)
        keep = {k: base[k] for k in ("rope_theta", "partial_rotary_factor") if k in base}
        if self.kind == "none":
            return dict(base), None
        out = {**keep, "rope_type": self.kind, "factor": float(self.factor)}
        if self.kind == "dynamic":
            return out, L
        if self.kind == "yarn":
            out.update(original_max_position_embeddings=L, beta_fast=float(self.extra.get("beta_fast", YARN_BETA_FAST)),
                       beta_slow=float(self.extra.get("beta_slow", YARN_BETA_SLOW)))
        elif self.kind == "llama3":
            out.update(original_max_position_embeddings=L,
                       low_freq_factor=float(self.extra.get("low_freq_factor", LLAMA3_LOW)),
                       high_freq_factor=float(self.extra.get("high_freq_factor", LLAMA3_HIGH)))
        return out, int(round(L * self.factor))

    def describe(self) -> dict:
        return {"name": self.name, "kind": self.kind, "factor": self.factor, "extra": dict(self.extra),
                "source": self.source}


UNSCALED = Variant("unscaled", "none")


def _number(text: str, what: str, spec: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise AttnposError(f"--scaling {spec!r}: {what} {text!r} is not a number. Write e.g. linear:4, dynamic, "
                           "yarn:4 or llama3:8.") from None
    if not math.isfinite(v):
        raise AttnposError(f"--scaling {spec!r}: {what} must be a finite number.")
    return v


def parse(spec: str, stretch: float | None = None) -> Variant:
    """A variant from its written form (see the module doc). ``stretch`` (to / training length) is the default
    factor of linear, yarn and llama3."""
    text = str(spec).strip()
    parts = [p.strip() for p in text.split(":")]
    kind = parts[0].lower()
    if kind == "longrope":
        raise AttnposError(LONGROPE_REFUSAL)
    if kind in ("none", "default", "unscaled"):
        raise AttnposError(f"--scaling {spec!r}: the unscaled model is always measured; name only the variants to "
                           f"compare with it ({', '.join(KINDS)}).")
    if kind not in KINDS:
        raise AttnposError(f"Unknown scaling {spec!r}. Choose from linear[:F] (position interpolation), dynamic[:F] "
                           "(NTK-style), yarn[:F] and llama3[:F], e.g. --scaling linear:4 --scaling yarn:4.")
    n_extra = {"linear": 0, "dynamic": 0, "yarn": 2, "llama3": 2}[kind]
    if len(parts) > 2 + n_extra or (n_extra and len(parts) not in (1, 2, 2 + n_extra)):
        form = {"linear": "linear:F", "dynamic": "dynamic:F", "yarn": "yarn:F or yarn:F:BETA_FAST:BETA_SLOW",
                "llama3": "llama3:F or llama3:F:LOW:HIGH"}[kind]
        raise AttnposError(f"--scaling {spec!r} has the wrong number of parts; write {form}.")
    if len(parts) >= 2 and parts[1]:
        factor = _number(parts[1], "the factor", spec)
    elif kind == "dynamic":
        factor = DYNAMIC_FACTOR
    elif stretch is not None:
        factor = float(stretch)
    else:
        raise AttnposError(f"--scaling {spec!r} needs a factor (e.g. {kind}:4).")
    if not factor > 1:
        raise AttnposError(f"--scaling {spec!r}: the factor must be above 1 (got {factor:g}); a factor of 1 is the "
                           "unscaled model, which is always measured, and below 1 would shrink the context.")
    extra: dict = {}
    if kind == "yarn" and len(parts) == 4:
        extra = {"beta_fast": _number(parts[2], "BETA_FAST", spec), "beta_slow": _number(parts[3], "BETA_SLOW", spec)}
        if not extra["beta_fast"] > extra["beta_slow"] > 0:
            raise AttnposError(f"--scaling {spec!r}: YaRN needs BETA_FAST > BETA_SLOW > 0 (defaults 32 and 1).")
    if kind == "llama3" and len(parts) == 4:
        extra = {"low_freq_factor": _number(parts[2], "LOW", spec), "high_freq_factor": _number(parts[3], "HIGH", spec)}
        if not extra["high_freq_factor"] > extra["low_freq_factor"] > 0:
            raise AttnposError(f"--scaling {spec!r}: the Llama 3 rule needs HIGH > LOW > 0 (defaults 4 and 1).")
    name = f"{kind}:{factor:g}" + "".join(f":{v:g}" for v in extra.values())
    return Variant(name, kind, float(factor), extra)


def parse_all(specs, stretch: float | None = None) -> list[Variant]:
    """Several variants, each named once."""
    out: list[Variant] = []
    for s in specs:
        v = parse(s, stretch)
        if any(o.name == v.name for o in out):
            raise AttnposError(f"--scaling {v.name} is given twice; name each variant once.")
        out.append(v)
    if not out:
        raise AttnposError("Name at least one scaling, e.g. --scaling linear:4 --scaling dynamic --scaling yarn:4.")
    return out


# --------------------------------------------------------------------------------------------- frequencies

def default_inv_freq(theta: float, dim: int) -> np.ndarray:
    """RoPE's frequencies θ_m = base^(−2m/d), m = 0 … d/2 − 1 (Su et al., RoFormer)."""
    return 1.0 / (float(theta) ** (np.arange(0, dim, 2, dtype=np.float64) / dim))


def inv_freq(v: Variant, theta: float, dim: int, training_length: int, seq_len: int | None = None) -> np.ndarray:
    """The variant's frequency per rotary pair for a sequence of ``seq_len`` tokens (only ``dynamic`` depends on
    it), as transformers' rope-initialisation functions compute them."""
    L = int(training_length)
    base = default_inv_freq(theta, dim)
    f = float(v.factor)
    if v.kind == "none":
        return base
    if v.kind == "linear":
        return base / f
    if v.kind == "dynamic":
        n = max(int(seq_len or L), L)
        new_theta = float(theta) * ((f * n / L) - (f - 1)) ** (dim / (dim - 2))
        return default_inv_freq(new_theta, dim)
    if v.kind == "yarn":
        beta_fast = float(v.extra.get("beta_fast", YARN_BETA_FAST))
        beta_slow = float(v.extra.get("beta_slow", YARN_BETA_SLOW))

        def correction_dim(rotations: float) -> float:
            return (dim * math.log(L / (rotations * 2 * math.pi))) / (2 * math.log(theta))

        low = max(math.floor(correction_dim(beta_fast)), 0)
        high = min(math.ceil(correction_dim(beta_slow)), dim - 1)
        if low == high:
            high += 0.001
        ramp = np.clip((np.arange(dim // 2, dtype=np.float64) - low) / (high - low), 0, 1)
        keep = 1 - ramp                                   # 1: the pair keeps its frequency (extrapolation)
        return (base / f) * (1 - keep) + base * keep
    if v.kind == "llama3":
        low_f = float(v.extra.get("low_freq_factor", LLAMA3_LOW))
        high_f = float(v.extra.get("high_freq_factor", LLAMA3_HIGH))
        wavelen = 2 * math.pi / base
        out = np.where(wavelen > L / low_f, base / f, base)
        smooth = (L / wavelen - low_f) / (high_f - low_f)
        smoothed = (1 - smooth) * out / f + smooth * out
        medium = ~(wavelen < L / high_f) & ~(wavelen > L / low_f)
        return np.where(medium, smoothed, out)
    raise AttnposError(f"unknown scaling kind {v.kind!r}")


def attention_factor(v: Variant) -> float:
    """The factor the variant multiplies cos and sin with (so scores by its square): YaRN's 0.1·ln F + 1 (Peng et
    al. 2024), 1 for the others."""
    if v.kind == "yarn":
        return 0.1 * math.log(v.factor) + 1.0 if v.factor > 1 else 1.0
    return 1.0


# --------------------------------------------------------------------------------------------- checks

NOT_ROPE = {
    "alibi": "ALiBi needs no scaling: its penalty is a fixed slope per head times the distance, defined for every "
             "distance (Press et al. 2022), so there are no rotary frequencies to stretch",
    "relative-bias": "a relative-bias model (T5) needs no scaling: every distance past the last bucket shares that "
                     "bucket's bias (Raffel et al. 2020), so any length can be read and there is nothing to stretch",
    "learned-absolute": "a learned absolute table has one row per position and cannot be read past its length; no "
                        "rotary scaling applies (stretching the table itself would need fine-tuning)",
    "sinusoidal": "a fixed sinusoidal table is added to the embeddings, not rotated into queries and keys; no "
                  "rotary scaling applies",
    "none": "a model with no positional encoding has no position signal to stretch",
}

_FAMILIES = {   # model types whose position scheme is fixed by the architecture (torch-free guess from config.json)
    "bloom": "alibi", "t5": "relative-bias", "mt5": "relative-bias", "umt5": "relative-bias",
    "longt5": "relative-bias", "gpt2": "learned-absolute", "opt": "learned-absolute", "bert": "learned-absolute",
    "roberta": "learned-absolute", "distilbert": "learned-absolute", "gpt_bigcode": "learned-absolute",
}


def scheme_of_config(config: dict) -> str | None:
    """The position scheme a raw config.json states or implies (None when it cannot be told without loading)."""
    declared = config.get("attnpos_scheme")
    if declared:
        return str(declared)
    mt = str(config.get("model_type", ""))
    if mt in _FAMILIES:
        return _FAMILIES[mt]
    if config.get("alibi") is True or config.get("position_embedding_type") == "alibi":
        return "alibi"
    if config.get("rope_parameters") or config.get("rope_theta") or config.get("rope_scaling"):
        return "rope"
    return None


def refusal(scheme: str, name: str) -> str:
    """The error text for a model whose scheme is not RoPE."""
    why = NOT_ROPE.get(scheme, f"its position scheme is {scheme}, not RoPE")
    return (f"{name} does not use RoPE, so it cannot be stretched: {why}. To see what it does past its training "
            f"length as it is, run `attnpos length {name} --to N`.")


def training_length_of_config(config: dict, given: int | None = None) -> tuple[int | None, str]:
    """The training length from a raw config.json, as :func:`attnpos.length.training_length_of` reads it."""
    if given:
        return int(given), "given by the user"
    if config.get("attnpos_training_length"):
        return int(config["attnpos_training_length"]), "recorded with the model"
    for holder in ("rope_parameters", "rope_scaling"):
        rp = config.get(holder)
        if isinstance(rp, dict) and rp.get("original_max_position_embeddings"):
            return int(rp["original_max_position_embeddings"]), f"config {holder}.original_max_position_embeddings"
    for name in ("max_position_embeddings", "n_positions", "seq_length"):
        if config.get(name):
            return int(config[name]), f"config {name} (a guess: the context the model was built for)"
    return None, "unknown"


def check_request(to: int, training_length: int | None, source: str = "") -> None:
    """``to`` must go past the training length (else there is nothing to extend)."""
    if training_length is None:
        raise AttnposError("The training length of this model is unknown, so attnpos cannot tell where stretching "
                           "starts. Give it with --training-length L.")
    if to <= training_length:
        raise AttnposError(f"--to {to} does not go past the training length {training_length}"
                           + (f" ({source})" if source else "") + f": a scaling only matters beyond it. Use --to "
                           f"{2 * training_length} or more (e.g. {4 * training_length} for 4×).")


def already_scaled(rope_parameters: dict | None) -> str | None:
    """The rope type a checkpoint already uses when it is not plain RoPE (stretching on top is not offered)."""
    if not isinstance(rope_parameters, dict):
        return None
    t = rope_parameters.get("rope_type", rope_parameters.get("type", "default"))
    return None if t in (None, "default") else str(t)
