"""A real scan for the browser tests (imported by the conftest and by the notebook's kernel; no pytest here)."""

from __future__ import annotations

import tempfile

# A short text of our own, with markup and control characters in it (they must show as text everywhere).
SHORT_TEXT = ("The harbour lamp at pier nine blinks twice, then the ferry bell rings twice; "
              "a note says <script>alert(1)</script> and \"><img src=x onerror=alert(1)> \x1b[31m in red.")


def build_real_scan(text: str = SHORT_TEXT):
    """A real scan of the RoPE reference model on a short text; returns (scan, what was scanned).

    If the trained weights are not in this checkout, the same pipeline runs on an untrained model of the same
    build (the numbers are then an untrained model's; the views do not care)."""
    from attnpos.errors import AttnposError
    from attnpos.pipeline import scan as run_scan
    try:
        return run_scan("ref:rope", [text], n_boot=20, progress=False), "ref:rope"
    except AttnposError:
        from attnpos.reference import build_model
        from attnpos.reference.train import save
        folder = tempfile.mkdtemp(prefix="attnpos-untrained-rope-")
        save(build_model("rope"), folder)
        return run_scan(folder, [text], n_boot=20, progress=False), "untrained rope build"
