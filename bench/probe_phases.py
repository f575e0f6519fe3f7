"""Where a probe's time goes on a real shape, and the cost of its parts measured on their own.

    python bench/probe_phases.py smol-a            # one probe of the SmolLM2-135M shape, phase by phase
    python bench/probe_phases.py smol-a --rounds 3  # the plain forward (case A) and the probe, interleaved
    python bench/probe_phases.py smol-a --no-untrained   # the probe without its untrained copy (its memory)
    python bench/probe_phases.py smol-a --alpha 100      # one ridge penalty: no inner folds to choose it

Prints, for one ``attnpos.probes.probe(subject, texts)`` with its defaults: the two recordings (trained model
with the RoPE bands reduced in it, untrained copy), the untrained copy's random initialisation, the ridge fits of
both, the number of ridge factorisations, and the time of one Cholesky factorisation and solve of the shape's
hidden size on one thread (torch, float64, the call the probe makes), and the process's peak RSS after the
plain forward and after the probes. The phases are measured by wrapping the probe's own functions, so nothing but
the timers is added. Writes nothing.
"""

from __future__ import annotations

import argparse
import os
import resource
import statistics
import sys
import time
from pathlib import Path

os.environ.setdefault("HF_HUB_OFFLINE", "1")
os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")
sys.path.insert(0, str(Path(__file__).resolve().parent))

import real_shapes  # noqa: E402


def _timed(mod, name, store, key=None, count=False):
    f = getattr(mod, name)

    def wrapper(*a, **kw):
        t0 = time.perf_counter()
        try:
            return f(*a, **kw)
        finally:
            store.setdefault(key or name, []).append(time.perf_counter() - t0)

    setattr(mod, name, wrapper)
    return f


def cholesky_ms(d: int, k: int = 3, repeat: int = 20) -> float:
    """Median time of one float64 Cholesky factorisation and solve of a d × d ridge system with k targets, on one
    torch thread (the probe's ``_ridge_weights``)."""
    import torch

    threads = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        g = torch.Generator().manual_seed(0)
        X = torch.randn(2 * d, d, dtype=torch.float64, generator=g)
        G, B = X.T @ X, X.T @ torch.randn(2 * d, k, dtype=torch.float64, generator=g)
        out = []
        for _ in range(repeat + 2):
            t0 = time.perf_counter()
            M = G.clone()
            M.diagonal().add_(1.0)
            L, _ = torch.linalg.cholesky_ex(M)
            torch.cholesky_solve(B, L)
            out.append(time.perf_counter() - t0)
        return 1e3 * statistics.median(out[2:])
    finally:
        torch.set_num_threads(threads)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("shape", nargs="?", default="smol-a", choices=sorted(real_shapes.SHAPES))
    ap.add_argument("--rounds", type=int, default=1, help="probe and plain forward interleaved this many times")
    ap.add_argument("--no-untrained", action="store_true", help="probe without the untrained copy (untrained=False)")
    ap.add_argument("--alpha", type=float, default=None, help="one ridge penalty instead of the chosen one")
    args = ap.parse_args()

    import torch

    import attnpos
    from attnpos import probes

    folder = real_shapes.ensure_folder(args.shape)
    texts = real_shapes.make_texts(args.shape)
    s = real_shapes.SHAPES[args.shape]
    subject = attnpos.load(folder, dtype=s["dtype"])
    ids = [torch.tensor([u.ids]) for u in attnpos.texts.prepare(subject, attnpos.texts.as_raw(texts))]
    model = subject.model

    phases: dict[str, list[float]] = {}
    _timed(probes, "_record", phases, "recordings (hidden states; bands, weight statistics)")
    _timed(probes, "untrained_copy", phases, "untrained copy: build and initialise")
    _timed(probes, "_probe_layers", phases, "ridge fits (held out by text)")
    calls = {"n": 0}
    ridge = probes._ridge_weights

    def counted(*a, **kw):
        calls["n"] += 1
        return ridge(*a, **kw)

    probes._ridge_weights = counted

    def peak_mb():
        return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024

    forward, total, peaks = [], [], {}
    for r in range(args.rounds):
        with torch.no_grad():
            model(input_ids=ids[0][:, :64], use_cache=False)
            t0 = time.perf_counter()
            for x in ids:
                model(input_ids=x, use_cache=False)
            forward.append(time.perf_counter() - t0)
        peaks.setdefault("after the plain forward", peak_mb())
        calls["n"] = 0
        for v in phases.values():
            v.clear()
        t0 = time.perf_counter()
        probes.probe(subject, texts, untrained=not args.no_untrained, alpha=args.alpha, progress=False)
        total.append(time.perf_counter() - t0)
        peaks["after the probe" + (" (untrained=False)" if args.no_untrained else "")] = peak_mb()
        print(f"round {r + 1}: plain forward {forward[-1]:.2f} s, probe {total[-1]:.2f} s "
              f"(P/A {total[-1] / forward[-1]:.1f})")
    n_layers = subject.n_layers + 1
    print(f"\n{args.shape}: {len(texts)} texts × {s['T']} tokens, {n_layers} hidden-state layers, hidden {s['hidden']}, "
          f"torch threads {torch.get_num_threads()}; last round:")
    a = forward[-1]
    for name, v in phases.items():
        print(f"  {name:<55} {sum(v):7.2f} s  = {sum(v) / a:5.2f} A")
    other = total[-1] - sum(sum(v) for v in phases.values())
    print(f"  {'the rest (texts, head tables, counting check)':<55} {other:7.2f} s  = {other / a:5.2f} A")
    n_probes = n_layers * (1 if args.no_untrained else 2)
    per = calls["n"] / n_probes
    chol = cholesky_ms(s["hidden"])
    print(f"  ridge factorisations: {calls['n']} ({per:.0f} per layer probe, {n_probes} layer probes); one "
          f"Cholesky + solve at {s['hidden']} × {s['hidden']} on one thread: {chol:.2f} ms → "
          f"{calls['n'] * chol / 1e3:.1f} s of one core")
    print("  peak RSS: " + ", ".join(f"{k} {v:.0f} MB" for k, v in peaks.items()))
    print(f"median over {args.rounds} round(s): A {statistics.median(forward):.2f} s, P {statistics.median(total):.2f} s, "
          f"P/A {statistics.median([p / f for p, f in zip(total, forward)]):.1f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
