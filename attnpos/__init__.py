"""attnpos: find out how a trained transformer uses token position.

Quick start::

    import attnpos
    scan = attnpos.scan("ref:rope")                  # a shipped reference model on the bundled sample texts
    print(scan.heads[["layer", "head", "role", "evidence"]])
    scan.save("rope-scan.json")

The pieces, in the order data flows: :func:`load` → :func:`record` → :class:`Split` / :class:`ShiftTest` /
:func:`induction_scores` → :func:`head_table` → :class:`Scan` (views, report, findings); :func:`ablate` checks
whether the model needs a head; :func:`stretch` reruns a RoPE model under context-extension scalings.

The names below are imported when first used, so reading a saved scan, the findings file or the views does not
start torch (about 1.5 s).
"""

__version__ = "0.1.0"

import importlib as _importlib
import os as _os

# Before torch starts its OpenMP runtime: threads that sleep instead of spinning while they wait. On a small,
# shared CPU machine spinning threads made training steps 4x slower (measured on the 2-core machine, see
# attnpos/reference/TRAINING.md). Has no effect when torch was imported first; set it yourself to override.
_os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

from .errors import AttnposError  # noqa: E402

# public name → the module that defines it
_EXPORTS = {
    "Subject": "subject", "load": "subject", "from_model": "subject",
    "record": "capture", "Recording": "capture", "Reducer": "capture",
    "Split": "split", "ShiftTest": "shift", "induction_scores": "induction", "head_table": "roles",
    "Scan": "results.scan", "scan": "pipeline", "ablate": "ablation", "load_result": "core.protocol",
    "stretch": "stretching",
    "sweep": "sweeping",
}

__all__ = ["AttnposError", *_EXPORTS, "__version__"]


def __getattr__(name: str):
    """Import a public name, or a submodule (``attnpos.texts``), on first use."""
    if name in _EXPORTS:
        module = _importlib.import_module(f".{_EXPORTS[name]}", __name__)
        value = getattr(module, "load" if name == "load_result" else name)
        globals()[name] = value
        return value
    if not name.startswith("_"):
        try:
            return _importlib.import_module(f".{name}", __name__)
        except ModuleNotFoundError as exc:
            if exc.name != f"{__name__}.{name}":
                raise
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(_EXPORTS))
