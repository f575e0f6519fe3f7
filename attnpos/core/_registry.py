"""What the core's registries (roles, schemes) share: an entry that exists for the duration of a block."""

from __future__ import annotations

import contextlib
from typing import Any, Callable, Iterator


@contextlib.contextmanager
def temporarily(registry: dict, spec: Any, register: Callable[..., Any]) -> Iterator[Any]:
    """``register(spec, replace=True)`` for the block; afterwards the registry holds what it held before."""
    before = registry.get(spec.name)
    register(spec, replace=True)
    try:
        yield spec
    finally:
        if before is None:
            registry.pop(spec.name, None)
        else:
            registry[spec.name] = before
