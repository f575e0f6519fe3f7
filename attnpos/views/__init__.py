"""Notebook views of a scan, and their static HTML/SVG renderings.

Widgets (anywidget; each also renders as static HTML when no kernel or widget manager is there):

- :class:`Atlas` — every head as a layers × heads grid: role colour + written role, profile sparkline,
  finding marks; hover for evidence, click or arrows + Enter to select.
- :class:`HeadCard` — one head in depth: weight map, profile, score split, shift test, induction, top keys.
- :class:`Curves` — probe R² per layer; loss per position past the training length.
- :class:`FindingsPanel` — notes on a head, layer or the model, written through :mod:`attnpos.findings`.
- :class:`Survey` — all four, linked.
- :class:`StretchBoard` — a stretch result: loss curves of every scaling and the heads × variants break grid.
- :class:`Timeline` — a sweep result: heads × training steps coloured by role, the loss curve above.

Example::

    import attnpos
    from attnpos.views import Survey
    scan = attnpos.scan("ref:rope")
    Survey(scan, findings="rope-findings.json")
"""

from ..core.keys import head_key, layer_key, parse_key
from .common import RAMP, role_colours, role_palette, roles_now, show_token
from .atlas import Atlas
from .card import HeadCard
from .curves import Curves
from .findings_panel import FindingsPanel
from .static import atlas_html, card_html, curves_html, findings_table_html
from .survey import Survey, survey
from .stretch import StretchBoard
from .timeline import Timeline

__all__ = ["Atlas", "HeadCard", "Curves", "FindingsPanel", "Survey", "survey", "StretchBoard", "Timeline", "roles_now", "role_colours", "role_palette", "RAMP",
           "head_key", "layer_key", "parse_key", "show_token", "atlas_html", "card_html", "curves_html",
           "findings_table_html"]
