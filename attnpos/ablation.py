"""Head ablation: take one head's output away and measure what the model loses — the intervention that backs a role.

Attention weights say where a head looks, not whether the model uses what it reads. Ablation asks the second
question. A head's output enters its layer's output projection as its own slice of the concatenated heads
(Vaswani et al. 2017, §3.2.2: MultiHead = Concat(head_1, …, head_h) W^O); ablating head h replaces that slice,
just before W^O, in every position of every text:

* ``mean`` (default) — by the slice's mean over every token of the texts, measured in a first, clean pass: the
  head keeps its average contribution but no longer carries anything token-specific (common practice; it keeps the
  next layers' inputs near their usual range, which zeros may not);
* ``zero`` — by zeros.

Measured per head against the clean run on the same texts:

* ``delta_loss`` — change of the mean next-token loss (nats per token; models with a language-model head), with a
  90% bootstrap interval over texts; positive = the model is worse without the head;
* ``output_change`` — mean over ordinary tokens of ‖h′ − h‖ / ‖h‖ for the last hidden state (every model,
  encoders included).

One forward pass per head and text (two for the clean run and the means); nothing is kept but these numbers.

Example::

    >>> res = ablate("ref:rope", heads=["L0.H1", "L2.H0"], texts=["The ferry left at nine and came back at noon.",
    ...              "Rye loaves come out of the oven first, then the buns."], n_boot=20)
    >>> list(res.table()["key"])                         # largest loss first: L0.H1 is a previous-token head
    ['L0.H1', 'L2.H0']

Command line: ``attnpos ablate ref:rope --heads L0.H1,L2.H0 --json ablation.json``.
"""

from __future__ import annotations

import contextlib
import sys
from typing import Any, Iterable

import numpy as np
import pandas as pd
import torch

from .capture import forward, hooked, next_token_loss
from .errors import AttnposError
from .core import keys, progress as _progress, settings
from .results.ablation import CAUTION, COLUMNS, AblationResult  # noqa: F401
from .subject import AttentionSite, Subject, load
from .texts import TextUnit, as_raw, prepare

HOWS = settings.ABLATION_HOWS
BOOT = settings.ABLATION_BOOT
# names of the output projection (W^O) inside an attention module, across transformers' architectures
_OUT_NAMES = ("o_proj", "out_proj", "c_proj", "dense", "o")


def _in_features(m: torch.nn.Module) -> int | None:
    if isinstance(m, torch.nn.Linear):
        return m.in_features
    w = getattr(m, "weight", None)
    if type(m).__name__ == "Conv1D" and isinstance(w, torch.Tensor) and w.dim() == 2:
        return int(w.shape[0])                 # GPT-2's Conv1D stores W as (in, out)
    return None


def output_projection(subject: Subject, site: AttentionSite) -> torch.nn.Module:
    """The module that applies W^O to the concatenated heads of ``site``: a child of the attention module, or, in
    the BERT family (where the self-attention module stops before W^O), the ``output.dense`` of its parent."""
    for name in _OUT_NAMES:
        m = getattr(site.module, name, None)
        if isinstance(m, torch.nn.Module) and _in_features(m):
            return m
    if "." in site.name:
        parent = subject.model.get_submodule(site.name.rsplit(".", 1)[0])
        m = getattr(getattr(parent, "output", None), "dense", None)
        if isinstance(m, torch.nn.Module) and _in_features(m):
            return m
    raise AttnposError(f"Could not find the output projection of {site.stack}:L{site.layer} ({site.name}) in "
                       f"{subject.architecture}; attnpos looks for {', '.join(_OUT_NAMES)} or the parent's "
                       "output.dense. Please report the architecture.")


def _slices(subject: Subject) -> dict[tuple[str, int], tuple[torch.nn.Module, int]]:
    """(stack, layer) → (output projection, width of one head's slice of its input)."""
    out = {}
    for site in subject.sites:
        if site.shared > 1:
            raise AttnposError(f"{site.name} is one attention module applied {site.shared} times (layers shared "
                               "across depth); replacing a head's output there would change every application at "
                               "once, so attnpos does not ablate such models. Scan them instead.")
        proj = output_projection(subject, site)
        width = _in_features(proj)
        if not subject.n_heads or width % subject.n_heads:
            raise AttnposError(f"The output projection of {site.stack}:L{site.layer} takes {width} features, not a "
                               f"multiple of the {subject.n_heads} heads; attnpos cannot tell the heads apart.")
        out[(site.stack, site.layer)] = (proj, width // subject.n_heads)
    return out


def _hooks(modules_hooks: Iterable[tuple[torch.nn.Module, Any]]):
    """Forward pre-hooks for the block, all removed on exit (also after a Ctrl-C mid-registration)."""
    return hooked(modules_hooks, pre=True)


def parse_heads(subject: Subject, heads) -> list[tuple[str, int, int]]:
    """The heads to ablate as ``(stack, layer, head)``: keys in the grammar of :mod:`attnpos.core.keys` (a layer
    key means each of its heads), ``(layer, head)`` or ``(stack, layer, head)`` tuples, or None / ``"all"``."""
    known = {(s.stack, s.layer) for s in subject.sites}
    if heads is None or heads == "all":
        return [(s.stack, s.layer, h) for s in subject.sites for h in range(subject.n_heads)]
    if isinstance(heads, tuple) and len(heads) in (2, 3) and all(isinstance(x, (int, str)) for x in heads) \
            and not all(isinstance(x, str) for x in heads):
        heads = [heads]
    if not isinstance(heads, str) and len(heads) and all(isinstance(x, tuple) and len(x) == 2 for x in heads):
        heads = [(subject.sites[0].stack, *x) for x in heads]
    out = []
    for k in keys.parse_keys(heads):
        if k.layer is None:
            raise AttnposError("'model' names every head: leave --heads out to ablate them one by one.")
        if k.head is None:
            if (k.stack, k.layer) not in known:
                raise AttnposError(f"{subject.name} has no layer {k}: it has {_grid(subject, known)}.")
            out += [(k.stack, k.layer, h) for h in range(subject.n_heads)]        # a whole layer, head by head
            continue
        if (k.stack, k.layer) not in known or not 0 <= k.head < subject.n_heads:
            raise AttnposError(f"{subject.name} has no head {k}: it has {_grid(subject, known)}.")
        out.append((k.stack, k.layer, k.head))
    if not out:
        raise AttnposError("No heads to ablate: give keys such as L0.H1,L2.H3, or none for every head.")
    return list(dict.fromkeys(out))


def _grid(subject: Subject, known) -> str:
    return (f"{len(subject.sites)} attention layers × {subject.n_heads} heads "
            f"({', '.join(sorted({s for s, _ in known}))})")


def _final_hidden(outputs) -> torch.Tensor:
    hs = getattr(outputs, "decoder_hidden_states", None) or getattr(outputs, "hidden_states", None)
    return hs[-1][0].float()


def _bootstrap(per_text: np.ndarray, weights: np.ndarray, n_boot: int, seed: int = 0) -> tuple[float, float]:
    """90% percentile interval of the token-weighted mean, resampling texts."""
    if len(per_text) < 2 or n_boot <= 0:
        return float("nan"), float("nan")
    rng = np.random.default_rng(seed)
    idx = rng.integers(0, len(per_text), size=(n_boot, len(per_text)))
    w = weights[idx]
    means = (per_text[idx] * w).sum(1) / w.sum(1)
    return float(np.percentile(means, 5)), float(np.percentile(means, 95))


def ablate(model: Any, heads=None, texts=None, *, how: str = "mean", together: bool = False,
           max_tokens: int | None = None,
           n_boot: int = BOOT, progress: bool | None = None, scheme=None, allow_pickle: bool = False,
           trust_remote_code: bool = False) -> pd.DataFrame:
    """Ablate heads one at a time and measure the change in loss and in the final hidden states.

    Args:
        model: a :class:`~attnpos.subject.Subject`, a folder, or ``"ref:<scheme>"``.
        heads: head keys (``"L0.H1"``, ``"decoder:L1.H0"``; a layer key ``"L2"`` means each of its heads), a
            comma-separated string of them, ``(layer, head)`` or ``(stack, layer, head)`` tuples, or None for
            every head.
        texts: strings, ``pathlib.Path`` files/folders, or None for the bundled sample texts; cut into windows as in
            :func:`attnpos.scan` (the training length when the model records it).
        how: ``"mean"`` or ``"zero"`` (see the module docstring).
        together: ablate all the given heads at once (one row, keyed ``L0.H1+L2.H3``) instead of one at a time —
            for heads that may make up for each other.
        n_boot: bootstrap resamples over texts for the interval of ``delta_loss``.

    Returns an :class:`~attnpos.results.ablation.AblationResult`: ``.table()`` has one row per head, sorted by
    ``delta_loss`` (else ``output_change``), largest first; ``.clean_loss``, ``.how``, ``.notes``, ``.caution``.
    """
    if how not in HOWS:
        raise AttnposError(f"Unknown ablation {how!r}; choose from {', '.join(HOWS)}.")
    subject = model if isinstance(model, Subject) else load(model, scheme=scheme, allow_pickle=allow_pickle,
                                                            trust_remote_code=trust_remote_code)
    chosen = parse_heads(subject, heads)
    slices = _slices(subject)
    if max_tokens is None and subject.training_length:
        max_tokens = subject.training_length
    units: list[TextUnit] = prepare(subject, as_raw(texts), max_tokens=max_tokens)
    units = [u for u in units if int((~u.special).sum()) >= 2]
    if not units:
        raise AttnposError("Every text is shorter than 2 ordinary tokens; give longer texts to ablate on.")

    def run(u: TextUnit):
        return forward(subject, list(u.ids), offset=0, want_weights=False, hidden=True)

    # clean pass: loss, final hidden states, and each projection's mean input (for mean ablation)
    sums = {k: torch.zeros(_in_features(p), dtype=torch.float64) for k, (p, _) in slices.items()}
    count = [0]

    def summing(key):
        def hook(module, args):
            x = args[0]
            sums[key] += x.reshape(-1, x.shape[-1]).double().sum(0)
            if key == next(iter(slices)):
                count[0] += x.reshape(-1, x.shape[-1]).shape[0]
        return hook

    clean_loss, clean_hidden, n_tok = [], [], []
    with torch.no_grad(), _hooks((p, summing(k)) for k, (p, _) in slices.items()):
        for u in units:
            out = run(u)
            tl = next_token_loss(out, list(u.ids))
            clean_loss.append(tl)
            clean_hidden.append(_final_hidden(out))
            n_tok.append(0 if tl is None else len(tl))
    has_loss = all(t is not None for t in clean_loss)
    ordinary = [torch.from_numpy(~np.asarray(u.special, dtype=bool)) for u in units]
    means = {k: (s / max(count[0], 1)).float() for k, s in sums.items()}

    groups = [chosen] if together else [[h] for h in chosen]
    show = progress if progress is not None else (len(groups) > 4 and _progress.wanted())
    iterator = _progress.bar(groups, desc=f"ablating {subject.name}", unit="head", show=show)
    rows = []
    weights = np.asarray(n_tok, dtype=np.float64)
    for group in iterator:
        # one pre-hook per output projection, replacing the slices of every head of the group that it reads
        slots: dict[tuple[str, int], list] = {}
        for stack, layer, head in group:
            proj, d = slices[(stack, layer)]
            lo, hi = head * d, (head + 1) * d
            fill = means[(stack, layer)][lo:hi] if how == "mean" else None
            slots.setdefault((stack, layer), []).append((lo, hi, fill))

        def replacing(parts):
            def replace(module, args):
                x = args[0].clone()
                for lo, hi, fill in parts:
                    x[..., lo:hi] = 0 if fill is None else fill.to(x.dtype)
                return (x, *args[1:])
            return replace

        d_loss, change = [], []
        with torch.no_grad(), _hooks((slices[k][0], replacing(parts)) for k, parts in slots.items()):
            for t, u in enumerate(units):
                out = run(u)
                if has_loss:
                    d_loss.append(float(next_token_loss(out, list(u.ids)).mean() - clean_loss[t].mean()))
                h, h0 = _final_hidden(out), clean_hidden[t]
                rel = (h - h0).norm(dim=-1) / h0.norm(dim=-1).clamp_min(1e-12)
                change.append(float(rel[ordinary[t]].mean()) if bool(ordinary[t].any()) else float("nan"))
        single = group[0] if len(group) == 1 else (None, None, None)
        row = {"key": "+".join(keys.head_key(*g) for g in group), "stack": single[0], "layer": single[1],
               "head": single[2], "heads": len(group), "how": how, "output_change": float(np.nanmean(change))}
        if has_loss:
            dl = np.asarray(d_loss)
            row["delta_loss"] = float((dl * weights).sum() / weights.sum())
            row["delta_loss_lo"], row["delta_loss_hi"] = _bootstrap(dl, weights, n_boot)
        else:
            row["delta_loss"] = row["delta_loss_lo"] = row["delta_loss_hi"] = float("nan")
        rows.append(row)
    table = pd.DataFrame(rows, columns=COLUMNS)
    sort = "delta_loss" if has_loss else "output_change"
    table = table.sort_values(sort, ascending=False, kind="stable").reset_index(drop=True)
    notes = []
    if not has_loss:
        notes.append("The model has no language-model head here, so no loss: only the change of the final hidden "
                     "states is measured.")
    if len(units) < 2:
        notes.append("One text only: no interval for delta_loss (give more texts).")
    clean = (float(sum(float(t.sum()) for t in clean_loss) / max(sum(n_tok), 1)) if has_loss else None)
    return AblationResult(model=subject.describe(), rows=table, how=how, together=together, clean_loss=clean,
                          n_texts=len(units), n_tokens=int(sum(len(u) for u in units)), n_boot=n_boot, notes=notes)
