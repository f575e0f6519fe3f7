"""The benchmark's smoke run (bench/scan_bench.py --quick) completes and writes a complete JSON.

Timings on a shared machine say nothing about correctness, so nothing here looks at a time or a ratio's value: only
that every case ran, and that each figure the README describes is present and has the right type.

No external check here (and no timing asserted): the benchmark's smoke run and JSON shape.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
SCRIPT = ROOT / "bench" / "scan_bench.py"


@pytest.mark.slow
def test_quick_bench_runs_and_writes_every_field(tmp_path):
    out = tmp_path / "bench.json"
    proc = subprocess.run([sys.executable, str(SCRIPT), "--quick", "--out", str(out)], cwd=tmp_path,
                          capture_output=True, text=True, timeout=900)
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert out.is_file()
    report = json.loads(out.read_text())

    assert report["schema"] == "attnpos.bench/1"
    assert isinstance(report["machine"]["cores"], int) and report["machine"]["cores"] >= 1
    for name in ("attnpos", "torch", "transformers", "numpy", "python"):
        assert isinstance(report["versions"][name], str) and report["versions"][name]
    assert report["model"]["layers"] == 2 and report["model"]["heads"] == 12 and report["model"]["hidden"] == 384
    assert report["settings"]["quick"] is True

    lengths = report["settings"]["lengths"]
    assert [r["T"] for r in report["results"]] == lengths
    for r in report["results"]:
        for case in ("A", "A_sdpa", "B", "C"):
            entry = r["cases"][case]
            assert entry["status"] == "ok", (r["T"], case, entry)
            assert isinstance(entry["seconds"], float) and entry["seconds"] > 0
            assert isinstance(entry["peak_rss_mb"], float) and entry["peak_rss_mb"] > 0
            assert len(entry["runs"]) == report["settings"]["rounds"] * report["settings"]["repeat"]
        for extra in ("shift_seconds", "induction_seconds"):
            assert isinstance(r["cases"]["C"][extra], float)
        for key in ("C/A", "C/A'", "B/C", "(C+shift)/(2A)", "B/A"):
            assert isinstance(r["ratios"][key], float)
        # B computes the same masses and entropy as the scan: equal up to float rounding
        assert r["agreement_B_vs_C"] is not None and r["agreement_B_vs_C"] < 1e-4

    # the real-shape part runs its smoke shape (grouped-query heads, word tokenizer) with every case
    [shape] = report["shapes"]
    assert shape["shape"] == "mini" and shape["spec"]["kv_heads"] < shape["spec"]["heads"]
    for case in ("load_tf", "load", "A", "A_sdpa", "B", "C", "Cplus", "P", "L"):
        entry = shape["cases"][case]
        assert entry["status"] == "ok", (case, entry)
        assert isinstance(entry["seconds"], float) and entry["seconds"] > 0
        assert isinstance(entry["peak_rss_mb"], float) and entry["peak_rss_mb"] > 0
    assert isinstance(shape["cases"]["C"]["record_seconds"], float)
    for key in ("C/A", "C/A'", "C+/A", "C+/A'", "P/A", "L/A", "B/C", "record/A", "load/load_tf", "first load/load_tf", "P_rss/A_rss",
                "C_rss/A_rss", "record_cpu/wall"):
        assert isinstance(shape["ratios"][key], float), key
    # B (output_attentions, per query head) and the scan agree on a grouped-query model too
    assert shape["ratios"]["agreement_B_vs_C"] is not None and shape["ratios"]["agreement_B_vs_C"] < 1e-4

    # the targets are evaluated only at their lengths and shapes, which the quick run does not reach
    assert set(report["targets"]) and all(v is None for v in report["targets"].values())
    # the terminal table has a row per length
    table_rows = [line for line in proc.stdout.splitlines() if line.split() and line.split()[0] in map(str, lengths)]
    assert len(table_rows) == len(lengths)
