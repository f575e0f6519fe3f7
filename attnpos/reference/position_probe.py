"""Quick check that a reference model carries absolute position in its hidden states (Haviv et al. 2022).

``python -m attnpos.reference.position_probe [SCHEME ...]``: for each layer's hidden states, fit a ridge
regression from the vector at token t to t itself on held-out corpus windows, and report the held-out R².
Three rows per model, because a bare R² means little (Hewitt & Liang 2019, control tasks):

* ``trained`` — the shipped weights;
* ``untrained`` — a fresh copy of the same architecture (a causal layer can recover position from its prefix
  even with random weights, Kazemnejad et al. 2023, so this is the floor to beat);
* ``shuffled`` — the trained model with the position labels permuted within each window.

Windows start anywhere in a document (never at its header), so a position cannot be read off the header text.
This is a stand-in until the full probe of ``attnpos.probes`` exists; it shares none of its code.
"""

from __future__ import annotations


import numpy as np
import torch

from . import corpus as corpus_mod
from .models import build_model
from .tokenizer import BOS_ID


def _windows(n: int, context: int, seed: int) -> torch.Tensor:
    docs = corpus_mod.split_documents(corpus_mod.generate_documents())[1]
    text = np.frombuffer("\n".join(docs).encode("utf-8"), dtype=np.uint8).astype(np.int64)
    g = np.random.default_rng(seed)
    offs = g.integers(0, len(text) - context, size=n)
    ids = np.stack([np.concatenate([[BOS_ID], text[o:o + context - 1]]) for o in offs])
    return torch.from_numpy(ids)


def _hidden(model, ids: torch.Tensor) -> list[np.ndarray]:
    with torch.no_grad():
        hs = model(input_ids=ids, attention_mask=torch.ones_like(ids), output_hidden_states=True,
                   use_cache=False).hidden_states
    return [h.numpy().astype(np.float64) for h in hs]


def probe_r2(model, n_train: int = 48, n_test: int = 24, context: int = 128, seed: int = 0,
             shuffle: bool = False) -> list[float]:
    """Held-out R² of a ridge probe (hidden state → absolute position) for each hidden-state layer."""
    from sklearn.linear_model import RidgeCV
    from sklearn.metrics import r2_score

    ids = _windows(n_train + n_test, context, seed)
    pos = np.tile(np.arange(context), (ids.shape[0], 1)).astype(np.float64)
    if shuffle:
        g = np.random.default_rng(seed + 1)
        pos = np.stack([g.permutation(row) for row in pos])
    out = []
    for h in _hidden(model, ids):
        # skip slot 0 (the <bos> token is the same in every window, so its position is trivially readable)
        xtr = h[:n_train, 1:].reshape(-1, h.shape[-1])
        xte = h[n_train:, 1:].reshape(-1, h.shape[-1])
        ytr, yte = pos[:n_train, 1:].reshape(-1), pos[n_train:, 1:].reshape(-1)
        mu, sd = xtr.mean(0), xtr.std(0) + 1e-8
        reg = RidgeCV(alphas=np.logspace(-2, 4, 13)).fit((xtr - mu) / sd, ytr)
        out.append(float(r2_score(yte, reg.predict((xte - mu) / sd))))
    return out


def report(schemes, seed: int = 0) -> str:
    """The quick probe of each reference model in ``schemes``: trained, untrained and shuffled-label R² per layer."""
    from transformers import AutoModelForCausalLM

    from . import weights_dir

    torch.set_num_threads(2)
    lines = []
    for scheme in schemes:
        trained = AutoModelForCausalLM.from_pretrained(weights_dir(scheme)).eval()
        ctx = int(trained.config.attnpos_training_length)
        untrained = build_model(scheme, context=ctx, seed=seed + 1)
        rows = {
            "trained": probe_r2(trained, context=ctx, seed=seed),
            "untrained": probe_r2(untrained, context=ctx, seed=seed),
            "shuffled": probe_r2(trained, context=ctx, seed=seed, shuffle=True),
        }
        lines.append(f"{scheme}: held-out R² of a ridge probe for absolute position (layer 0 = embeddings)")
        lines.append("  " + "".join(f"{'layer ' + str(k):>10}" for k in range(len(rows['trained']))))
        for name, vals in rows.items():
            lines.append(f"  {name:<10}" + "".join(f"{v:10.3f}" for v in vals))
    return "\n".join(lines)
