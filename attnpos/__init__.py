"""attnpos: find out how a trained transformer uses token position.

Quick start::

    import attnpos
    scan = attnpos.scan("ref:rope")                  # a shipped reference model on the bundled sample texts
    print(scan.heads[["layer", "head", "role", "evidence"]])
    scan.save("rope-scan.json")

The pieces, in the order data flows: :func:`load` → :func:`record` → :class:`Split` / :class:`ShiftTest` /
:func:`induction_scores` → :func:`head_table` → :class:`Scan` (views, report, findings).
"""

__version__ = "0.1.0"

import os as _os

# Before torch starts its OpenMP runtime: threads that sleep instead of spinning while they wait. On a small,
# shared CPU machine spinning threads made training steps 4x slower (measured on the 2-core machine, see
# attnpos/reference/TRAINING.md). Has no effect when torch was imported first; set it yourself to override.
_os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

from .errors import AttnposError  # noqa: E402
from .subject import Subject, load, from_model  # noqa: E402
from .capture import record, Recording, Reducer  # noqa: E402
from .split import Split  # noqa: E402
from .shift import ShiftTest  # noqa: E402
from .induction import induction_scores  # noqa: E402
from .roles import head_table  # noqa: E402
from .result import Scan  # noqa: E402
from .scan import scan  # noqa: E402

__all__ = ["AttnposError", "Subject", "load", "from_model", "record", "Recording", "Reducer", "Split",
           "ShiftTest", "induction_scores", "head_table", "Scan", "scan", "__version__"]
