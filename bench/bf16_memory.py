"""Benchmark: peak memory of a scan of a 1B-class model kept in bfloat16.

Builds a random-weight Llama shape directly in bfloat16 (22 layers, 32 query / 4 key-value heads, hidden 2048, MLP
5632, vocabulary 32000 — the shape of the 1.1B Llama models practitioners keep; nothing is downloaded, no float32
copy of the weights ever exists), scans one text of T random tokens with ``attnpos.scan`` and reports the process's
peak RSS (VmHWM) next to the size of the bf16 weights. Target: peak RSS ≤ weights + 1.5 GB at T = 1024.

    python bench/bf16_memory.py                  # the 1B shape at T = 1024 (a few minutes on 2 cores)
    python bench/bf16_memory.py --full           # the same with the scan's shift test, induction test, bootstrap
    python bench/bf16_memory.py --layers 2 --T 256   # a quick look

Peak RSS includes Python, torch and transformers themselves. It prints one JSON object (``--out`` also writes it).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path

os.environ.setdefault("HF_HUB_OFFLINE", "1")
os.environ.setdefault("TRANSFORMERS_OFFLINE", "1")
os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")
os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

TARGET_EXTRA_GB = 1.5


def _status_mb(field: str) -> float | None:
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith(field + ":"):
                return float(line.split()[1]) / 1024
    except OSError:
        pass
    return None


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--T", type=int, default=1024, help="tokens in the scanned text (default 1024)")
    ap.add_argument("--layers", type=int, default=22)
    ap.add_argument("--hidden", type=int, default=2048)
    ap.add_argument("--heads", type=int, default=32)
    ap.add_argument("--kv-heads", type=int, default=4)
    ap.add_argument("--mlp", type=int, default=5632)
    ap.add_argument("--vocab", type=int, default=32000)
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--full", action="store_true",
                    help="the scan with its defaults (shift test, induction test, bootstrap) instead of capture, "
                         "split and roles only")
    ap.add_argument("--out", type=Path, default=None, help="also write the JSON here")
    args = ap.parse_args(argv)

    import numpy as np
    import torch
    import transformers as tf

    import attnpos
    from attnpos.files import write_atomic
    from attnpos.reference.tokenizer import BOS_ID, EOS_ID, PAD_ID, build_tokenizer

    torch.set_num_threads(args.threads)
    base = _status_mb("VmRSS")
    torch.manual_seed(0)
    cfg = tf.LlamaConfig(vocab_size=args.vocab, hidden_size=args.hidden, num_hidden_layers=args.layers,
                         num_attention_heads=args.heads, num_key_value_heads=args.kv_heads,
                         intermediate_size=args.mlp, max_position_embeddings=max(2048, args.T + 64),
                         bos_token_id=BOS_ID, eos_token_id=EOS_ID, pad_token_id=PAD_ID, tie_word_embeddings=False)
    cfg._attn_implementation = "eager"
    t0 = time.perf_counter()
    previous = torch.get_default_dtype()
    torch.set_default_dtype(torch.bfloat16)      # parameters are created in bf16: no float32 copy ever exists
    try:
        model = tf.LlamaForCausalLM(cfg).eval()
    finally:
        torch.set_default_dtype(previous)
    build_s = time.perf_counter() - t0
    weights = sum(p.numel() * p.element_size() for p in model.parameters())
    assert all(p.dtype == torch.bfloat16 for p in model.parameters())
    tok = build_tokenizer(model_max_length=args.T + 64)
    subject = attnpos.subject.from_model(model, tok, name="llama-1b-shape-bf16")
    after_build = _status_mb("VmRSS")
    rng = np.random.default_rng(0)
    # T − 1 random printable bytes: with the byte tokenizer's <bos>, exactly T random tokens
    text = "".join(map(chr, rng.integers(33, 127, args.T - 1)))
    t0 = time.perf_counter()
    if args.full:
        what = "attnpos.scan(subject, [text])"
        scan = attnpos.scan(subject, [text], progress=False)
    else:
        what = "attnpos.scan(subject, [text], n_boot=0, shift=False, induction=False, keep_maps=0)"
        scan = attnpos.scan(subject, [text], n_boot=0, shift=False, induction=False, keep_maps=0, progress=False)
    assert len(scan.tokens[0]) == args.T, len(scan.tokens[0])
    scan_s = time.perf_counter() - t0
    peak = _status_mb("VmHWM")
    report = {
        "shape": {"layers": args.layers, "hidden": args.hidden, "heads": args.heads, "kv_heads": args.kv_heads,
                  "mlp": args.mlp, "vocab": args.vocab},
        "T": args.T, "dtype": subject.dtype, "weights_gb": round(weights / 2**30, 3),
        "base_rss_gb": round((base or 0) / 1024, 3), "rss_after_build_gb": round((after_build or 0) / 1024, 3),
        "peak_rss_gb": round((peak or 0) / 1024, 3),
        "peak_minus_weights_gb": round(((peak or 0) / 1024) - weights / 2**30, 3),
        "target_extra_gb": TARGET_EXTRA_GB, "build_s": round(build_s, 1), "scan_s": round(scan_s, 1),
        "what_ran": what,
        "python": sys.version.split()[0], "torch": torch.__version__, "threads": args.threads,
    }
    report["meets_target"] = report["peak_minus_weights_gb"] <= TARGET_EXTRA_GB
    text = json.dumps(report, indent=1)
    print(text)
    if args.out:
        write_atomic(args.out, text + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
