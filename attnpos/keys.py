"""Names of heads and layers: ``L3.H2``, ``decoder:L1.H0``, ``L3``, ``model`` — the same strings in the findings
file, the views, the report and the command line (``attnpos ablate --heads L0.H1,L2.H3``)."""

from __future__ import annotations

import re
from typing import Any

_KEY_RE = re.compile(r"^(?:(?P<stack>[A-Za-z_][\w-]*):)?L(?P<layer>\d+)(?:\.H(?P<head>\d+))?$")


def head_key(stack: Any, layer: int, head: int) -> str:
    """Our key of a head, the same string the findings store uses as target: ``L3.H2``, ``decoder:L1.H0``."""
    prefix = "" if stack in (None, "", "main") else f"{stack}:"
    return f"{prefix}L{int(layer)}.H{int(head)}"


def layer_key(stack: Any, layer: int) -> str:
    prefix = "" if stack in (None, "", "main") else f"{stack}:"
    return f"{prefix}L{int(layer)}"


def parse_key(key: str) -> tuple[str, int | None, int | None]:
    """``"decoder:L1.H0"`` -> ("decoder", 1, 0); ``"L3"`` -> ("main", 3, None); ``"model"`` -> ("model", None, None)."""
    if key == "model":
        return "model", None, None
    m = _KEY_RE.match(key or "")
    if not m:
        raise ValueError(f"not a head/layer key: {key!r} (expected e.g. 'L3.H2', 'L3', 'decoder:L1.H0' or 'model')")
    head = m.group("head")
    return m.group("stack") or "main", int(m.group("layer")), (int(head) if head is not None else None)
