"""The training table of the shipped reference models, from their configs: ``attnpos reference table`` (the table
in TRAINING.md is its output)."""

from __future__ import annotations

import json
import pathlib

from .models import SCHEMES


def table() -> str:
    root = pathlib.Path(__file__).resolve().parent / "weights"
    lines = ["| scheme | class | parameters | steps | minutes (whole run) | train loss | val loss | untrained val loss "
             "| val / unigram entropy |", "|---|---|---:|---:|---:|---:|---:|---:|---:|"]
    first = None
    for s in SCHEMES:
        c = json.loads((root / s / "config.json").read_text())
        r = c["attnpos_training"]
        first = first or r
        lines.append(f"| `{s}` | {c['architectures'][0]} | {r['parameters']:,} | {r['steps']} | {r['minutes']:.2f} "
                     f"| {r['train_loss_per_byte']:.3f} | {r['val_loss_per_byte']:.3f} "
                     f"| {r['val_loss_per_byte_untrained']:.3f} "
                     f"| {r['val_loss_per_byte'] / r['unigram_entropy_per_byte']:.3f} |")
    lines.append("")
    lines.append(f"corpus: {first['corpus_documents']} documents, {first['corpus_bytes']} bytes, sha256 "
                 f"{first['corpus_sha256']}; unigram entropy {first['unigram_entropy_per_byte']} nats/byte; "
                 f"versions {first['versions']}")
    return "\n".join(lines)
