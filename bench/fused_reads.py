"""What fusing a reducer's read into the capture's row-block loop would save, measured before building it.

    python bench/fused_reads.py                 # T = 2048, 12 heads (the grid's chunk), 1 and 2 threads
    python bench/fused_reads.py --T 4096 --heads 6

The capture computes a causal layer in row blocks of 256 queries: scores → softmax in a scratch block, copied into
the layer's score and weight buffers, which the reducers then read. A reducer fused into the loop would read the
block while it is still warm instead. This times the entropy's row-wise Σ w·s (the largest reducer read at
T = 2048) both ways on one block of the grid's shape: right after the block's softmax ("fused"), and after 150 MB
of other memory traffic, as when the reducers run after the whole layer ("separate"). Writes nothing.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--T", type=int, default=2048)
    ap.add_argument("--heads", type=int, default=12)
    ap.add_argument("--rows", type=int, default=256)
    ap.add_argument("--repeat", type=int, default=20)
    args = ap.parse_args()

    import torch

    g = torch.Generator().manual_seed(0)
    s = torch.randn(args.heads, args.rows, args.T, generator=g)
    c = torch.empty_like(s)
    traffic = [torch.randn(args.heads, args.rows, args.T, generator=g) for _ in range(max(1, (150 << 20) // (4 * s.numel())))]

    def median_ms(f):
        f()
        out = []
        for _ in range(args.repeat):
            t0 = time.perf_counter()
            f()
            out.append(time.perf_counter() - t0)
        return 1e3 * statistics.median(out)

    def softmax():
        c.copy_(s)
        torch.softmax(c, -1, out=c)

    def softmax_then_dot():
        softmax()
        torch.linalg.vecdot(c, s)

    def other_traffic():
        for t in traffic:
            t.add_(0.0)

    def traffic_then_dot():
        other_traffic()
        torch.linalg.vecdot(c, s)

    print(f"one row block: {args.heads} heads × {args.rows} rows × {args.T} keys "
          f"({4 * s.numel() / 2**20:.0f} MB per buffer), median of {args.repeat}")
    for threads in (1, 2):
        torch.set_num_threads(threads)
        fused = median_ms(softmax_then_dot) - median_ms(softmax)
        separate = median_ms(traffic_then_dot) - median_ms(other_traffic)
        print(f"  {threads} thread(s): Σ w·s per row fused {fused:.2f} ms, separate {separate:.2f} ms "
              f"→ fusing saves {100 * (1 - fused / separate):.0f} % of that read")
    return 0


if __name__ == "__main__":
    sys.exit(main())
