"""Findings: notes on a head, a layer or the whole model, kept in a JSON file beside the notebook.

A **finding** is what a person concluded while looking at a subject: a free-text body, a status from
:data:`STATUSES`, and the **target** it is about. Each finding is stamped with the subject's fingerprint (and,
optionally, a hash of the texts it was recorded on), so a finding made on another checkpoint shows up as
*stale* instead of being silently applied to this one.

Targets are written as keys in the grammar of :mod:`attnpos.core.keys` (``"model"``, ``"L3"``, ``"L3.H2"``,
``"decoder:L1.H0"``) or as a dict ``{"kind": "head", "stack": "main", "layer": 3, "head": 2}``. Parsing is forgiving about case and
spaces (``"l3.h2"``, ``"main:L3"``); the stored form is canonical. Layers and heads count from 0.

The store is a plain file in our own format::

    {"format": "attnpos.findings/1", "findings": [ {...}, ... ]}

Every change takes a lock (``<file>.lock``), re-reads the file, applies the change and writes the whole file
atomically (temporary file in the same folder, fsync, rename), so two kernels adding notes to the same file never
lose one. Reads never take the lock: they always see a complete file. A file that cannot be read (not JSON,
truncated, wrong format) is never overwritten: reading it raises :class:`~attnpos.errors.AttnposError`, saves a
copy beside it as ``<name>.corrupt-<UTC timestamp>.json`` and every change is refused until the file is repaired
or :meth:`Findings.recover` moves it aside.

Example (a throw-away folder stands in for the notebook's folder)::

    >>> import tempfile, pathlib
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> store = Findings(folder / "attnpos-findings.json")
    >>> f = store.add("L3.H2", "looks one token back on every text", fingerprint="abc123")
    >>> f.target, f.kind, f.layer, f.head, f.status
    ('L3.H2', 'head', 3, 2, 'open')
    >>> f = store.update(f.id, status="supported")
    >>> f.status
    'supported'
    >>> [g.body for g in Findings(folder / "attnpos-findings.json").all()]   # a new kernel sees it
    ['looks one token back on every text']
    >>> [(g.target, stale) for g, stale in store.check("abc123")]
    [('L3.H2', False)]
    >>> [(g.target, stale) for g, stale in store.check("other-checkpoint")]
    [('L3.H2', True)]
    >>> store.export(folder / "notes.md").name
    'notes.md'
"""

from __future__ import annotations

import dataclasses
import glob
import json
import operator
import os
import re
import uuid
from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, TypeVar, Union

import filelock

from .core import keys
from .errors import AttnposError
from .files import safe_text, write_atomic, write_new

FORMAT = "attnpos.findings/1"
"""The ``format`` value this module writes and reads."""

_FORMAT_FAMILY = "attnpos.findings/"

STATUSES = ("open", "supported", "ruled-out")
"""Where a finding stands: ``open`` (a hunch, not yet checked), ``supported`` (evidence backs it, e.g. the shift
test or an ablation), ``ruled-out`` (checked and found not to hold)."""

KINDS = ("model", "layer", "head")
"""What a finding is about."""

MAIN_STACK = keys.MAIN
"""The stack name of a decoder-only or encoder-only model; it is left out of the canonical target string."""

DEFAULT_FILENAME = "attnpos-findings.json"
"""The file name used when :class:`Findings` is given no path (relative to the current folder)."""

LOCK_TIMEOUT_S = 60.0
"""How long a change waits for another process's lock before giving up with an error."""

_CAUTION = (
    "Attention weights are evidence, not explanation: back a finding with an intervention (the shift test, or "
    "ablating the head) before relying on it."
)

_FIELDS = (
    "id", "target", "kind", "stack", "layer", "head", "status", "body",
    "fingerprint", "texts_hash", "created", "updated", "author",
)

_ID_RE = re.compile(r"[A-Za-z0-9_-]{1,64}\Z", re.ASCII)
_SURROGATE_RE = re.compile("[\ud800-\udfff]")

TargetLike = Union[str, Mapping[str, Any]]


class LinkNotice(UserWarning):
    """The findings path is a symbolic link: attnpos says which file it reads and writes."""

_T = TypeVar("_T")


# ----------------------------------------------------------------------------------------------------------------
# Targets


_TARGET_HELP = keys.HELP + (' A target may also be a dict {"kind": "head"|"layer"|"model", "stack": "main", '
                             '"layer": int|None, "head": int|None}.')


def _index(value: Any, what: str, target: Any) -> int | None:
    if value is None:
        return None
    if isinstance(value, bool):
        raise AttnposError(f"The finding target {target!r} has {what}={value!r}, which is not a number. {_TARGET_HELP}")
    try:
        number = operator.index(value)
    except TypeError:
        raise AttnposError(
            f"The finding target {target!r} has {what}={value!r}, which is not a whole number. {_TARGET_HELP}"
        ) from None
    if not 0 <= number <= keys.MAX_INDEX:
        raise AttnposError(f"The finding target {target!r} has {what} {number}, outside 0 … {keys.MAX_INDEX}. "
                           f"{_TARGET_HELP}")
    return number


def parse_target(target: TargetLike) -> dict[str, Any]:
    """Check a target and return its parts: ``{"target", "kind", "stack", "layer", "head"}``.

    ``target`` is a key string (the grammar of :mod:`attnpos.core.keys`: ``"model"``, ``"L3"``, ``"L3.H2"``,
    ``"decoder:L1.H0"``) or a dict with ``kind`` and, as needed, ``stack`` (default ``"main"``), ``layer`` and
    ``head``. Raises :class:`AttnposError` for anything else. The reader of the file checks every stored target
    with this same function.

    >>> parse_target("decoder:l1.h0")
    {'target': 'decoder:L1.H0', 'kind': 'head', 'stack': 'decoder', 'layer': 1, 'head': 0}
    >>> parse_target({"kind": "layer", "layer": 4})["target"]
    'L4'
    """
    if isinstance(target, str):
        try:
            k = keys.parse_key(target)
        except AttnposError as exc:
            raise AttnposError(f"The finding target {target!r} is not one attnpos understands: {exc}") from None
        kind, stack, layer, head = k.kind, k.stack, k.layer, k.head
    elif isinstance(target, Mapping):
        unknown = sorted(map(str, set(target) - {"kind", "stack", "layer", "head"}))
        if unknown:
            raise AttnposError(
                f"The finding target {dict(target)!r} has keys attnpos does not know: {', '.join(unknown)}. "
                f"{_TARGET_HELP}"
            )
        kind = target.get("kind")
        if kind not in KINDS:
            raise AttnposError(
                f"The finding target {dict(target)!r} needs \"kind\" set to one of {', '.join(KINDS)}. {_TARGET_HELP}"
            )
        stack = target.get("stack", MAIN_STACK)
        stack = MAIN_STACK if stack is None else stack
        if not isinstance(stack, str) or not keys.STACK_RE.match(stack.lower()):
            raise AttnposError(
                f"The finding target {dict(target)!r} has stack {stack!r}; a stack name is a short lowercase word "
                f'such as "main", "encoder" or "decoder". {_TARGET_HELP}'
            )
        stack = keys.normal_stack(stack)
        layer = _index(target.get("layer"), "layer", dict(target))
        head = _index(target.get("head"), "head", dict(target))
        need = {"model": (False, False), "layer": (True, False), "head": (True, True)}[kind]
        if (layer is not None, head is not None) != need:
            wants = {"model": "neither layer nor head", "layer": "a layer and no head", "head": "a layer and a head"}
            raise AttnposError(
                f"The finding target {dict(target)!r} is of kind {kind!r}, which takes {wants[kind]}. {_TARGET_HELP}"
            )
        if kind == "model" and stack != MAIN_STACK:
            raise AttnposError(
                f"The finding target {dict(target)!r} gives a stack for the whole model; a model-wide finding has "
                f'no stack. Leave "stack" out or set it to "main". {_TARGET_HELP}'
            )
    else:
        raise AttnposError(
            f"A finding target must be a string or a dict, not {type(target).__name__}. {_TARGET_HELP}"
        )
    if kind == "model":
        stack = MAIN_STACK
    return {"target": keys.format_key(stack, layer, head), "kind": kind, "stack": stack,
            "layer": layer, "head": head}


def canonical_target(target: TargetLike) -> str:
    """The canonical string form of a target (see :func:`parse_target`).

    >>> canonical_target(" main:l3 . h2 "), canonical_target({"kind": "model"})
    ('L3.H2', 'model')
    """
    return parse_target(target)["target"]


def _target_sort_key(kind: str, stack: str, layer: int | None, head: int | None) -> tuple:
    # The model first, then the main stack, then other stacks by name; within a stack by layer, the layer-wide
    # finding before its heads.
    if kind == "model":
        return (0, "", -1, -1)
    return (1 if stack == MAIN_STACK else 2, stack, layer, -1 if head is None else head)


# ----------------------------------------------------------------------------------------------------------------
# Field checks (shared by user input and by reading the file)


def _check_status(status: Any) -> str:
    if isinstance(status, str):
        norm = re.sub(r"[\s_]+", "-", status.strip().lower())
        if norm in STATUSES:
            return norm
    raise AttnposError(
        f"The finding status {status!r} is not one attnpos uses. Use one of: {', '.join(STATUSES)} "
        f"(open = not yet checked, supported = evidence backs it, ruled-out = checked and does not hold)."
    )


def _check_text(value: Any, what: str, *, optional: bool, nonempty: bool = False) -> str | None:
    if value is None and optional:
        return None
    if not isinstance(value, str):
        allowed = "a string or None" if optional else "a string"
        raise AttnposError(f"A finding's {what} must be {allowed}, not {type(value).__name__}. Pass it as text.")
    if nonempty and not value.strip():
        raise AttnposError(
            f"A finding's {what} is empty. Pass the subject's {what} (e.g. subject.fingerprint) or None to leave "
            f"the finding unstamped."
        )
    if _SURROGATE_RE.search(value):
        raise AttnposError(
            f"A finding's {what} contains a lone surrogate character, which cannot be saved as UTF-8. This usually "
            f"comes from text decoded with errors='surrogateescape'; decode it with errors='replace' and try again."
        )
    return value


def _stamp(value: Any, what: str) -> str | None:
    """A fingerprint or texts hash given by the caller; None or a blank string means "not known"."""
    if value is None:
        return None
    if not isinstance(value, str):
        raise AttnposError(
            f"A {what} must be a string (e.g. subject.fingerprint, scan.texts_hash) or None, not "
            f"{type(value).__name__}. Pass the hex digest as text."
        )
    if not value.strip():
        return None
    return _check_text(value, what, optional=False)


def _now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="microseconds")


# ----------------------------------------------------------------------------------------------------------------
# Finding


class _BadRecord(ValueError):
    """A record in the file is not a finding this module could have written."""


@dataclass(frozen=True)
class Finding:
    """One note on a head, a layer or the whole model.

    Attributes:
        id: short unique string (12 hex digits) that names the finding in :meth:`Findings.update` and
            :meth:`Findings.remove`.
        target: canonical target string (``"model"``, ``"L3"``, ``"L3.H2"``, ``"decoder:L1.H0"``).
        kind: ``"model"``, ``"layer"`` or ``"head"``.
        stack: ``"main"`` unless the model has several stacks (``"encoder"``, ``"decoder"``).
        layer, head: indices from 0, or None where the kind has none.
        status: one of :data:`STATUSES`.
        body: the note, exactly as written.
        fingerprint: the subject fingerprint the finding was made on, or None (unstamped).
        texts_hash: a hash of the texts it was made on, or None.
        created, updated: ISO-8601 times in UTC.
        author: who wrote it, or None.

    >>> f = Finding(id="0123456789ab", target="L0", kind="layer", stack="main", layer=0, head=None,
    ...             status="open", body="", fingerprint="aa", texts_hash="t1",
    ...             created="2026-01-01T00:00:00+00:00", updated="2026-01-01T00:00:00+00:00", author=None)
    >>> f.is_stale("aa"), f.is_stale("bb"), f.is_stale("aa", "t1"), f.is_stale("aa", "t2")
    (False, True, False, True)
    """

    id: str
    target: str
    kind: str
    stack: str
    layer: int | None
    head: int | None
    status: str
    body: str
    fingerprint: str | None
    texts_hash: str | None
    created: str
    updated: str
    author: str | None

    @property
    def stamped(self) -> bool:
        """Whether the finding records the fingerprint it was made on (unstamped findings are never stale)."""
        return self.fingerprint is not None

    def is_stale(self, fingerprint: str | None, texts_hash: str | None = None) -> bool:
        """Whether this finding was made on something other than the given subject (and texts).

        Stale when the finding carries a fingerprint that differs from ``fingerprint``, or when both the finding
        and the caller have a texts hash and they differ. An unstamped finding (``fingerprint is None``) is never
        stale; a finding without a texts hash is judged on the fingerprint alone. ``fingerprint=None`` (or a blank
        string) means the current subject is unknown: every stamped finding is then stale, since nothing shows it
        belongs to this subject.
        """
        fingerprint = _stamp(fingerprint, "fingerprint")
        texts_hash = _stamp(texts_hash, "texts hash")
        if self.fingerprint is not None and self.fingerprint != fingerprint:
            return True
        return self.texts_hash is not None and texts_hash is not None and self.texts_hash != texts_hash

    def to_dict(self) -> dict[str, Any]:
        """The finding as a plain dict (the form it has in the file)."""
        return {name: getattr(self, name) for name in _FIELDS}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> Finding:
        """Build a finding from the dict form, checking every field; raises :class:`AttnposError` if it is off."""
        try:
            return _finding_from_record(data)
        except _BadRecord as exc:
            raise AttnposError(
                f"That is not a valid finding: {exc}. Build findings with Findings.add, or pass a dict produced by "
                f"Finding.to_dict."
            ) from None


def _finding_from_record(record: Any) -> Finding:
    if not isinstance(record, Mapping):
        raise _BadRecord(f"expected an object, found {type(record).__name__}")
    missing = [name for name in _FIELDS if name not in record]
    extra = sorted(map(str, set(record) - set(_FIELDS)))
    if missing:
        raise _BadRecord(f"missing field(s) {', '.join(missing)}")
    if extra:
        raise _BadRecord(f"unknown field(s) {', '.join(extra)}")
    fid = record["id"]
    if not isinstance(fid, str) or not _ID_RE.match(fid):
        raise _BadRecord(f"bad id {fid!r}")
    where = f"finding {fid}"
    try:
        parts = parse_target(record["target"])
        if parts["target"] != record["target"]:
            raise _BadRecord(f"{where}: target {record['target']!r} is not in canonical form")
        for name in ("kind", "stack", "layer", "head"):
            if record[name] != parts[name] or type(record[name]) is not type(parts[name]):
                raise _BadRecord(f"{where}: {name}={record[name]!r} does not match target {parts['target']!r}")
        if record["status"] not in STATUSES:
            raise _BadRecord(f"{where}: unknown status {record['status']!r}")
        _check_text(record["body"], "body", optional=False)
        for name in ("fingerprint", "texts_hash"):
            _check_text(record[name], name, optional=True, nonempty=True)
        _check_text(record["author"], "author", optional=True)
    except AttnposError as exc:
        raise _BadRecord(f"{where}: {str(exc).split('. ')[0]}") from None
    for name in ("created", "updated"):
        value = record[name]
        try:
            ok = isinstance(value, str) and datetime.fromisoformat(value).tzinfo is not None
        except ValueError:
            ok = False
        if not ok:
            raise _BadRecord(f"{where}: {name}={value!r} is not an ISO-8601 time with a UTC offset")
    return Finding(**{name: record[name] for name in _FIELDS})


# ----------------------------------------------------------------------------------------------------------------
# Files


def _encode(findings: list[Finding]) -> bytes:
    doc = {"format": FORMAT, "findings": [f.to_dict() for f in findings]}
    return (json.dumps(doc, indent=2, ensure_ascii=False) + "\n").encode("utf-8")


class _Unreadable(Exception):
    def __init__(self, detail: str, newer: bool = False):
        super().__init__(detail)
        self.detail = detail
        self.newer = newer


def _decode(raw: bytes) -> list[Finding]:
    if not raw.strip():
        raise _Unreadable("the file is empty (a truncated write?)")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise _Unreadable(f"it is not UTF-8 text ({exc.reason} at byte {exc.start})") from None
    try:
        doc = json.loads(text)
    except json.JSONDecodeError as exc:
        raise _Unreadable(f"it is not valid JSON ({exc.msg} at line {exc.lineno} column {exc.colno})") from None
    except RecursionError:
        raise _Unreadable("it is nested too deeply to be a findings file") from None
    except ValueError as exc:     # e.g. a number of thousands of digits
        raise _Unreadable(f"it holds a value attnpos cannot read ({str(exc)[:80]})") from None
    if not isinstance(doc, dict) or "format" not in doc:
        raise _Unreadable(f'it is JSON but not an attnpos findings file (no "format": "{FORMAT}" at the top)')
    fmt = doc["format"]
    if fmt != FORMAT:
        if isinstance(fmt, str) and fmt.startswith(_FORMAT_FAMILY):
            raise _Unreadable(f"it uses format {fmt!r}, and this version of attnpos reads only {FORMAT!r}", True)
        raise _Unreadable(f"its format is {fmt!r}, not {FORMAT!r}")
    extra = sorted(set(doc) - {"format", "findings"})
    if extra:
        raise _Unreadable(f"it has unknown top-level field(s) {', '.join(map(str, extra))}")
    records = doc.get("findings")
    if not isinstance(records, list):
        raise _Unreadable('its "findings" entry is missing or not a list')
    findings, seen = [], set()
    for n, record in enumerate(records):
        try:
            finding = _finding_from_record(record)
        except _BadRecord as exc:
            raise _Unreadable(f"entry {n} is not a valid finding ({exc})") from None
        if finding.id in seen:
            raise _Unreadable(f"the id {finding.id} appears twice")
        seen.add(finding.id)
        findings.append(finding)
    return findings


def _salvage(raw: bytes) -> list[Finding]:
    """The entries of an unreadable file that are still valid findings (first of each id), in file order."""
    try:
        doc = json.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, ValueError, RecursionError):
        return []
    if not isinstance(doc, dict) or doc.get("format") != FORMAT:
        return []      # not (or no longer) this format: nothing in it is known to be a finding
    records = doc.get("findings")
    kept, seen = [], set()
    for record in records if isinstance(records, list) else []:
        try:
            finding = _finding_from_record(record)
        except (_BadRecord, AttnposError, TypeError, ValueError, RecursionError):
            continue
        if finding.id not in seen:
            seen.add(finding.id)
            kept.append(finding)
    return kept


# ----------------------------------------------------------------------------------------------------------------
# Markdown


def _md_cell(text: str) -> str:
    """Text made safe for one cell of a Markdown table (shows as written, cannot break the table or inject HTML)."""
    text = text.replace("\\", "\\\\").replace("|", "\\|")
    text = text.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")
    text = re.sub(r"\r\n|[\r\n\u2028\u2029\x0b\x0c\x85]", "<br>", text)
    # Remaining control characters (tab stays) would be invisible or alter the row; show a replacement mark.
    return re.sub(r"[\x00-\x08\x0e-\x1f\x7f-\x9f]", "\ufffd", text)


# ----------------------------------------------------------------------------------------------------------------
# The store


class Findings:
    """The findings kept in one JSON file.

    ``path`` is the file (default ``attnpos-findings.json`` in the current folder); the file is created on the
    first change, and its folder must already exist. Every method reads the file afresh, so several
    :class:`Findings` objects, kernels or processes can share one file.

    >>> import tempfile, pathlib
    >>> store = Findings(pathlib.Path(tempfile.mkdtemp()) / "notes.json")
    >>> store.all()
    []
    >>> a = store.add("model", "position is learned-absolute up to slot 512", author="kim")
    >>> b = store.add({"kind": "head", "layer": 0, "head": 1}, "anchor on slot 0", status="supported")
    >>> [f.target for f in store.for_target("L0.H1")]
    ['L0.H1']
    >>> store.remove(a.id)
    >>> [f.body for f in store.all()]
    ['anchor on slot 0']
    """

    def __init__(self, path: str | os.PathLike[str] = DEFAULT_FILENAME, *, lock_timeout: float = LOCK_TIMEOUT_S):
        given = Path(os.fspath(path)).expanduser()
        # Resolve symlinks so the rename replaces the real file (not the link) and every kernel locks one path; a
        # link is said so, its target must be a findings file before anything is written, and recover() refuses
        # to act through it. Backups of an unreadable file go beside the path as given, never beside a target.
        self.given = given.absolute()
        self.linked = given.is_symlink()
        self.path = given.resolve()
        folder = self.path.parent
        if not folder.is_dir():
            raise AttnposError(
                f"Cannot keep findings in {str(given)!r}: the folder {str(folder)!r} does not exist. Create the "
                f"folder first or give a path in an existing folder."
            )
        if self.path.is_dir():
            raise AttnposError(
                f"Cannot keep findings in {str(given)!r}: it is a folder. Give a file path, e.g. "
                f"{str(given / DEFAULT_FILENAME)!r}."
            )
        self.lock_path = Path(str(self.path) + ".lock")
        self._lock = filelock.FileLock(str(self.lock_path), timeout=lock_timeout)
        if self.linked:
            import warnings

            warnings.warn(f"the findings path {str(self.given)!r} is a symbolic link; attnpos reads and writes its "
                          f"target {str(self.path)!r}.", LinkNotice, stacklevel=2)

    def __repr__(self) -> str:
        return f"Findings({str(self.path)!r})"

    # -- reading ------------------------------------------------------------------------------------------------

    def _backup_name(self, stamp: str, n: int) -> Path:
        where = self.given if self.linked else self.path
        stem = where.name[:-5] if where.name.endswith(".json") else where.name
        suffix = f"-{n}" if n else ""
        return where.parent / f"{stem}.corrupt-{stamp}{suffix}.json"

    def _existing_backup(self, raw: bytes) -> Path | None:
        pattern = glob.escape(str(self._backup_name("X", 0))).replace(".corrupt-X.json", ".corrupt-*.json")
        for candidate in sorted(glob.glob(pattern)):
            candidate = Path(candidate)
            try:
                if candidate.stat().st_size == len(raw) and candidate.read_bytes() == raw:
                    return candidate
            except OSError:
                continue
        return None

    def _backup(self, raw: bytes) -> Path:
        """A copy of the unreadable bytes beside the file; an identical earlier copy is reused."""
        existing = self._existing_backup(raw)
        if existing is not None:
            return existing
        stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ")
        for n in range(1000):
            target = self._backup_name(stamp, n)
            try:
                write_new(target, raw)
                return target
            except FileExistsError:
                continue
        raise OSError("too many backup copies with the same time stamp")

    def _unreadable_error(self, raw: bytes, problem: _Unreadable) -> AttnposError:
        if problem.newer:
            return AttnposError(
                f"The findings file {str(self.path)!r} cannot be read: {problem.detail}. It was probably written "
                f"by a newer attnpos. attnpos has left it untouched and will not write to it. Upgrade attnpos to "
                f"read it, or keep findings for this session in another file (Findings('other.json'))."
            )
        try:
            backup = self._backup(raw)
            saved = f"A copy of it was saved as {str(backup)!r}."
        except OSError as exc:
            saved = f"attnpos could not save a copy of it ({exc}); copy it yourself before changing anything."
        return AttnposError(
            f"The findings file {str(self.path)!r} is corrupt: {problem.detail}. attnpos has not changed it and "
            f"will not write to it, so no note is lost. {saved} To go on, either repair the file by hand (it must "
            f'be JSON of the form {{"format": "{FORMAT}", "findings": [...]}}), or call '
            f"Findings({str(self.path)!r}).recover() to move it aside and start an empty findings file; the notes "
            f"stay readable in the copy."
        )

    def _read(self) -> list[Finding]:
        try:
            raw = self.path.read_bytes()
        except FileNotFoundError:
            return []
        except OSError as exc:
            raise AttnposError(
                f"Cannot read the findings file {str(self.path)!r}: {exc.strerror or exc}. Check that the file is "
                f"readable by you (permissions, a mounted drive) and try again."
            ) from exc
        try:
            return _decode(raw)
        except _Unreadable as problem:
            raise self._unreadable_error(raw, problem) from None

    def all(self) -> list[Finding]:
        """Every finding in the file, in the order they were added. Always re-reads the file."""
        return self._read()

    def get(self, finding_id: str | Finding) -> Finding:
        """The finding with this id; raises :class:`AttnposError` if there is none."""
        fid = self._id(finding_id)
        for finding in self._read():
            if finding.id == fid:
                return finding
        raise self._missing(fid)

    def for_target(self, target: TargetLike) -> list[Finding]:
        """The findings on exactly this target (a head's list does not include its layer's or the model's)."""
        canonical = canonical_target(target)
        return [f for f in self._read() if f.target == canonical]

    def check(self, fingerprint: str | None, texts_hash: str | None = None) -> list[tuple[Finding, bool]]:
        """Every finding, in file order, with whether it is stale for this subject (and texts).

        Returns ``[(finding, stale), ...]``; see :meth:`Finding.is_stale` (a ``None`` or blank fingerprint or texts
        hash counts as not known). Show stale findings as such; never apply them to this subject silently.
        """
        fingerprint = _stamp(fingerprint, "fingerprint")
        texts_hash = _stamp(texts_hash, "texts hash")
        return [(f, f.is_stale(fingerprint, texts_hash)) for f in self._read()]

    # -- changing -----------------------------------------------------------------------------------------------

    @contextmanager
    def _locked(self) -> Iterator[None]:
        try:
            self._lock.acquire()
        except filelock.Timeout:
            raise AttnposError(
                f"Another process has held the lock on the findings file {str(self.path)!r} for more than "
                f"{self._lock.timeout:g} s, so this change was not made. Wait for the other kernel to finish and "
                f"try again (the lock is freed when that process ends)."
            ) from None
        except OSError as exc:
            raise AttnposError(
                f"Cannot lock the findings file: creating {str(self.lock_path)!r} failed ({exc.strerror or exc}). "
                f"The folder must be writable; choose a findings path in a folder you can write to."
            ) from exc
        try:
            yield
        finally:
            self._lock.release()

    def _write(self, findings: list[Finding]) -> None:
        data = _encode(findings)
        try:
            _decode(data)      # the reader's own check: nothing is written that the next read would refuse
        except _Unreadable as exc:
            raise AttnposError(
                f"This change to {str(self.path)!r} was refused: the file would not be readable afterwards "
                f"({exc.detail}). The file on disk is unchanged. Check the values passed and try again."
            ) from None
        try:
            write_atomic(self.path, data, findings=True)
        except OSError as exc:
            raise AttnposError(
                f"Could not save the findings file {str(self.path)!r} ({exc.strerror or exc}); the file on disk is "
                f"unchanged and this change was not made. Check free space and permissions, then try again."
            ) from exc

    def _mutate(self, change: Callable[[list[Finding]], tuple[list[Finding] | None, _T]]) -> _T:
        """Lock, re-read, apply ``change`` (returns the new list, or None for no write), write, unlock."""
        if self.linked:
            self._read()       # a link whose target is not a findings file is refused before a lock is made there
        with self._locked():
            new, result = change(self._read())
            if new is not None:
                self._write(new)
        return result

    @staticmethod
    def _id(finding_id: str | Finding) -> str:
        if isinstance(finding_id, Finding):
            return finding_id.id
        if isinstance(finding_id, str) and finding_id.strip():
            return finding_id.strip()
        raise AttnposError(
            f"A finding id is the short string in Finding.id (e.g. '3f9c0a1b2d4e'), not {finding_id!r}. "
            f"List the findings with store.all() to see their ids."
        )

    def _missing(self, fid: str) -> AttnposError:
        return AttnposError(
            f"There is no finding with id {fid!r} in {str(self.path)!r}; another kernel may have removed it. "
            f"List the findings with store.all() to see the current ids."
        )

    def add(
        self,
        target: TargetLike,
        body: str,
        status: str = "open",
        fingerprint: str | None = None,
        texts_hash: str | None = None,
        author: str | None = None,
    ) -> Finding:
        """Add a finding and return it.

        ``fingerprint`` should be the subject's fingerprint and ``texts_hash`` the hash of the texts the evidence
        came from (a blank string counts as None). A finding without a fingerprint can never be recognised as
        stale, so stamp every finding made on a real subject.

        Adding is idempotent: a finding with the same target, body, fingerprint and texts hash as one in the file
        is that one (returned as it is, or with the new status), so a notebook cell that adds findings can run
        again without doubling them.
        """
        parts = parse_target(target)
        body = _check_text(body, "body", optional=False)
        status = _check_status(status)
        fingerprint = _stamp(fingerprint, "fingerprint")
        texts_hash = _stamp(texts_hash, "texts hash")
        author = _check_text(author, "author", optional=True)

        def change(current: list[Finding]) -> tuple[list[Finding] | None, Finding]:
            # the same note on the same target from the same evidence (fingerprint and texts hash) is already
            # there: a notebook cell run again adds nothing (a new status updates it)
            for k, f in enumerate(current):
                if (f.target, f.body, f.fingerprint, f.texts_hash) == (parts["target"], body, fingerprint, texts_hash):
                    if f.status == status:
                        return None, f
                    again = dataclasses.replace(f, status=status, updated=_now())
                    return current[:k] + [again] + current[k + 1:], again
            taken = {f.id for f in current}
            fid = uuid.uuid4().hex[:12]
            while fid in taken:
                fid = uuid.uuid4().hex[:12]
            now = _now()
            finding = Finding(
                id=fid, target=parts["target"], kind=parts["kind"], stack=parts["stack"], layer=parts["layer"],
                head=parts["head"], status=status, body=body, fingerprint=fingerprint, texts_hash=texts_hash,
                created=now, updated=now, author=author,
            )
            return current + [finding], finding

        return self._mutate(change)

    def update(self, finding_id: str | Finding, *, body: str | None = None, status: str | None = None) -> Finding:
        """Change a finding's body and/or status; returns the finding as saved.

        The target and the stamps (fingerprint, texts hash) never change: a finding re-checked on another
        checkpoint is a new finding. Passing nothing, or the values it already has, writes nothing.
        """
        fid = self._id(finding_id)
        if body is not None:
            body = _check_text(body, "body", optional=False)
        if status is not None:
            status = _check_status(status)

        def change(current: list[Finding]) -> tuple[list[Finding] | None, Finding]:
            for n, finding in enumerate(current):
                if finding.id == fid:
                    break
            else:
                raise self._missing(fid)
            wanted = {k: v for k, v in (("body", body), ("status", status)) if v is not None}
            if all(getattr(finding, k) == v for k, v in wanted.items()):
                return None, finding
            new = dataclasses.replace(finding, **wanted, updated=_now())
            return current[:n] + [new] + current[n + 1:], new

        return self._mutate(change)

    def remove(self, finding_id: str | Finding) -> None:
        """Delete a finding; raises :class:`AttnposError` if there is none with this id."""
        fid = self._id(finding_id)

        def change(current: list[Finding]) -> tuple[list[Finding], None]:
            kept = [f for f in current if f.id != fid]
            if len(kept) == len(current):
                raise self._missing(fid)
            return kept, None

        self._mutate(change)

    def recover(self) -> Path | None:
        """Move an unreadable findings file aside and start afresh with the notes that can still be read; returns
        where the old file went.

        This is the explicit way out after a "corrupt findings file" error: the old bytes are kept at
        ``<name>.corrupt-<timestamp>.json`` (the same copy the error named, when it is still there), and every
        entry of the old file that is still a valid finding is kept in the new file, so recover() never leaves
        fewer notes than a reader could find. Returns None when there is no file. Refuses, with an error, when the
        file is readable (there is nothing to recover), when it is read-only, and when the path is a symbolic link
        (recover() never writes through a link: call it on the real file).
        """
        if self.linked:
            raise AttnposError(
                f"The findings path {str(self.given)!r} is a symbolic link (to {str(self.path)!r}); recover() never "
                f"replaces a file through a link. Check that the target is really your findings file, then call "
                f"Findings({str(self.path)!r}).recover(), or remove the link."
            )
        with self._locked():
            try:
                raw = self.path.read_bytes()
            except FileNotFoundError:
                return None
            except OSError as exc:
                raise AttnposError(
                    f"Cannot read the findings file {str(self.path)!r} ({exc.strerror or exc}), so it was not "
                    f"moved. Check its permissions and try again."
                ) from exc
            try:
                _decode(raw)
            except _Unreadable:
                pass
            else:
                raise AttnposError(
                    f"The findings file {str(self.path)!r} is readable, so recover() left it alone (it only moves "
                    f"aside files that cannot be read). To start afresh, remove the findings one by one or use "
                    f"another file name."
                )
            kept = _salvage(raw)
            try:
                backup = self._existing_backup(raw)
                if backup is None:
                    backup = self._backup(raw)
                self._write(kept)
            except OSError as exc:
                raise AttnposError(
                    f"Could not move the unreadable findings file {str(self.path)!r} aside ({exc.strerror or exc}). "
                    f"Copy it somewhere safe and delete it by hand; attnpos then starts an empty file."
                ) from exc
            return backup

    # -- export -------------------------------------------------------------------------------------------------

    def to_json(self) -> dict[str, Any]:
        """All findings as a dict in the file's format (``{"format": ..., "findings": [...]}``)."""
        return {"format": FORMAT, "findings": [f.to_dict() for f in self._read()]}

    def to_markdown(self, fingerprint: str | None = None, texts_hash: str | None = None) -> str:
        """All findings as a Markdown table, grouped by target (model, then layers and their heads).

        With ``fingerprint`` (and optionally ``texts_hash``), the *stale* column says whether each finding was made
        on another checkpoint or other texts (``unstamped`` for findings with no fingerprint); without it (None or
        blank) the column reads ``not checked``. Bodies are escaped so
        that ``|``, line breaks and HTML cannot break the table or inject markup.
        """
        fingerprint = _stamp(fingerprint, "fingerprint")
        texts_hash = _stamp(texts_hash, "texts hash")
        findings = self._read()
        order = sorted(range(len(findings)), key=lambda n: (
            _target_sort_key(findings[n].kind, findings[n].stack, findings[n].layer, findings[n].head), n))
        lines = ["# attnpos findings", ""]
        where = f"File: {_md_cell(safe_text(str(self.path)))}; {len(findings)} finding{'' if len(findings) == 1 else 's'}."
        if fingerprint is None:
            lines.append(f"{where} Staleness not checked (no subject fingerprint given).")
        else:
            against = f"subject fingerprint {_md_cell(fingerprint)}"
            if texts_hash is not None:
                against += f" and texts hash {_md_cell(texts_hash)}"
            n_stale = sum(f.is_stale(fingerprint, texts_hash) for f in findings)
            lines.append(f"{where} Checked against {against}: {n_stale} stale (made on another checkpoint or "
                         f"other texts; re-check before relying on them).")
        lines += ["", _CAUTION, ""]
        if not findings:
            lines.append("No findings yet.")
            return "\n".join(lines) + "\n"
        lines.append("| target | status | stale | note | author | fingerprint | updated (UTC) | id |")
        lines.append("|---|---|---|---|---|---|---|---|")
        for n in order:
            f = findings[n]
            if fingerprint is None:
                stale = "not checked"
            elif f.is_stale(fingerprint, texts_hash):
                stale = "**stale**"
            else:
                stale = "no" if f.stamped else "unstamped"
            stamp = "" if f.fingerprint is None else f.fingerprint[:12] + ("…" if len(f.fingerprint) > 12 else "")
            cells = [f.target, f.status, stale, f.body, f.author or "", stamp,
                     f.updated[:19].replace("T", " "), f.id]
            lines.append("| " + " | ".join(_md_cell(c) if c else "" for c in cells) + " |")
        return "\n".join(lines) + "\n"

    def export(self, path: str | os.PathLike[str], *, fingerprint: str | None = None,
               texts_hash: str | None = None) -> Path:
        """Write the findings to ``path``: Markdown for ``.md``, the findings JSON format for ``.json``.

        A ``.json`` export is itself a findings file (``Findings(exported).all()`` gives the same findings).
        ``fingerprint`` and ``texts_hash`` fill the stale column of a Markdown export. Returns the path written.
        """
        out = Path(os.fspath(path)).expanduser()
        suffix = out.suffix.lower()
        if suffix not in (".md", ".json"):
            raise AttnposError(
                f"Cannot export findings to {str(out)!r}: attnpos writes Markdown (.md) or JSON (.json) and picks "
                f"by the file name's ending. Give a path ending in .md or .json."
            )
        if out.resolve() == self.path:
            raise AttnposError(
                f"Cannot export findings to {str(out)!r}: that is the findings file itself. Give another path."
            )
        if not out.resolve().parent.is_dir():
            raise AttnposError(
                f"Cannot export findings to {str(out)!r}: the folder does not exist. Create it first."
            )
        if suffix == ".md":
            data = self.to_markdown(fingerprint, texts_hash).encode("utf-8")
        else:
            data = _encode(self._read())
        try:
            write_atomic(out.resolve(), data, findings=suffix == ".json")  # a JSON export is a findings file
        except OSError as exc:
            raise AttnposError(
                f"Could not write the export {str(out)!r} ({exc.strerror or exc}). Check free space and "
                f"permissions, then try again."
            ) from exc
        return out
