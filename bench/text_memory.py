"""Memory of long text inputs: what reading + tokenising costs per byte, and whether a scan's memory stays flat as
a text grows (one window after another).

    python bench/text_memory.py read 1000000 5000000     # peak RSS growth of texts.read + prepare, per text byte
    python bench/text_memory.py scan 100000 1000000       # peak RSS of `attnpos scan ref:rope` on texts of this size
    python bench/text_memory.py length 1024 2048 4096     # peak RSS of `attnpos length ref:rope --to T`

Every measurement runs in a fresh child process and reads its peak RSS (VmHWM of /proc/self/status, or the
children's ru_maxrss). Texts are the reference corpus generator's invented documents (attnpos.reference.corpus),
cut to the asked number of bytes. Nothing is downloaded.
"""

from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
ENV = {**os.environ, "HF_HUB_OFFLINE": "1", "TRANSFORMERS_OFFLINE": "1", "TOKENIZERS_PARALLELISM": "false"}


def make_text(n_bytes: int, folder: Path) -> Path:
    from attnpos.reference import corpus

    text = corpus.corpus_text(corpus.generate_documents(seed=7, target_bytes=n_bytes))
    text = text.encode("utf-8")[:n_bytes].decode("utf-8", "ignore")
    path = folder / f"text-{n_bytes}.txt"
    path.write_text(text, encoding="utf-8")
    return path


def _hwm_kb() -> int:
    for line in open("/proc/self/status"):
        if line.startswith("VmHWM:"):
            return int(line.split()[1])
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss


CHILD_READ = """
import json, sys
from attnpos import texts, load
def hwm():
    for line in open('/proc/self/status'):
        if line.startswith('VmHWM:'): return int(line.split()[1])
s = load('ref:rope')
before = hwm()
raw = texts.read([sys.argv[1]])
units = texts.prepare(s, raw, warn=False)
print(json.dumps({"before_kb": before, "after_kb": hwm(), "windows": len(units)}))
"""


def measure_read(n_bytes: int, folder: Path) -> dict:
    path = make_text(n_bytes, folder)
    out = subprocess.run([sys.executable, "-c", CHILD_READ, str(path)], env=ENV, capture_output=True, text=True,
                         check=True)
    r = json.loads(out.stdout.strip().splitlines()[-1])
    growth = (r["after_kb"] - r["before_kb"]) * 1024
    return {"bytes": n_bytes, "windows": r["windows"], "growth_mb": round(growth / 2**20, 1),
            "bytes_per_text_byte": round(growth / n_bytes, 1)}


def _run_cli(args: list[str]) -> dict:
    t0 = time.perf_counter()
    before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    out = subprocess.run([sys.executable, "-m", "attnpos.cli", *args], env=ENV, capture_output=True, text=True)
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    if out.returncode:
        return {"failed": out.stderr.strip().splitlines()[-1:]}
    return {"peak_rss_mb": round(max(peak, before) / 1024, 1), "seconds": round(time.perf_counter() - t0, 1)}


def measure_scan(n_bytes: int, folder: Path) -> dict:
    """One child per size (ru_maxrss of the children is a running maximum, so sizes go smallest first)."""
    path = make_text(n_bytes, folder)
    r = _run_cli(["scan", "ref:rope", "--text", str(path), "--no-shift", "--no-induction", "--boot", "0"])
    return {"bytes": n_bytes, **r}


def measure_length(T: int, folder: Path) -> dict:
    return {"to": T, **_run_cli(["length", "ref:rope", "--to", str(T), "--sequences", "1", "--boot", "0"])}


def main(argv: list[str]) -> int:
    what, sizes = argv[0], [int(x) for x in argv[1:]]
    fn = {"read": measure_read, "scan": measure_scan, "length": measure_length}[what]
    with tempfile.TemporaryDirectory() as d:
        for n in sorted(sizes):
            print(json.dumps(fn(n, Path(d))), flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
