"""The result protocol: every stage's result (scan, split, shift, induction, probe, length, bands, ablation,
compare, stretch, …) is a :class:`Result` with the same surface.

* ``to_json()`` / ``from_json(data_or_path)`` — a JSON-safe dict with ``"schema": "attnpos.<kind>/<version>"``;
  files written by an earlier version of a result load through that class's :meth:`Result.upgrade`.
* ``save(path)`` / ``load(path)`` — the JSON as a file, written atomically (:mod:`attnpos.files`).
* ``table()`` — the result's main table as a pandas DataFrame.
* ``text()`` — what the command line prints.
* ``_repr_html_()`` — what a notebook shows: the caution, a summary line and the table.

:func:`load` reads any result file and returns an object of the right class, by its schema.

Nothing here imports torch: a saved result can be read, shown and attached to a scan on any machine.

>>> import pandas as pd
>>> @register
... class Tally(Result):
...     result_kind, version = "tally", 1
...     def __init__(self, counts, caution=CAUTION):
...         self.counts, self.caution = dict(counts), caution
...     def payload(self):
...         return {"counts": self.counts}
...     @classmethod
...     def from_payload(cls, data):
...         return cls(data["counts"], data.get("caution", CAUTION))
...     def table(self):
...         return pd.DataFrame({"role": list(self.counts), "heads": list(self.counts.values())})
>>> t = Tally({"local": 3}); again = Tally.from_json(t.to_json())
>>> again.counts, t.to_json()["schema"]
({'local': 3}, 'attnpos.tally/1')
>>> unregister("tally")
"""

from __future__ import annotations

import html
import importlib
import json
import math
import os
from pathlib import Path
from typing import Any, ClassVar

import numpy as np

from ..errors import AttnposError

CAUTION = (
    "Attention weights are evidence, not explanation: a head that looks at the previous token may not use what "
    "it reads (Jain & Wallace 2019; Wiegreffe & Pinter 2019). Back a role with an intervention (the shift test "
    "here, or ablating the head: attnpos ablate) before concluding."
)
"""The caution every result carries and every surface shows once."""

PREFIX = "attnpos."


def json_safe(x: Any) -> Any:
    """JSON-safe value (for files and widget state alike): NaN/inf become None, numpy scalars and arrays become
    Python numbers and lists, tuples lists, dict keys strings."""
    if isinstance(x, (np.floating, float)):
        x = float(x)
        return None if not math.isfinite(x) else x
    if isinstance(x, np.integer):
        return int(x)
    if isinstance(x, np.bool_):
        return bool(x)
    if isinstance(x, np.ndarray):
        return [json_safe(v) for v in x.tolist()]
    if isinstance(x, (list, tuple)):
        return [json_safe(v) for v in x]
    if isinstance(x, dict):
        return {str(k): json_safe(v) for k, v in x.items()}
    return x


def parse_schema(value: Any) -> tuple[str, int] | None:
    """``"attnpos.scan/1"`` → ``("scan", 1)``; None for anything else."""
    if not isinstance(value, str) or not value.startswith(PREFIX) or "/" not in value:
        return None
    kind, _, ver = value[len(PREFIX):].partition("/")
    return (kind, int(ver)) if ver.isdigit() and kind else None


def read_json(path: str | os.PathLike, what: str = "result") -> Any:
    """A JSON file's content, or an :class:`AttnposError` that says what is wrong with the file."""
    p = Path(path)
    try:
        raw = p.read_bytes()
    except OSError as exc:
        raise AttnposError(f"Could not read the {what} file {p} ({exc.strerror or exc}). Check the path.") from None
    try:
        return json.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, ValueError, RecursionError) as exc:
        raise AttnposError(f"The {what} file {p} is not valid JSON ({str(exc)[:160]}); it is damaged or not "
                           "written by attnpos. Write it again.") from None


def legacy_model(data: dict) -> dict:
    """Results written before results carried a schema kept the model's name in ``"model"`` and its facts in
    ``"subject"``; now ``"model"`` holds the facts."""
    data["model"] = data.pop("subject", None) or {"name": data.get("model")}
    return data


class Result:
    """Base class of every stage's result (see the module doc). Subclasses set ``result_kind`` and ``version`` and
    implement :meth:`payload`, :meth:`from_payload` and :meth:`table`; they may override :meth:`text`,
    :meth:`summary` and :meth:`upgrade`."""

    result_kind: ClassVar[str] = "result"
    version: ClassVar[int] = 1
    caution: str = CAUTION

    # ------------------------------------------------------------------ to implement
    def payload(self) -> dict:
        """Everything but the schema, as plain Python (``to_json`` makes it JSON-safe)."""
        raise NotImplementedError

    @classmethod
    def from_payload(cls, data: dict) -> "Result":
        """Build the result from a current-version JSON dict (schema already checked)."""
        raise NotImplementedError

    def table(self):
        """The result's main table (pandas DataFrame)."""
        raise NotImplementedError

    #: top-level keys that mark this result as written before results carried a schema (version 0)
    legacy_keys: ClassVar[frozenset] = frozenset()

    @classmethod
    def upgrade(cls, data: dict, version: int) -> dict:
        """Turn a JSON dict of an earlier ``version`` into the current layout: version 0 (no schema) through
        :meth:`from_v0` when the class has ``legacy_keys``; no other earlier version by default."""
        if version == 0 and cls.legacy_keys:
            return cls.from_v0(data)
        raise AttnposError(f"attnpos cannot read {cls.result_kind} files of version {version}; this version reads "
                           f"{PREFIX}{cls.result_kind}/{cls.version}. Rerun the command that wrote it.")

    @classmethod
    def from_v0(cls, data: dict) -> dict:
        """A version-0 dict in the current layout (by default: the layout did not change)."""
        return data

    @classmethod
    def legacy(cls, data: dict) -> bool:
        """Whether ``data`` (no schema) is this result as written before results carried a schema."""
        return bool(cls.legacy_keys) and "schema" not in data and cls.legacy_keys <= set(data)

    # ------------------------------------------------------------------ the protocol
    @property
    def schema(self) -> str:
        return f"{PREFIX}{self.result_kind}/{self.version}"

    def to_json(self) -> dict:
        body = json_safe(self.payload())
        body.setdefault("caution", self.caution)
        return {"schema": self.schema, **body}

    @classmethod
    def from_json(cls, data: Any) -> "Result":
        """Rebuild the result from its JSON (a dict, or the path of a file written by :meth:`save`)."""
        if not isinstance(data, dict):
            data = read_json(data, cls.result_kind)
        if not isinstance(data, dict):
            raise AttnposError(f"This is not an attnpos {cls.result_kind} file: it holds a JSON {type(data).__name__}.")
        found = parse_schema(data.get("schema"))
        if found is None:
            if cls.legacy(data):
                data = cls.upgrade(dict(data), 0)
            else:
                raise AttnposError(f"This is not an attnpos {cls.result_kind} file (schema {data.get('schema')!r}; expected "
                                   f"{PREFIX}{cls.result_kind}/{cls.version}). Write it again with this version of attnpos.")
        else:
            kind, version = found
            if kind != cls.result_kind:
                raise AttnposError(f"This file holds an attnpos {kind} result, not a {cls.result_kind}; load it with "
                                   f"attnpos.load_result(path).")
            if version > cls.version:
                raise AttnposError(f"This {cls.result_kind} file was written by a newer attnpos (schema version {version}; "
                                   f"this one reads up to {cls.version}). Upgrade attnpos to read it.")
            if version < cls.version:
                data = cls.upgrade(dict(data), version)
        try:
            return cls.from_payload(data)
        except AttnposError:
            raise
        except (KeyError, TypeError, ValueError, IndexError, AttributeError) as exc:
            raise AttnposError(f"The {cls.result_kind} file is damaged or was edited by hand ({type(exc).__name__}: "
                               f"{str(exc)[:200]}). Write it again with the command that made it.") from None

    def save(self, path: str | os.PathLike) -> Path:
        """Write the JSON to ``path`` atomically (the old file stays whole if anything fails)."""
        from ..files import write_atomic

        text = json.dumps(self.to_json(), indent=1, ensure_ascii=False)
        return write_atomic(Path(path), text + "\n")

    @classmethod
    def load(cls, path: str | os.PathLike) -> "Result":
        return cls.from_json(Path(path))

    def headline(self) -> str:
        """One line: what this result is about."""
        model = getattr(self, "model", None) or {}
        name = model.get("name") if isinstance(model, dict) else None
        return f"attnpos {self.result_kind}" + (f" of {name}" if name else "")

    def text(self) -> str:
        """What the command line prints: the summary, the table and the caution."""
        import pandas as pd

        with pd.option_context("display.width", 120, "display.max_columns", 20, "display.max_rows", 60):
            return f"{self.headline()}\n{self.table().to_string()}\nnote: {self.caution}"

    def _repr_html_(self) -> str:
        t = self.table()
        body = t.to_html(max_rows=40, border=0, escape=True, na_rep="—", float_format=lambda v: f"{v:.3g}")
        return (f"<div class='attnpos-result'><p><b>{html.escape(self.headline())}</b></p>{body}"
                f"<p style='font-size:90%'><b>Caution.</b> {html.escape(self.caution)}</p></div>")

    def __repr__(self) -> str:
        return f"<{type(self).__name__}: {self.headline()}>"


# ------------------------------------------------------------------------------------------------ registry

_CLASSES: dict[str, type | str] = {
    # kind → the class, or "module:Class" imported on first use (none of these modules imports torch)
    "scan": "attnpos.results.scan:Scan",
    "split": "attnpos.results.split:SplitResult",
    "shift": "attnpos.results.shift:ShiftResult",
    "induction": "attnpos.results.induction:InductionResult",
    "probe": "attnpos.results.probe:ProbeResult",
    "length": "attnpos.results.length:LengthResult",
    "bands": "attnpos.results.bands:BandsResult",
    "ablation": "attnpos.results.ablation:AblationResult",
    "compare": "attnpos.results.compare:CompareResult",
    "stretch": "attnpos.results.stretch:StretchResult",
    "sweep": "attnpos.results.sweep:SweepResult",
}


def register(cls: type) -> type:
    """Make a result class known to :func:`load` (usable as a class decorator)."""
    _CLASSES[cls.result_kind] = cls
    return cls


def unregister(kind: str) -> None:
    _CLASSES.pop(kind, None)


def result_class(kind: str) -> type:
    entry = _CLASSES.get(kind)
    if entry is None:
        raise AttnposError(f"attnpos knows no result of kind {kind!r} (known: {', '.join(sorted(_CLASSES))}).")
    if isinstance(entry, str):
        mod, _, name = entry.partition(":")
        entry = _CLASSES[kind] = getattr(importlib.import_module(mod), name)
    return entry


def kinds() -> list[str]:
    return sorted(_CLASSES)


def load(data: Any) -> Result:
    """Any attnpos result (a dict or a file), as an object of its own class, by its schema; files written before
    results carried a schema are recognised by their layout."""
    if not isinstance(data, dict):
        data = read_json(data)
    if not isinstance(data, dict):
        raise AttnposError(f"This is not an attnpos result file: it holds a JSON {type(data).__name__}.")
    found = parse_schema(data.get("schema"))
    if found is not None:
        return result_class(found[0]).from_json(data)
    for kind in kinds():
        cls = result_class(kind)
        if cls.legacy(data):
            return cls.from_json(data)
    raise AttnposError("This JSON file is not an attnpos result (it has no attnpos schema). Write it again with "
                       "the attnpos command that made it.")
