"""Train one reference model on CPU (command line: ``attnpos train SCHEME --out DIR [--minutes M] [--context N]
[--seed S] [--steps N]``).

What a run does:

* generates the corpus (``corpus.py``), holds out every 20th document for validation;
* builds the untrained model for the scheme (``models.build_model``, initialised from ``--seed``);
* trains with AdamW, linear warm-up then cosine decay, batches of ``--batch`` windows of ``--context`` tokens;
  each window is ``<bos>`` followed by corpus bytes, starting at a document start half of the time (so the
  fixed-width headers sit at fixed slots) and anywhere in the text otherwise. Documents are separated by
  ``<eos>``; ``<eos>`` is never a prediction target, so every loss is a loss per byte, in nats;
* with ``--steps``: warm-up then cosine over that many updates; deterministic given the seed (one
  ``torch.Generator`` draws every batch, ``torch.manual_seed`` fixes the initialisation), bit for bit;
  ``--minutes`` is then only a hard cap;
* without ``--steps``: warm-up then cosine over the wall-clock budget ``--minutes`` (default 4.5), so a busy
  machine trains fewer steps but still finishes its schedule. Initialisation and data order still follow the
  seed; the step count reached is recorded;
* saves the model (safetensors) and the byte tokenizer into ``--out``, with ``attnpos_scheme``,
  ``attnpos_training_length`` and an ``attnpos_training`` record in ``config.json``.
"""

from __future__ import annotations

import math
import os
import platform
import time
from pathlib import Path

import numpy as np
import torch

from ..errors import AttnposError
from . import corpus as corpus_mod
from .models import (DEFAULT_CONTEXT, SCHEMES, SINUSOIDAL_TOKEN_LR_SCALE, build_model, count_parameters,
                     freeze_sinusoidal)
from .tokenizer import BOS_ID, EOS_ID, build_tokenizer

VAL_WINDOWS = 96
VAL_SEED = 7  # the validation windows are the same for every scheme and every training seed
DOC_START_SHARE = 0.5


# ----------------------------------------------------------------------------------------------- data
class ByteStream:
    """Documents as one token array (bytes, ``<eos>`` between documents) plus the document start offsets."""

    def __init__(self, docs: list[str]):
        parts, starts, pos = [], [], 0
        for d in docs:
            b = np.frombuffer(d.encode("utf-8"), dtype=np.uint8).astype(np.int64)
            starts.append(pos)
            parts.append(b)
            parts.append(np.array([EOS_ID], dtype=np.int64))
            pos += len(b) + 1
        self.tokens = torch.from_numpy(np.concatenate(parts))
        self.starts = torch.tensor(starts, dtype=torch.long)

    def __len__(self) -> int:
        return int(self.tokens.numel())

    def windows(self, n: int, context: int, gen: torch.Generator) -> tuple[torch.Tensor, torch.Tensor]:
        """``n`` windows of ``context`` tokens (``<bos>`` + context-1 corpus tokens) and their labels."""
        span = context - 1
        limit = len(self) - span
        if limit <= 0:
            raise AttnposError(f"the corpus ({len(self)} tokens) is shorter than one training window ({context})")
        at_start = torch.rand(n, generator=gen) < DOC_START_SHARE
        doc_pick = self.starts[torch.randint(len(self.starts), (n,), generator=gen)].clamp(max=limit - 1)
        anywhere = torch.randint(limit, (n,), generator=gen)
        offsets = torch.where(at_start, doc_pick, anywhere)
        idx = offsets[:, None] + torch.arange(span)[None, :]
        body = self.tokens[idx]
        ids = torch.cat([torch.full((n, 1), BOS_ID, dtype=torch.long), body], dim=1)
        labels = ids.clone()
        labels[labels == EOS_ID] = -100  # the loss stays a loss per byte
        return ids, labels


def per_byte_loss(model, ids: torch.Tensor, labels: torch.Tensor, batch: int = 32) -> float:
    """Mean next-byte cross-entropy (nats) over all byte targets, evaluated in chunks without gradients."""
    total, count = 0.0, 0
    was_training = model.training
    model.eval()
    with torch.no_grad():
        for k in range(0, ids.shape[0], batch):
            x, y = ids[k:k + batch], labels[k:k + batch]
            logits = model(input_ids=x, use_cache=False).logits[:, :-1].float()
            tgt = y[:, 1:]
            loss = torch.nn.functional.cross_entropy(
                logits.reshape(-1, logits.shape[-1]), tgt.reshape(-1), ignore_index=-100, reduction="sum"
            )
            total += float(loss)
            count += int((tgt != -100).sum())
    model.train(was_training)
    return total / max(count, 1)


def _lr_at(step: int, total: int, peak: float, warmup: int) -> float:
    if step < warmup:
        return peak * (step + 1) / warmup
    progress = (step - warmup) / max(1, total - warmup)
    return peak * (0.1 + 0.9 * 0.5 * (1.0 + math.cos(math.pi * min(1.0, progress))))


def _versions() -> dict:
    import tokenizers
    import transformers

    return {
        "python": platform.python_version(),
        "torch": torch.__version__,
        "transformers": transformers.__version__,
        "tokenizers": tokenizers.__version__,
        "numpy": np.__version__,
    }


# ----------------------------------------------------------------------------------------------- training
def train(scheme: str, out: str | os.PathLike | None, context: int = DEFAULT_CONTEXT, seed: int = 0,
          steps: int | None = None, minutes: float | None = 4.5, batch: int = 32, lr: float = 3e-3,
          warmup: int = 40, threads: int = 2, corpus_bytes: int | None = None, val_windows: int = VAL_WINDOWS,
          progress: bool = True, command: str | None = None, n_layers: int = 4, hidden: int = 128, heads: int = 4,
          save_every: int | None = None, log_every: int = 50):
    """Train a reference model; save it to ``out`` (if given) and return ``(model, record)``.

    ``save_every``: also save the model every this-many updates into ``out/checkpoint-<step>/`` (the same folder
    layout as the final model, whose own record covers the steps so far); ``log_every``: how often the running
    mean of the training loss is added to ``train_loss_history``."""
    if scheme not in SCHEMES:
        raise AttnposError(f"unknown position scheme {scheme!r}; choose one of: {', '.join(SCHEMES)}")
    if steps is None and minutes is None:
        raise AttnposError("give --steps or --minutes (or both) so the run knows when to stop")
    if steps is not None and steps < 1:
        raise AttnposError(f"--steps must be at least 1, got {steps}")
    if minutes is not None and minutes <= 0:
        raise AttnposError(f"--minutes must be positive, got {minutes}")
    if save_every is not None and (save_every < 1 or out is None):
        raise AttnposError(f"--save-every must be at least 1 and needs --out, got {save_every}")
    if log_every < 1:
        raise AttnposError(f"--log-every must be at least 1, got {log_every}")
    torch.set_num_threads(max(1, int(threads)))
    t_start = time.perf_counter()

    docs = corpus_mod.generate_documents(corpus_mod.CORPUS_SEED,
                                         corpus_bytes if corpus_bytes else corpus_mod.TARGET_BYTES)
    sha = corpus_mod.corpus_sha256(docs)
    train_docs, val_docs = corpus_mod.split_documents(docs)
    entropy = corpus_mod.unigram_entropy(train_docs)
    train_stream, val_stream = ByteStream(train_docs), ByteStream(val_docs)
    val_ids, val_labels = val_stream.windows(val_windows, context, torch.Generator().manual_seed(VAL_SEED))

    model = build_model(scheme, context=context, seed=seed, n_layers=n_layers, hidden=hidden, heads=heads)
    if scheme == "sinusoidal":
        freeze_sinusoidal(model)
    params = [p for p in model.parameters() if p.requires_grad]
    scaled = []
    if scheme == "sinusoidal":  # see models.build_model: a token table on the scale of the fixed position table
        scaled = [model.transformer.wte.weight]
    rest = [p for p in params if all(p is not q for q in scaled)]
    groups = [{"params": [p for p in rest if p.dim() >= 2], "weight_decay": 0.01, "lr_scale": 1.0},
              {"params": [p for p in rest if p.dim() < 2], "weight_decay": 0.0, "lr_scale": 1.0}]
    if scaled:
        groups.append({"params": scaled, "weight_decay": 0.0, "lr_scale": SINUSOIDAL_TOKEN_LR_SCALE})
    opt = torch.optim.AdamW(groups, lr=lr, betas=(0.9, 0.95), eps=1e-8)
    gen = torch.Generator().manual_seed(int(seed))
    torch.manual_seed(int(seed))

    val_initial = per_byte_loss(model, val_ids, val_labels)
    model.train()
    deadline = t_start + minutes * 60.0 if minutes is not None else math.inf
    if steps is not None:
        plan_note = "fixed by --steps: warm-up then cosine over the step count (bit-for-bit reproducible)"
    else:
        plan_note = ("clock-scheduled: warm-up, then cosine over the wall-clock budget; the data order and the "
                     "initialisation follow the seed, the step count depends on the machine's speed")
    t_loop = time.perf_counter()
    # clock-scheduled runs keep a reserve for the final evaluation and saving
    loop_budget = max(1.0, (deadline - t_loop) - max(10.0, 0.04 * minutes * 60.0)) if steps is None else None
    recent: list[float] = []
    history = []
    stopped_early = False
    step = 0
    try:
        from tqdm.auto import tqdm
    except ImportError:  # pragma: no cover - tqdm is a dependency
        tqdm = None
    bar = tqdm(total=steps, desc=f"train {scheme}", unit="step", disable=not progress) if tqdm else None
    while True:
        now = time.perf_counter()
        if steps is not None:
            if step >= steps:
                break
            if now > deadline:
                stopped_early = True
                break
            rate = _lr_at(step, steps, lr, warmup)
        else:
            fraction = (now - t_loop) / loop_budget
            if fraction >= 1.0:
                break
            rate = lr * (step + 1) / warmup if step < warmup else _lr_at(int(fraction * 10**6), 10**6, lr, 0)
        for group in opt.param_groups:
            group["lr"] = rate * group["lr_scale"]
        ids, labels = train_stream.windows(batch, context, gen)
        loss = model(input_ids=ids, labels=labels, use_cache=False).loss
        opt.zero_grad(set_to_none=True)
        loss.backward()
        torch.nn.utils.clip_grad_norm_(params, 1.0)
        opt.step()
        value = float(loss.detach())
        recent.append(value)
        if len(recent) > 50:
            recent.pop(0)
        step += 1
        if step % log_every == 0:
            history.append([step, round(sum(recent) / len(recent), 4)])
        if save_every and step % save_every == 0 and (steps is None or step < steps):
            model.eval()
            model.config.attnpos_training = {"scheme": scheme, "steps": step, "intermediate": True,
                                             "train_loss_history": [list(h) for h in history],
                                             "loss_unit": "nats per byte (running mean of the last 50 batches)",
                                             "seed": int(seed), "context": context, "command": command or ""}
            save(model, Path(out) / f"checkpoint-{step}")
            model.train()
        if bar is not None:
            bar.update(1)
            if step % 10 == 0:
                bar.set_postfix(loss=f"{sum(recent) / len(recent):.3f}")
    if bar is not None:
        bar.close()
    train_seconds = time.perf_counter() - t_loop
    model.eval()
    val_final = per_byte_loss(model, val_ids, val_labels)
    train_final = sum(recent) / len(recent) if recent else float("nan")

    record = {
        "scheme": scheme,
        "steps": step,
        "step_plan": plan_note,
        "stopped_early_at_time_cap": stopped_early,
        "minutes": round((time.perf_counter() - t_start) / 60.0, 3),
        "train_loop_minutes": round(train_seconds / 60.0, 3),
        "train_loss_per_byte": round(train_final, 5),
        "val_loss_per_byte": round(val_final, 5),
        "val_loss_per_byte_untrained": round(val_initial, 5),
        "unigram_entropy_per_byte": round(entropy, 5),
        "loss_unit": "nats per byte (train loss: mean of the last 50 batches; val: fixed held-out windows)",
        "train_loss_history": history,
        "log_every": int(log_every),
        "save_every": int(save_every) if save_every else None,
        "batch": batch,
        "context": context,
        "lr": lr,
        "warmup": warmup,
        "schedule": "AdamW(0.9, 0.95, wd 0.01 on matrices), linear warm-up then cosine to 10% of peak"
                    + (f"; token table at {SINUSOIDAL_TOKEN_LR_SCALE:g}x the rate, no decay" if scaled else ""),
        "threads": int(threads),
        "seed": int(seed),
        "parameters": count_parameters(model),
        "corpus_sha256": sha,
        "corpus_documents": len(docs),
        "corpus_bytes": len(corpus_mod.corpus_text(docs).encode("utf-8")),
        "val_documents": len(val_docs),
        "val_windows": val_windows,
        "versions": _versions(),
        "command": command or "",
    }
    model.config.attnpos_training = record
    if out is not None:
        save(model, out)
    return model, record


def save(model, out: str | os.PathLike) -> Path:
    """Save model (safetensors) + byte tokenizer into ``out``."""
    import tempfile

    from ..files import move_files_into

    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    # written into a temporary folder inside out first, then moved file by file (fsync, rename): a failure
    # part-way leaves the previous model in out whole
    with tempfile.TemporaryDirectory(dir=out, prefix=".saving-") as staging:
        model.save_pretrained(staging)
        if not (Path(staging) / "model.safetensors").exists():  # pragma: no cover - transformers 5 writes it
            raise AttnposError(f"saving to {out} did not produce model.safetensors")
        limit = None
        if getattr(model.config, "model_type", "") == "gpt2":
            limit = model.config.n_positions
        build_tokenizer(model_max_length=limit).save_pretrained(staging)
        move_files_into(staging, out)
    return out
