"""Sweep throughput: a 2-worker Dask sweep against scanning the same checkpoints one after another in one process.

    python bench/sweep_bench.py                 # 12 checkpoints, 3 rounds (about 5-10 min on 2 shared cores)
    python bench/sweep_bench.py --quick         # 4 checkpoints, 1 round (a smoke run)

The checkpoints: one short run of the RoPE reference build (4 layers × 4 heads, hidden 128, the shipped size)
trained here with ``--save-every 1`` for as many steps as there are checkpoints. The texts: the first two bundled
sample texts. Each round runs, in this order:

* **sequential** — one fresh Python process that imports attnpos and scans every checkpoint in turn with
  :func:`attnpos.sweeping.scan_checkpoint` (the sweep's own task function), torch with 2 threads (the machine's
  cores); its time counts from the first scan to the last (imports excluded);
* **sweep** — :func:`attnpos.sweep` into a new store on a new ``LocalCluster`` of 2 worker processes with one thread
  each; its time is the whole call: starting the cluster, the workers' imports, the scans, writing the store and
  closing the cluster (what a user waits for);
* **warm sweep** — the same sweep into a new store on a cluster started before the rounds and warmed by one
  throwaway sweep (workers have imported torch and attnpos): the throughput once the start-up is paid, as on a
  cluster that is already running.

It prints per round the times and the ratios sequential / sweep and sequential / warm sweep (above 1: the sweep
was faster) and their medians, and writes ``bench/sweep-results.json`` (``--out`` to choose). The machine is shared with other work:
quote the medians and the ratio, not one time.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("HF_HUB_OFFLINE", "1")
os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")
os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

HERE = Path(__file__).resolve().parent

SEQUENTIAL = r"""
import json, sys, time, warnings
warnings.simplefilter("ignore")
import torch
torch.set_num_threads(2)
from attnpos.sweeping import find_checkpoints, scan_checkpoint
from attnpos.texts import default_texts
run = sys.argv[1]
raw = default_texts()[:2]
points = find_checkpoints(run)
t0 = time.perf_counter()
statuses = [scan_checkpoint(c.source, raw, {"n_boot": 0, "threads": 2}, [])["status"] for c in points]
print(json.dumps({"seconds": time.perf_counter() - t0, "statuses": statuses}))
"""


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--checkpoints", type=int, default=12)
    p.add_argument("--rounds", type=int, default=3)
    p.add_argument("--workers", type=int, default=2)
    p.add_argument("--quick", action="store_true", help="4 checkpoints, 1 round")
    p.add_argument("--out", type=Path, default=None)
    args = p.parse_args(argv)
    if args.quick:
        args.checkpoints, args.rounds = 4, 1
    out = args.out or HERE / ("sweep-results-quick.json" if args.quick else "sweep-results.json")

    import attnpos
    from attnpos.files import write_atomic
    from attnpos.reference.train import train
    from attnpos.texts import default_texts

    work = Path(tempfile.mkdtemp(prefix="attnpos-sweep-bench-"))
    run = work / "run"
    n = args.checkpoints
    train("rope", run, steps=n, save_every=1, log_every=1, batch=4, progress=False)   # n-1 checkpoints + final
    raw = default_texts()[:2]
    from attnpos.sweeping import connect

    client, cluster = connect(workers=args.workers)
    attnpos.sweep(run, raw, out=work / "warm-up", client=client)          # imports torch + attnpos on every worker
    rounds = []
    for r in range(args.rounds):
        done = subprocess.run([sys.executable, "-c", SEQUENTIAL, str(run)], capture_output=True, text=True,
                              check=True)
        seq = json.loads(done.stdout.strip().splitlines()[-1])
        assert seq["statuses"] == ["ok"] * n, seq["statuses"]
        t0 = time.perf_counter()
        res = attnpos.sweep(run, raw, out=work / f"store-{r}", workers=args.workers)
        sw = time.perf_counter() - t0
        assert [q["status"] for q in res.points] == ["ok"] * n
        t0 = time.perf_counter()
        res = attnpos.sweep(run, raw, out=work / f"warm-store-{r}", client=client)
        warm = time.perf_counter() - t0
        assert [q["status"] for q in res.points] == ["ok"] * n
        rounds.append({"sequential_s": round(seq["seconds"], 2), "sweep_s": round(sw, 2),
                       "warm_sweep_s": round(warm, 2), "ratio": round(seq["seconds"] / sw, 3),
                       "warm_ratio": round(seq["seconds"] / warm, 3)})
        print(f"round {r + 1}: sequential {seq['seconds']:.1f} s, sweep ({args.workers} workers, new cluster) "
              f"{sw:.1f} s, warm sweep {warm:.1f} s; ratios {seq['seconds'] / sw:.2f}, {seq['seconds'] / warm:.2f}",
              flush=True)
    client.close()
    cluster.close()
    keys = ("sequential_s", "sweep_s", "warm_sweep_s", "ratio", "warm_ratio")
    med = {k: statistics.median(x[k] for x in rounds) for k in keys}
    print(f"median over {len(rounds)} rounds ({n} checkpoints, {args.workers} workers): sequential "
          f"{med['sequential_s']:.1f} s, sweep {med['sweep_s']:.1f} s (ratio {med['ratio']:.2f}), warm sweep "
          f"{med['warm_sweep_s']:.1f} s (ratio {med['warm_ratio']:.2f})")
    try:
        load = os.getloadavg()
    except OSError:
        load = None
    report = {"schema": "attnpos.sweep-bench/1", "checkpoints": n, "workers": args.workers,
              "texts": [t.name for t in raw], "rounds": rounds, "median": med,
              "machine": {"cores": os.cpu_count(), "load_average_at_end": load, "python": platform.python_version()},
              "command": "python bench/sweep_bench.py" + (" --quick" if args.quick else "")}
    write_atomic(out, json.dumps(report, indent=1) + "\n")
    print(f"wrote {out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
