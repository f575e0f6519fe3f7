"""The vocabulary every stage, view and command reads from, at the bottom of the import graph.

* :mod:`~attnpos.core.keys` — head and layer keys (``L3.H2``, ``decoder:L1.H0``): parse, format, compact lists.
* :mod:`~attnpos.core.roles` — role specs: name, precedence, check, rule text, colour, short word and code, the
  column that measures the role's strength.
* :mod:`~attnpos.core.schemes` — position-scheme specs and their detectors.
* :mod:`~attnpos.core.columns` — the head table's columns and the score split's parts; they drive the scan JSON.
* :mod:`~attnpos.core.thresholds` — every threshold that turns a number into a word, with its reason.
* :mod:`~attnpos.core.protocol` — the result protocol (JSON, files, tables, notebook display) and the caution.

Nothing here imports torch or any other attnpos module but :mod:`attnpos.errors` and :mod:`attnpos.files`.
"""

from . import columns, keys, protocol, roles, schemes, thresholds  # noqa: F401
from .protocol import CAUTION, Result, json_safe  # noqa: F401

__all__ = ["columns", "keys", "protocol", "roles", "schemes", "thresholds", "CAUTION", "Result", "json_safe"]
