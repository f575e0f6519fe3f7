"""The benchmark's real-shape part: random models with the shapes of real checkpoints, the texts users feed.

``bench/scan_bench.py`` imports this; its full run runs the grid (12 × 12, T = 512 … 4096) and then every shape
below. Each shape is a random-weight ``LlamaForCausalLM`` saved once as a safetensors folder with a word-level
tokenizer of the shape's vocabulary (cached in ``$ATTNPOS_BENCH_DIR`` or the system's temporary folder), so that
every case loads the same folder the way a user's checkpoint is loaded:

  smol-a   SmolLM2-135M shape: 30 layers, 9 query / 3 key-value heads, hidden 576, MLP 1536, vocabulary 49152,
           tied embeddings — 6 texts × 256 tokens (a few paragraphs)
  smol-b   the same model — 64 texts × 128 tokens (many short texts: per-text and per-layer overhead)
  1b       1B-class Llama shape: 22 layers, 32 / 4 heads, hidden 2048, MLP 5632, vocabulary 32000, bf16 weights —
           4 texts × 1024 tokens

(The SmolLM2 and 1B-class sizes are the published configs of SmolLM2-135M and TinyLlama-1.1B, from memory.)

Cases, each in a fresh child process, in rounds:

  load_tf  ``AutoModelForCausalLM.from_pretrained`` + ``AutoTokenizer.from_pretrained`` of the folder
  load     ``attnpos.load`` of the same folder (its checks included), with the weights-read cache in a folder of
           the bench's own (the first round fills it, so later first loads find the files already read)
  load_cold  the same with the cache off (``ATTNPOS_WEIGHTS_CACHE=0``): every load reads and hashes every byte
  A / A'   plain forward over the texts one at a time, eager / SDPA attention, no capture
  B        the hand-written path (``output_attentions=True`` + numpy statistics), for the agreement check
  C        ``attnpos.scan(..., shift=False, induction=False)``: capture, split with 100 resamples, roles
  C+       ``attnpos.scan(...)`` with its defaults: C plus the shift test and the induction test
  P        ``attnpos.probes.probe`` with its defaults
  P_cli    the same probe as the command line runs it (``attnpos probe FOLDER --text DIR``): the command owns the
           subject and frees its weights before the untrained copy is built (``release_model=True``)
  L        ``attnpos.length.length(..., to=2T, training_length=T)`` with its defaults

Load is excluded from every case's time but load_tf / load. C's child also times one ``record`` on its own with
the process's CPU time, for the thread-use figure (CPU time / wall during record).
"""

from __future__ import annotations

import hashlib
import json
import os
import resource
import tempfile
import time
from pathlib import Path

SHAPE_CASES = ("load_tf", "load", "load_cold", "A", "A_sdpa", "B", "C", "Cplus", "P", "P_cli", "L")
SHAPE_LABEL = {"load_tf": "load (transformers)", "load": "load (attnpos)", "load_cold": "load (attnpos, no cache)",
               "A": "A eager", "A_sdpa": "A' sdpa",
               "B": "B by hand", "C": "C scan", "Cplus": "C+ full scan", "P": "P probe", "P_cli": "P probe (command line)", "L": "L length"}

SMOL = dict(layers=30, heads=9, kv_heads=3, hidden=576, mlp=1536, vocab=49152, max_pos=8192, rope_theta=100000.0,
            tie=True, dtype="float32")
ONE_B = dict(layers=22, heads=32, kv_heads=4, hidden=2048, mlp=5632, vocab=32000, max_pos=2048, rope_theta=10000.0,
             tie=False, dtype="bfloat16")
SHAPES = {
    "smol-a": dict(model="smol", **SMOL, texts=6, T=256),
    "smol-b": dict(model="smol", **SMOL, texts=64, T=128),
    "1b": dict(model="1b", **ONE_B, texts=4, T=1024),
    # the smoke run's shape (bench --quick): grouped-query heads and the word tokenizer, tiny
    "mini": dict(model="mini", layers=2, heads=6, kv_heads=2, hidden=96, mlp=256, vocab=1000, max_pos=512,
                 rope_theta=10000.0, tie=True, dtype="float32", texts=3, T=64),
}
FULL_SHAPES = ("smol-a", "smol-b", "1b")
# the 1B shape's forward alone takes minutes on 2 cores: the probe and length cases are left out there by default
DEFAULT_CASES = {"smol-a": SHAPE_CASES, "smol-b": SHAPE_CASES, "mini": SHAPE_CASES,
                 "1b": ("load_tf", "load", "load_cold", "A", "A_sdpa", "C", "Cplus")}
# the targets on these shapes (for the benchmark, not for unit tests)
TARGETS = {
    "C/A <= 1.3 on smol-a": ("smol-a", "C/A", 1.3, "le"),
    "C+/A <= 2.0 on smol-a": ("smol-a", "C+/A", 2.0, "le"),
    "load/load_tf <= 1.0 on smol-a": ("smol-a", "load/load_tf", 1.0, "le"),
    "first load/load_tf <= 1.0 on smol-a": ("smol-a", "first load/load_tf", 1.0, "le"),
    "uncached first load/load_tf <= 1.0 on smol-a": ("smol-a", "cold first load/load_tf", 1.0, "le"),
    "C/A <= 1.2 on smol-b": ("smol-b", "C/A", 1.2, "le"),
    "P/A <= 3 on smol-a": ("smol-a", "P/A", 3.0, "le"),
    "P peak RSS <= 1.5x A's on smol-a": ("smol-a", "P_rss/A_rss", 1.5, "le"),
    "P (command line) peak RSS <= 1.5x A's on smol-a": ("smol-a", "P_cli_rss/A_rss", 1.5, "le"),
    "record CPU/wall >= 1.7 on smol-a": ("smol-a", "record_cpu/wall", 1.7, "ge"),
}


def _cpu_seconds() -> float:
    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime


def folder_for(shape: str, root: Path | None = None) -> Path:
    """The cached folder of a shape's model (built by :func:`ensure_folder`)."""
    spec = {k: v for k, v in SHAPES[shape].items() if k not in ("texts", "T")}
    tag = hashlib.sha1(json.dumps(spec, sort_keys=True).encode()).hexdigest()[:10]
    base = root or Path(os.environ.get("ATTNPOS_BENCH_DIR") or tempfile.gettempdir())
    return base / f"attnpos-bench-{spec['model']}-{tag}"


def _tokenizer(vocab: int, max_len: int):
    """A word-level tokenizer over ``vocab`` tokens ``w3 … w{vocab-1}`` plus ``<s>``, ``</s>``, ``<unk>``; it puts
    ``<s>`` first, as Llama-style tokenizers do."""
    from tokenizers import Tokenizer, models, pre_tokenizers, processors
    from transformers import PreTrainedTokenizerFast

    words = {"<s>": 0, "</s>": 1, "<unk>": 2, **{f"w{i}": i for i in range(3, vocab)}}
    tok = Tokenizer(models.WordLevel(vocab=words, unk_token="<unk>"))
    tok.pre_tokenizer = pre_tokenizers.WhitespaceSplit()
    tok.post_processor = processors.TemplateProcessing(single="<s> $A", special_tokens=[("<s>", 0)])
    return PreTrainedTokenizerFast(tokenizer_object=tok, bos_token="<s>", eos_token="</s>", unk_token="<unk>",
                                   model_max_length=max_len)


def ensure_folder(shape: str, root: Path | None = None, log=print) -> Path:
    """Build and save the shape's random model once (seed 0); later runs reuse the folder."""
    path = folder_for(shape, root)
    if (path / "config.json").is_file() and (path / "tokenizer.json").is_file():
        return path
    import torch
    import transformers as tf

    s = SHAPES[shape]
    log(f"building the random {shape} model once into {path} …")
    cfg = tf.LlamaConfig(vocab_size=s["vocab"], hidden_size=s["hidden"], num_hidden_layers=s["layers"],
                         num_attention_heads=s["heads"], num_key_value_heads=s["kv_heads"],
                         intermediate_size=s["mlp"], max_position_embeddings=s["max_pos"],
                         rope_theta=s["rope_theta"], bos_token_id=0, eos_token_id=1, tie_word_embeddings=s["tie"])
    dtype = getattr(torch, s["dtype"])
    torch.manual_seed(0)
    previous = torch.get_default_dtype()
    torch.set_default_dtype(dtype)           # parameters created in the shape's dtype: no float32 copy of a 1B model
    try:
        model = tf.LlamaForCausalLM(cfg).eval()
    finally:
        torch.set_default_dtype(previous)
    tmp = path.with_name(path.name + f".part{os.getpid()}")
    model.save_pretrained(tmp)
    _tokenizer(s["vocab"], s["max_pos"]).save_pretrained(tmp)
    os.replace(tmp, path)
    return path


def make_texts(shape: str, seed: int = 0) -> list[str]:
    """The shape's texts: T − 1 random words each, so with ``<s>`` exactly T tokens."""
    import numpy as np

    s = SHAPES[shape]
    rng = np.random.default_rng(seed)
    return [" ".join(f"w{i}" for i in rng.integers(3, s["vocab"], s["T"] - 1)) for _ in range(s["texts"])]


def run_shape_case(case: str, shape: str, folder: Path, args, forward_case, rss_mb, peak_rss_mb) -> dict:
    """One case of one shape in this (fresh) process."""
    import numpy as np
    import torch

    import attnpos

    if args.threads:
        torch.set_num_threads(args.threads)
    s = SHAPES[shape]
    texts = make_texts(shape)
    dtype = getattr(torch, s["dtype"])
    extra: dict = {}

    if case in ("load", "load_cold", "load_tf"):
        from transformers import AutoModelForCausalLM, AutoTokenizer

        if case == "load_cold":
            os.environ["ATTNPOS_WEIGHTS_CACHE"] = "0"
        elif case == "load":
            os.environ["ATTNPOS_CACHE_DIR"] = str(folder) + ".cache"
        hits = []

        def once():
            if case in ("load", "load_cold"):
                from attnpos.subject import READ_CACHE, weight_files

                hits.append(READ_CACHE.get(weight_files(folder)) is not None)
                return attnpos.load(folder, dtype=s["dtype"])
            m = AutoModelForCausalLM.from_pretrained(folder, dtype=dtype, attn_implementation="eager")
            return m.eval(), AutoTokenizer.from_pretrained(folder)

        # the first load in a fresh process also imports the modelling code (what a user waits for once);
        # the loads after it are what a notebook that loads again waits for: both are kept
        t0 = time.perf_counter()
        once()
        first = time.perf_counter() - t0
        base = rss_mb()
        runs = []
        for _ in range(max(args.repeat, 2)):
            t0 = time.perf_counter()
            once()
            runs.append(time.perf_counter() - t0)
        return {"status": "ok", "seconds": min(runs), "runs": runs, "first_seconds": first, "base_rss_mb": base,
                "peak_rss_mb": peak_rss_mb(), "torch_threads": torch.get_num_threads(),
                **({"first_from_cache": hits[0], "later_from_cache": hits[1:]} if hits else {})}

    if case == "P_cli":
        # the command loads the model itself (its load is in the time, unlike P's) and owns it; no other copy of the
        # model lives in this process
        from attnpos.cli import main as cli_main

        text_dir = Path(tempfile.mkdtemp(prefix="attnpos-bench-texts-"))
        for i, t in enumerate(texts):
            (text_dir / f"t{i}.txt").write_text(t, encoding="utf-8")

        def once():
            code = cli_main(["probe", str(folder), "--text", str(text_dir), "--json", str(text_dir / "probe.json")])
            assert code == 0, code

        def warm():
            pass
    elif case in ("A", "A_sdpa", "B"):
        from transformers import AutoModelForCausalLM, AutoTokenizer

        model = AutoModelForCausalLM.from_pretrained(folder, dtype=dtype,
                                                     attn_implementation="sdpa" if case == "A_sdpa" else "eager").eval()
        tok = AutoTokenizer.from_pretrained(folder)
        ids = [torch.tensor([tok(t)["input_ids"]]) for t in texts]
        assert all(x.shape[1] == s["T"] for x in ids), [x.shape for x in ids]
        once, warm = forward_case(case, model, ids, s["T"])
    else:
        subject = attnpos.load(folder, dtype=s["dtype"])
        warm_texts = [" ".join(f"w{i}" for i in range(3, 66))]
        if case == "C":
            def once():
                return attnpos.scan(subject, texts, n_boot=args.boot, shift=False, induction=False, progress=False)
        elif case == "Cplus":
            def once():
                return attnpos.scan(subject, texts, progress=False)
        elif case == "P":
            from attnpos.probes import probe

            def once():
                return probe(subject, texts, progress=False)
        elif case == "L":
            from attnpos.length import length

            def once():
                return length(subject, texts, to=2 * s["T"], training_length=s["T"], progress=False)
        else:
            raise ValueError(case)

        def warm():
            attnpos.scan(subject, warm_texts, n_boot=2, shift=False, induction=False, progress=False)

    warm()
    base = rss_mb()
    runs, cpu = [], []
    result = None
    for _ in range(args.repeat):
        c0, t0 = _cpu_seconds(), time.perf_counter()
        result = once()
        runs.append(time.perf_counter() - t0)
        cpu.append(_cpu_seconds() - c0)
    extra["cpu_per_wall"] = cpu[int(np.argmin(runs))] / min(runs)
    if case == "C":
        from attnpos.capture import record
        from attnpos.reducers import SplitStats, WeightStats
        from attnpos.texts import as_raw, prepare

        units = prepare(subject, as_raw(texts))
        c0, t0 = _cpu_seconds(), time.perf_counter()
        record(subject, units=units, reducers=[WeightStats(), SplitStats()], progress=False)
        wall = time.perf_counter() - t0
        extra["record_seconds"] = wall
        extra["record_cpu_per_wall"] = (_cpu_seconds() - c0) / wall
        heads = result.heads
        L, H = s["layers"], s["heads"]
        extra["stats"] = {k: heads[f"mass_{k}"].to_numpy().reshape(L, H).tolist()
                          for k in ("previous", "next", "first", "self")}
        extra["stats"]["entropy_ratio"] = heads["entropy_ratio"].to_numpy().reshape(L, H).tolist()
    if case == "B":
        extra["stats"] = {k: np.asarray(result[k]).tolist()
                          for k in ("previous", "next", "first", "self", "entropy_ratio")}
    return {"status": "ok", "seconds": min(runs), "runs": runs, "base_rss_mb": base, "peak_rss_mb": peak_rss_mb(),
            "torch_threads": torch.get_num_threads(), **extra}


def shape_ratios(cases: dict, agreement) -> dict:
    """Every ratio the issue names, from one shape's combined cases (None where a case did not run)."""
    def sec(k):
        e = cases.get(k) or {}
        return e.get("seconds") if e.get("status") == "ok" else None

    def rss(k):
        e = cases.get(k) or {}
        return e.get("peak_rss_mb") if e.get("status") == "ok" else None

    def first(k):
        e = cases.get(k) or {}
        return e.get("first_seconds") if e.get("status") == "ok" else None

    def r(a, b):
        return None if a is None or b is None or not b else a / b

    a = sec("A")
    c = cases.get("C") or {}
    return {"C/A": r(sec("C"), a), "C/A'": r(sec("C"), sec("A_sdpa")), "C+/A": r(sec("Cplus"), a),
            "C+/A'": r(sec("Cplus"), sec("A_sdpa")), "P/A": r(sec("P"), a), "L/A": r(sec("L"), a),
            "B/C": r(sec("B"), sec("C")), "record/A": r(c.get("record_seconds"), a),
            "load/load_tf": r(sec("load"), sec("load_tf")),
            "first load/load_tf": r(first("load"), first("load_tf")),
            "cold load/load_tf": r(sec("load_cold"), sec("load_tf")),
            "cold first load/load_tf": r(first("load_cold"), first("load_tf")), "P_rss/A_rss": r(rss("P"), rss("A")),
            "C_rss/A_rss": r(rss("C"), rss("A")), "P_cli_rss/A_rss": r(rss("P_cli"), rss("A")),
            "record_cpu/wall": c.get("record_cpu_per_wall") if c.get("status") == "ok" else None,
            # the plain forward's own thread use: the floor the record's is compared with
            "A_cpu/wall": (cases.get("A") or {}).get("cpu_per_wall") if sec("A") is not None else None,
            "agreement_B_vs_C": agreement(cases.get("B") or {}, c)}


def shape_targets(shape_results: list[dict]) -> dict:
    by = {r["shape"]: r for r in shape_results}
    out = {}
    for name, (shape, key, bound, how) in TARGETS.items():
        v = by.get(shape, {}).get("ratios", {}).get(key)
        out[name] = None if v is None else (v <= bound if how == "le" else v >= bound)
    return out


def shape_table(shape_results: list[dict]) -> str:
    cols = ("shape", "texts×T", "A s", "A' s", "C s", "C+ s", "P s", "L s", "load s", "load_tf s",
            "C/A", "C/A'", "C+/A", "P/A", "L/A", "load ratio", "1st load", "1st cold", "rec cpu/wall", "A cpu/wall", "A MB", "C MB", "P MB")

    def f(x, nd=2):
        return "—" if x is None else f"{x:.{nd}f}"

    rows = [cols]
    for r in shape_results:
        e, q = r["cases"], r["ratios"]

        def sec(k):
            x = e.get(k) or {}
            return f(x.get("seconds")) if x.get("status") == "ok" else (x.get("status") or "—")

        def mb(k):
            x = e.get(k) or {}
            return f(x.get("peak_rss_mb"), 0) if x.get("status") == "ok" else (x.get("status") or "—")

        s = SHAPES[r["shape"]]
        rows.append((r["shape"], f"{s['texts']}×{s['T']}", sec("A"), sec("A_sdpa"), sec("C"), sec("Cplus"), sec("P"),
                     sec("L"), sec("load"), sec("load_tf"), f(q["C/A"]), f(q["C/A'"]), f(q["C+/A"]), f(q["P/A"]),
                     f(q["L/A"]), f(q["load/load_tf"]), f(q["first load/load_tf"]), f(q.get("cold first load/load_tf")), f(q["record_cpu/wall"]), f(q.get("A_cpu/wall")), mb("A"), mb("C"), mb("P")))
    widths = [max(len(row[k]) for row in rows) for k in range(len(cols))]
    lines = ["  ".join(c.rjust(w) for c, w in zip(row, widths)) for row in rows]
    lines.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(lines)
