"""Benchmark: a full attnpos scan next to the plain forward pass and next to the hand-written path.

Measures, in one run and side by side, on a random-weight Llama-architecture model (12 layers, 12 heads, hidden
size 384, built from a config: nothing is downloaded) and texts of T random tokens:

  A   plain forward, eager attention, no capture — the floor (its QKᵀ has to be formed anyway)
  A'  the same forward with SDPA attention (for information: C/A' is printed, not targeted)
  B   the hand-written path: every layer's maps via ``output_attentions=True``, then per-head numpy statistics
      (masses previous/next/first/self, entropy, anchor slot, mean weight and mean log-weight per distance, slope
      by weighted least squares)
  C   ``attnpos.scan`` (capture + split + roles); the shift test and the induction test are timed separately

Every case runs in its own child process so each peak RSS (VmHWM) is its own. The cases run in rounds (A, A', B,
C, then again), so a change of load on a shared machine hits them alike; times are the best over rounds, each after
a short warm-up. The figures go to a JSON file and a table on the terminal.

    python bench/scan_bench.py                 # full run: T = 512 … 4096 (about 10 min on 2 idle cores)
    python bench/scan_bench.py --quick         # CI smoke run: small T, 2 layers, under 2 minutes
    python bench/scan_bench.py --shapes smol-a # one real shape only (see bench/real_shapes.py)

The full run then measures the shapes of real checkpoints (bench/real_shapes.py): a SmolLM2-135M-shaped model on
6 × 256 and 64 × 128 tokens and a 1B-class bf16 model on 4 × 1024, with the load, the probe and `length` as well.

See bench/README.md for what is measured and how to read it.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
import real_shapes  # noqa: E402  (the real-shape cases, beside this file)

os.environ.setdefault("HF_HUB_OFFLINE", "1")
os.environ.setdefault("TRANSFORMERS_OFFLINE", "1")
os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")
# attnpos sets this when imported; the children import torch first, so it is set here for every case alike
# (otherwise A would spin-wait between parallel regions and C would not, and the two would not be comparable)
os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

SCHEMA = "attnpos.bench/1"
HERE = Path(__file__).resolve().parent
CASES = ("A", "A_sdpa", "B", "C")
LABEL = {"A": "A eager", "A_sdpa": "A' sdpa", "B": "B by hand", "C": "C attnpos"}
# the targets (for the benchmark, not for unit tests)
TARGET_T = 2048
TARGET_C_OVER_A = 1.5
TARGET_B_OVER_C = 5.0
TARGET_RSS_T = 4096
TARGET_RSS_GB = 3.0


# ------------------------------------------------------------------------------------------------ shared set-up

def _proc_status_kb(field: str) -> float | None:
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith(field + ":"):
                return float(line.split()[1])
    except OSError:
        pass
    return None


def peak_rss_mb() -> float:
    """Peak resident set size of this process (VmHWM; ru_maxrss where /proc is missing)."""
    kb = _proc_status_kb("VmHWM")
    if kb is None:
        import resource

        kb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        if sys.platform == "darwin":
            kb /= 1024
    return kb / 1024


def rss_mb() -> float | None:
    kb = _proc_status_kb("VmRSS")
    return None if kb is None else kb / 1024


def build_model(layers: int, heads: int, hidden: int, max_len: int, attn: str, seed: int = 0):
    """Random-weight LlamaForCausalLM over the byte vocabulary of attnpos's reference tokenizer."""
    import torch
    import transformers as tf

    from attnpos.reference.tokenizer import BOS_ID, EOS_ID, PAD_ID, VOCAB_SIZE

    torch.manual_seed(seed)
    cfg = tf.LlamaConfig(vocab_size=VOCAB_SIZE, hidden_size=hidden, num_hidden_layers=layers,
                         num_attention_heads=heads, num_key_value_heads=heads, intermediate_size=4 * hidden,
                         max_position_embeddings=max_len, bos_token_id=BOS_ID, eos_token_id=EOS_ID,
                         pad_token_id=PAD_ID, tie_word_embeddings=False)
    cfg._attn_implementation = attn
    return tf.LlamaForCausalLM(cfg).eval()


def make_texts(n: int, T: int, seed: int = 0) -> list[str]:
    """n strings of T − 1 random printable bytes: with the byte tokenizer and its BOS, exactly T random tokens."""
    import numpy as np

    rng = np.random.default_rng(seed)
    return ["".join(map(chr, rng.integers(33, 127, T - 1))) for _ in range(n)]


# ------------------------------------------------------------------------------------------------ case B

def hand_written_stats(attentions, T: int):
    """What a competent user writes by hand from ``output_attentions``: per layer, numpy vectorised over heads.

    Queries are the ordinary tokens (position 0 is BOS, as in the scan). Returns per-layer arrays over heads.
    """
    import numpy as np

    i = np.arange(T)
    delta = i[:, None] - i[None, :]                  # (T, T) query − key
    causal = delta >= 0
    dflat = delta[causal]
    counts = np.bincount(dflat, minlength=T).astype(np.float64)
    far = causal & (delta >= 2)
    far[0] = False
    far_n = far.sum(0)
    n_keys = causal.sum(1)
    qe = (n_keys >= 4) & (i > 0)
    out = {k: [] for k in ("previous", "next", "first", "self", "entropy_ratio", "anchor_slot", "anchor_weight",
                           "near_mean", "profile", "slope")}
    dist = np.arange(T, dtype=np.float64)
    for att in attentions:
        w = att[0].float().numpy()                   # (H, T, T)
        H = w.shape[0]
        out["previous"].append(w[:, i[1:], i[1:] - 1].mean(-1))
        out["next"].append(w[:, i[1:-1], i[1:-1] + 1].mean(-1))
        out["self"].append(w[:, i[1:], i[1:]].mean(-1))
        out["first"].append(w[:, 1:, 0].mean(-1))
        with np.errstate(divide="ignore", invalid="ignore"):
            logw = np.log(w)                          # -inf where the weight is 0 (the masked future)
            ent = -np.where(w > 0, w * logw, 0.0).sum(-1)
        out["entropy_ratio"].append((ent[:, qe] / np.log(n_keys[qe])).mean(-1))
        slot_mean = np.where(far_n >= 8, (w * far).sum(1) / np.maximum(far_n, 1), -np.inf)
        out["anchor_slot"].append(slot_mean.argmax(-1))
        out["anchor_weight"].append(slot_mean.max(-1))
        wc = w[:, causal]                             # (H, pairs)
        lc = np.maximum(logw[:, causal], np.log(1e-30))
        mean_w = np.stack([np.bincount(dflat, weights=wc[h], minlength=T) for h in range(H)]) / counts
        prof = np.stack([np.bincount(dflat, weights=lc[h], minlength=T) for h in range(H)]) / counts
        out["near_mean"].append(mean_w[:, :33])
        out["profile"].append(prof)
        # slope: weighted least squares of the log-weight profile on δ (weights = pairs per δ), positive = decay
        sw = np.sqrt(counts)
        coef = np.polyfit(dist, prof.T, 1, w=sw)
        out["slope"].append(-coef[0])
        del w, logw, ent, wc, lc
    return {k: np.stack(v) for k, v in out.items()}


# ------------------------------------------------------------------------------------------------ a child

def forward_case(case: str, model, ids, T: int):
    """The timed call and the warm-up of cases A / A' (the plain forward over the texts one at a time) and B (the
    same with ``output_attentions`` and the hand-written statistics, averaged over texts) — for the grid and for
    the real shapes alike."""
    import numpy as np
    import torch

    if case == "B":
        def once():
            per_text = []
            with torch.no_grad():
                for x in ids:
                    out = model(input_ids=x, use_cache=False, output_attentions=True)
                    per_text.append(hand_written_stats([a.float() for a in out.attentions], T))  # bf16 → float32
                    del out
            # texts have equal length, so the mean over texts equals the scan's pooled mean over queries
            return {k: np.mean([r[k] for r in per_text], axis=0) for k in per_text[0]}
    else:
        def once():
            with torch.no_grad():
                for x in ids:
                    model(input_ids=x, use_cache=False)

    def warm():
        with torch.no_grad():
            model(input_ids=ids[0][:, :64], use_cache=False)

    return once, warm


def run_case(case: str, T: int, args) -> dict:
    import numpy as np
    import torch

    import attnpos
    from attnpos.reference.tokenizer import build_tokenizer

    torch.set_num_threads(args.threads or torch.get_num_threads())
    max_len = max(T, 128) + 64
    model = build_model(args.layers, args.heads, args.hidden, max_len, "sdpa" if case == "A_sdpa" else "eager")
    tok = build_tokenizer(model_max_length=max_len)
    subject = attnpos.subject.from_model(model, tok, name=f"llama-{args.layers}x{args.heads}x{args.hidden}")
    texts = make_texts(args.texts, T)
    units = attnpos.texts.prepare(subject, attnpos.texts.as_raw(texts))
    assert all(len(u) == T for u in units), [len(u) for u in units]
    ids = [torch.tensor([u.ids]) for u in units]
    warm_texts = make_texts(1, 64, seed=1)
    extra: dict = {}

    if case in ("A", "A_sdpa", "B"):
        once, warm = forward_case(case, model, ids, T)
    else:
        def once():
            return attnpos.scan(subject, texts, n_boot=args.boot, shift=False, induction=False, progress=False)

        def warm():
            attnpos.scan(subject, warm_texts, n_boot=2, shift=False, induction=False, progress=False)

    warm()
    base = rss_mb()
    runs = []
    result = None
    for _ in range(args.repeat):
        t0 = time.perf_counter()
        result = once()
        runs.append(time.perf_counter() - t0)
    if case == "C":
        # the two interventions, each timed on its own (the shift test reruns the forward on a prefix)
        t0 = time.perf_counter()
        attnpos.ShiftTest().run(subject, units)
        extra["shift_seconds"] = time.perf_counter() - t0
        from attnpos.induction import induction_scores

        t0 = time.perf_counter()
        induction_scores(subject)
        extra["induction_seconds"] = time.perf_counter() - t0
        heads = result.heads
        extra["stats"] = {k: heads[f"mass_{k}"].to_numpy().reshape(args.layers, args.heads).tolist()
                          for k in ("previous", "next", "first", "self")}
        extra["stats"]["entropy_ratio"] = heads["entropy_ratio"].to_numpy().reshape(args.layers, args.heads).tolist()
    if case == "B":
        extra["stats"] = {k: np.asarray(result[k]).tolist()
                          for k in ("previous", "next", "first", "self", "entropy_ratio")}
    return {"status": "ok", "seconds": min(runs), "runs": runs, "base_rss_mb": base, "peak_rss_mb": peak_rss_mb(),
            "torch_threads": torch.get_num_threads(), **extra}


def profile_scan(T: int | str, args) -> int:
    """Case C once, in this process, under pyinstrument (``pip install pyinstrument``): where a scan's time goes."""
    try:
        from pyinstrument import Profiler
    except ImportError:
        print("--profile needs pyinstrument: pip install pyinstrument", file=sys.stderr)
        return 2
    import torch

    import attnpos
    from attnpos.reference.tokenizer import build_tokenizer

    full = args.profile_full
    if isinstance(T, str):            # a real shape: its saved folder, loaded as a user would
        s = real_shapes.SHAPES[T]
        subject = attnpos.load(real_shapes.ensure_folder(T), dtype=s["dtype"])
        texts = real_shapes.make_texts(T)
        what = (f"{T}: llama {s['layers']} layers x {s['heads']}/{s['kv_heads']} heads x {s['hidden']}, "
                f"{s['texts']} texts of T={s['T']}")
        warm = [" ".join(f"w{i}" for i in range(3, 66))]
    else:
        max_len = max(T, 128) + 64
        model = build_model(args.layers, args.heads, args.hidden, max_len, "eager")
        subject = attnpos.subject.from_model(model, build_tokenizer(model_max_length=max_len), name="bench")
        texts = make_texts(args.texts, T)
        what = f"llama {args.layers}x{args.heads}x{args.hidden}, {args.texts} texts of T={T}"
        warm = make_texts(1, 64, seed=1)
    attnpos.scan(subject, warm, n_boot=2, shift=False, induction=False, progress=False)
    profiler = Profiler(interval=0.005)
    profiler.start()
    attnpos.scan(subject, texts, n_boot=args.boot, shift=full, induction=full, progress=False)
    profiler.stop()
    print(f"attnpos.scan{' (defaults: shift and induction tests on)' if full else ' (no shift/induction test)'}, "
          f"{what}, n_boot {args.boot}, {torch.get_num_threads()} torch threads")
    print(profiler.output_text(unicode=True, color=False))
    return 0


def child_main(args) -> None:
    try:
        if args.shape:
            res = real_shapes.run_shape_case(args.child, args.shape, Path(args.folder), args, forward_case,
                                             rss_mb, peak_rss_mb)
        else:
            res = run_case(args.child, args.T, args)
    except MemoryError as exc:
        res = {"status": "failed", "reason": f"out of memory ({exc})", "peak_rss_mb": peak_rss_mb()}
    except RuntimeError as exc:
        msg = str(exc)
        oom = "memory" in msg.lower() or "alloc" in msg.lower()
        res = {"status": "failed", "reason": ("out of memory: " if oom else "error: ") + msg[:300],
               "peak_rss_mb": peak_rss_mb()}
    print("BENCH-RESULT " + json.dumps(res), flush=True)


# ------------------------------------------------------------------------------------------------ the parent

def mem_available_gb() -> float | None:
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemAvailable:"):
                return float(line.split()[1]) / 2**20
    except OSError:
        pass
    return None


def spawn(case: str, T: int, args, shape: str | None = None, folder: Path | None = None) -> dict:
    cmd = [sys.executable, str(Path(__file__).resolve()), "--child", case, "--T", str(T),
           "--layers", str(args.layers), "--heads", str(args.heads), "--hidden", str(args.hidden),
           "--texts", str(args.texts), "--boot", str(args.boot), "--repeat", str(args.repeat),
           "--threads", str(args.threads)]
    if shape:
        cmd += ["--shape", shape, "--folder", str(folder)]
    t0 = time.perf_counter()
    try:
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=args.timeout)
    except subprocess.TimeoutExpired:
        return {"status": "failed", "reason": f"timed out after {args.timeout} s"}
    wall = time.perf_counter() - t0
    for line in reversed(proc.stdout.splitlines()):
        if line.startswith("BENCH-RESULT "):
            res = json.loads(line[len("BENCH-RESULT "):])
            res["child_wall_seconds"] = wall
            return res
    if proc.returncode < 0:
        sig = -proc.returncode
        why = "killed by SIGKILL — most likely out of memory" if sig == 9 else f"killed by signal {sig}"
        return {"status": "failed", "reason": why}
    tail = (proc.stderr or "").strip().splitlines()[-6:]
    return {"status": "failed", "reason": f"exit code {proc.returncode}: " + " | ".join(tail)[-600:]}


def combine(runs: list[dict]) -> dict:
    """One entry per case: the best time over rounds (and over runs within a round), the highest peak RSS."""
    bad = [r for r in runs if r["status"] != "ok"]
    if bad:
        return {**bad[0], "rounds": len(runs)}
    best = min(runs, key=lambda r: r["seconds"])
    out = dict(best)
    out["runs"] = [t for r in runs for t in r["runs"]]
    out["peak_rss_mb"] = max(r["peak_rss_mb"] for r in runs)
    out["base_rss_mb"] = min(r["base_rss_mb"] for r in runs if r.get("base_rss_mb") is not None) \
        if any(r.get("base_rss_mb") is not None for r in runs) else None
    for k in ("shift_seconds", "induction_seconds", "record_seconds", "first_seconds"):
        if k in best:
            out[k] = min(r[k] for r in runs)
    if any("first_from_cache" in r for r in runs):
        out["first_from_cache_rounds"] = [r.get("first_from_cache") for r in runs]
    out["rounds"] = len(runs)
    return out


def b_maps_gb(T: int, args) -> float:
    return args.layers * args.heads * T * T * 4 / 2**30


def ratio(a, b):
    if a is None or b is None or not b:
        return None
    return a / b


def secs(entry: dict | None):
    return entry.get("seconds") if entry and entry.get("status") == "ok" else None


def agreement(b: dict, c: dict) -> float | None:
    """Largest |B − C| over the per-head statistics both report (masses, entropy ratio): a check that B computes
    the same quantities as the scan."""
    import numpy as np

    if not (b.get("stats") and c.get("stats")):
        return None
    diffs = []
    for k in c["stats"]:
        cb, cc = np.asarray(b["stats"][k], dtype=float), np.asarray(c["stats"][k], dtype=float)
        both = np.isfinite(cb) & np.isfinite(cc)     # the scan reports no next-token mass in a causal model (NaN)
        if both.any():
            diffs.append(float(np.abs(cb - cc)[both].max()))
    return max(diffs) if diffs else None


def fmt(x, nd=2, unit=""):
    return "—" if x is None else f"{x:.{nd}f}{unit}"


def table(results: list[dict]) -> str:
    head = ("T", "A s", "A' s", "B s", "C s", "shift s", "C/A", "C/A'", "B/C", "(C+sh)/2A",
            "A MB", "B MB", "C MB")
    rows = [head]
    for r in results:
        e = r["cases"]
        rat = r["ratios"]

        def cell(case):
            x = e.get(case, {})
            if x.get("status") == "ok":
                return fmt(x["seconds"])
            return x.get("status", "—")

        def mb(case):
            x = e.get(case, {})
            return fmt(x.get("peak_rss_mb"), 0) if x.get("status") == "ok" else x.get("status", "—")

        rows.append((str(r["T"]), cell("A"), cell("A_sdpa"), cell("B"), cell("C"),
                     fmt(e.get("C", {}).get("shift_seconds")), fmt(rat["C/A"]), fmt(rat["C/A'"]),
                     fmt(rat["B/C"], 1), fmt(rat["(C+shift)/(2A)"]), mb("A"), mb("B"), mb("C")))
    widths = [max(len(row[k]) for row in rows) for k in range(len(head))]
    lines = ["  ".join(c.rjust(w) for c, w in zip(row, widths)) for row in rows]
    lines.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(lines)


def versions() -> dict:
    import numpy
    import torch
    import transformers

    import attnpos

    return {"attnpos": attnpos.__version__, "torch": torch.__version__, "transformers": transformers.__version__,
            "numpy": numpy.__version__, "python": platform.python_version()}


def git_head() -> str | None:
    try:
        return subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=HERE, capture_output=True, text=True,
                              timeout=10).stdout.strip() or None
    except (OSError, subprocess.SubprocessError):
        return None


def targets(results: list[dict], quick: bool) -> dict:
    by_t = {r["T"]: r for r in results}
    out = {}
    r = by_t.get(TARGET_T)
    out[f"C/A <= {TARGET_C_OVER_A} at T={TARGET_T}"] = None if r is None or r["ratios"]["C/A"] is None \
        else r["ratios"]["C/A"] <= TARGET_C_OVER_A
    out[f"B/C >= {TARGET_B_OVER_C} at T={TARGET_T}"] = None if r is None or r["ratios"]["B/C"] is None \
        else r["ratios"]["B/C"] >= TARGET_B_OVER_C
    r = by_t.get(TARGET_RSS_T)
    c = r["cases"].get("C", {}) if r else {}
    out[f"T={TARGET_RSS_T} completes with C peak RSS <= {TARGET_RSS_GB} GB"] = None if not c \
        else (c.get("status") == "ok" and c["peak_rss_mb"] / 1024 <= TARGET_RSS_GB)
    return out


def run_shape(shape: str, args) -> dict:
    """Every case of one real shape, in rounds, each case in a fresh process; ratios from the combined cases."""
    folder = real_shapes.ensure_folder(shape, log=lambda m: print("  " + m, flush=True))
    wanted = args.shape_cases or real_shapes.DEFAULT_CASES[shape]
    rounds = 1 if shape == "1b" and not args.shape_rounds else (args.shape_rounds or args.rounds)
    runs: dict = {}
    for rnd in range(rounds):
        for case in wanted:
            res = spawn(case, real_shapes.SHAPES[shape]["T"], args, shape=shape, folder=folder)
            runs.setdefault(case, []).append(res)
            if res["status"] == "ok":
                more = (f"  record {res['record_seconds']:.2f} s, CPU/wall {res['record_cpu_per_wall']:.2f}"
                        if "record_seconds" in res else "")
                print(f"  {shape:6s} {real_shapes.SHAPE_LABEL[case]:20s} {res['seconds']:8.2f} s   peak RSS "
                      f"{res['peak_rss_mb']:7.0f} MB{more}   (round {rnd + 1}, load {os.getloadavg()[0]:.1f})",
                      flush=True)
            else:
                print(f"  {shape:6s} {real_shapes.SHAPE_LABEL[case]:20s} {res['status']}: {res.get('reason')}",
                      flush=True)
    cases = {k: combine(v) for k, v in runs.items()}
    return {"shape": shape, "spec": real_shapes.SHAPES[shape], "rounds": rounds, "cases": cases,
            "ratios": real_shapes.shape_ratios(cases, agreement)}


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--quick", action="store_true", help="CI smoke run: T=128,256, 2 layers, 1 round, 20 resamples")
    p.add_argument("--lengths", type=int, nargs="+", help="text lengths T (default 512 1024 2048 4096)")
    p.add_argument("--layers", type=int, help="layers (default 12)")
    p.add_argument("--heads", type=int, default=12)
    p.add_argument("--hidden", type=int, default=384)
    p.add_argument("--texts", type=int, default=2, help="texts per length (≥ 2 so the bootstrap runs)")
    p.add_argument("--boot", type=int, help="bootstrap resamples of the split (default 100, the scan's default)")
    p.add_argument("--rounds", type=int, help="rounds over all cases, each case in a fresh process per round; the "
                                              "best time is kept (default 2)")
    p.add_argument("--repeat", type=int, default=1, help="timed runs per case within one process (default 1)")
    p.add_argument("--threads", type=int, default=0, help="torch threads in each child (0: torch's default)")
    p.add_argument("--cases", nargs="+", choices=CASES, default=list(CASES), help="cases of the grid")
    p.add_argument("--shapes", nargs="*", choices=list(real_shapes.SHAPES),
                   help="real shapes to run after the grid (default: all in the full run, none with --lengths; "
                        "--shapes alone, with no names: none)")
    p.add_argument("--shape-cases", nargs="+", choices=real_shapes.SHAPE_CASES,
                   help="cases of the real shapes (default: all; the 1b shape leaves out P and L)")
    p.add_argument("--no-grid", action="store_true", help="run only the real shapes")
    p.add_argument("--shape-rounds", type=int, help="rounds for the real shapes (default: --rounds; 1 for 1b)")
    p.add_argument("--b-max-gb", type=float, default=6.0,
                   help="skip B where its all-layer maps would need more than this (default 6 GB)")
    p.add_argument("--timeout", type=int, default=3600, help="seconds before a case is abandoned")
    p.add_argument("--out", type=Path, help="JSON output (default bench/results.json, quick: bench/results-quick.json)")
    p.add_argument("--profile", metavar="T|SHAPE",
                   help="instead of the benchmark: profile one attnpos scan (case C) with pyinstrument, on the grid "
                        "model at length T or on a real shape (e.g. smol-a)")
    p.add_argument("--profile-full", action="store_true", help="with --profile: the default scan (case C+)")
    p.add_argument("--child", choices=CASES + real_shapes.SHAPE_CASES, help=argparse.SUPPRESS)
    p.add_argument("--T", type=int, help=argparse.SUPPRESS)
    p.add_argument("--shape", help=argparse.SUPPRESS)
    p.add_argument("--folder", help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    explicit_lengths = args.lengths is not None
    if args.quick:
        args.lengths = args.lengths or [128, 256]
        args.layers = args.layers or 2
        args.boot = 20 if args.boot is None else args.boot
        args.rounds = args.rounds or 1
    args.lengths = args.lengths or [512, 1024, 2048, 4096]
    args.layers = args.layers or 12
    args.boot = 100 if args.boot is None else args.boot
    args.rounds = args.rounds or 2
    if args.child:
        child_main(args)
        return 0
    if args.profile:
        return profile_scan(int(args.profile) if args.profile.isdigit() else args.profile, args)
    if args.shapes is None:
        args.shapes = ["mini"] if args.quick else ([] if explicit_lengths else list(real_shapes.FULL_SHAPES))
    out_path = args.out or HERE / ("results-quick.json" if args.quick else "results.json")

    import torch

    cores = os.cpu_count()
    print(f"attnpos scan benchmark: llama {args.layers} layers × {args.heads} heads, hidden {args.hidden}; "
          f"{args.texts} texts per T; n_boot {args.boot}; best of {args.rounds} rounds; {cores} cores; "
          f"load average {os.getloadavg()[0]:.2f}", flush=True)
    load_before = os.getloadavg()
    results = []
    for T in ([] if args.no_grid else args.lengths):
        cases: dict = {}
        skip: dict = {}
        if "B" in args.cases:
            need = b_maps_gb(T, args)
            avail = mem_available_gb()
            if need > args.b_max_gb or (avail is not None and need > 0.6 * avail):
                skip["B"] = {"status": "skipped",
                             "reason": f"out of memory budget: the all-layer maps alone need {need:.1f} GB "
                                       f"(--b-max-gb {args.b_max_gb}, {fmt(avail, 1)} GB available)"}
                print(f"  T={T:5d} {LABEL['B']:10s} skipped ({skip['B']['reason']})", flush=True)
        # rounds: every case once per round, so load changes on a shared machine hit all cases alike
        for rnd in range(args.rounds):
            for case in args.cases:
                if case in skip:
                    continue
                res = spawn(case, T, args)
                cases.setdefault(case, []).append(res)
                if res["status"] == "ok":
                    more = f"  shift {res['shift_seconds']:.2f} s" if "shift_seconds" in res else ""
                    print(f"  T={T:5d} {LABEL[case]:10s} {res['seconds']:8.2f} s   peak RSS "
                          f"{res['peak_rss_mb']:7.0f} MB{more}   (round {rnd + 1}, load {os.getloadavg()[0]:.1f})",
                          flush=True)
                else:
                    print(f"  T={T:5d} {LABEL[case]:10s} {res['status']}: {res.get('reason')}", flush=True)
        cases = {k: combine(v) for k, v in cases.items()}
        cases.update(skip)
        a, a2, b, c = (secs(cases.get(k)) for k in ("A", "A_sdpa", "B", "C"))
        shift = cases.get("C", {}).get("shift_seconds")
        ratios = {"C/A": ratio(c, a), "C/A'": ratio(c, a2), "B/C": ratio(b, c),
                  "(C+shift)/(2A)": ratio(None if c is None or shift is None else c + shift,
                                          None if a is None else 2 * a),
                  "B/A": ratio(b, a)}
        results.append({"T": T, "cases": cases, "ratios": ratios,
                        "agreement_B_vs_C": agreement(cases.get("B", {}), cases.get("C", {}))})
    shape_results = [run_shape(shape, args) for shape in args.shapes]
    for r in results + shape_results:      # per-head statistics are large; the JSON keeps only their agreement
        for e in r["cases"].values():
            e.pop("stats", None)
    report = {
        "schema": SCHEMA,
        "command": " ".join([Path(sys.executable).name, "bench/scan_bench.py"] + (argv or sys.argv[1:])),
        "when": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        "git": git_head(),
        "machine": {"cores": cores, "torch_threads_default": torch.get_num_threads(), "platform": platform.platform(),
                    "thread_env": {k: os.environ[k] for k in ("OMP_NUM_THREADS", "OMP_WAIT_POLICY", "MKL_NUM_THREADS",
                                                              "OPENBLAS_NUM_THREADS") if k in os.environ},
                    "processor": platform.processor() or platform.machine(), "load_before": load_before,
                    "load_after": os.getloadavg(), "mem_available_gb": mem_available_gb()},
        "versions": versions(),
        "model": {"architecture": "LlamaForCausalLM (random weights)", "layers": args.layers, "heads": args.heads,
                  "hidden": args.hidden, "vocab": "attnpos byte tokenizer (259)"},
        "settings": {"lengths": args.lengths, "texts": args.texts, "n_boot": args.boot, "rounds": args.rounds,
                     "repeat": args.repeat,
                     "quick": args.quick, "b_max_gb": args.b_max_gb},
        "results": results,
        "shapes": shape_results,
        "targets": {**targets(results, args.quick), **real_shapes.shape_targets(shape_results)},
    }
    out_path.parent.mkdir(parents=True, exist_ok=True)
    out_path.write_text(json.dumps(report, indent=1))
    print()
    if results:
        print(table(results))
        print()
    if shape_results:
        print(real_shapes.shape_table(shape_results))
        print()
        for r in shape_results:
            q = r["ratios"]
            print(f"{r['shape']}: " + ", ".join(f"{k} {fmt(v, 3 if k == 'agreement_B_vs_C' else 2)}"
                                                for k, v in q.items() if k != "agreement_B_vs_C")
                  + (f"; B and C masses/entropy agree within {q['agreement_B_vs_C']:.1e}"
                     if q["agreement_B_vs_C"] is not None else ""))
        print()
    print("times in seconds (best of runs, all texts); MB = peak RSS of the case's own process")
    for name, ok in report["targets"].items():
        print(f"target {name}: {'met' if ok else ('not measured' if ok is None else 'NOT met')}")
    for r in results:
        if r["agreement_B_vs_C"] is not None:
            print(f"T={r['T']}: B and C masses/entropy agree within {r['agreement_B_vs_C']:.1e}")
    print(f"JSON written to {out_path}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
