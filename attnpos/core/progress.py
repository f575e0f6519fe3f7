"""Progress for the stages that take more than a couple of seconds: a tqdm bar (``tqdm.auto``: a text bar in a
terminal, a widget bar in a notebook) and one-line notices of what is being done, both on stderr.

Shown when stderr is a terminal or the code runs in a notebook kernel, never into a pipe or a test's captured
output (so a log or pytest's progress dots stay clean); ``ATTNPOS_PROGRESS=1`` forces them on, ``=0`` off. A
``progress=True/False`` argument of a stage overrides both.
"""

from __future__ import annotations

import os
import sys
from typing import Iterable, TypeVar

T = TypeVar("T")

ENV = "ATTNPOS_PROGRESS"


def in_notebook() -> bool:
    """Whether this process is a Jupyter kernel (an IPython kernel app is running)."""
    if "ipykernel" not in sys.modules:
        return False
    try:
        from IPython import get_ipython

        ip = get_ipython()
    except Exception:  # noqa: BLE001 - no IPython: not a notebook
        return False
    return ip is not None and hasattr(ip, "kernel")


def wanted(show: bool | None = None) -> bool:
    """Whether to show progress: ``show`` if given, else ``ATTNPOS_PROGRESS`` if set, else a terminal or a
    notebook."""
    if show is not None:
        return bool(show)
    env = os.environ.get(ENV, "").strip().lower()
    if env in ("1", "true", "yes", "on"):
        return True
    if env in ("0", "false", "no", "off"):
        return False
    try:
        tty = sys.stderr.isatty()
    except (AttributeError, ValueError):
        tty = False
    return tty or in_notebook()


def bar(iterable: Iterable[T], desc: str, unit: str = "it", total: int | None = None,
        show: bool | None = None) -> Iterable[T]:
    """``iterable`` wrapped in a progress bar when :func:`wanted`, else unchanged."""
    if not wanted(show):
        return iterable
    from tqdm.auto import tqdm

    return tqdm(iterable, desc=desc, unit=unit, total=total, leave=False, file=sys.stderr, dynamic_ncols=True)


def note(message: str, show: bool | None = None) -> None:
    """One line on stderr saying what is being done (when :func:`wanted`)."""
    if wanted(show):
        print(message, file=sys.stderr, flush=True)
