"""The sweep's store: a folder with one result per checkpoint, written atomically as each one finishes.

Layout (every file goes through :func:`attnpos.files.write_atomic`)::

    STORE/
      store.json                 what the store holds: the texts' digest and the scan settings (fixed at creation)
      entries/<key>/heads.parquet   the checkpoint's head table (pandas/pyarrow)
      entries/<key>/entry.json      the rest: which checkpoint, its step, the scan's JSON without its head rows,
                                    the Parquet file's digest; written last, so it marks the entry as complete
      seen/<stamp>.json          which entry a checkpoint folder (by the stamp of its files) resolved to; written
                                 after the entry, so a checkpoint is done when both are there
      failed/<stamp>.json        a checkpoint that could not be scanned, with its error
      loss.json                  training loss curves of the swept runs (trainer_state.json or the reference
                                 trainer's record)
      index.json                 a listing for people and tools, rebuilt from the files above after every change

``<key>`` is the checkpoint's fingerprint (config + weights, :func:`attnpos.subject.fingerprint`) and the texts'
hash (their token ids), so a result is found again whatever folder the checkpoint sits in. The index is never
trusted: :meth:`SweepStore.entries` reads the entry files themselves, and an entry whose Parquet file is missing or
does not match its digest does not count. A sweep killed at any moment therefore leaves a store whose complete
entries are all valid and whose other checkpoints are simply not done yet.

Nothing here imports torch or the distributed engine.

>>> import tempfile, pandas as pd
>>> store = SweepStore.open(tempfile.mkdtemp() + "/s", {"texts_digest": "t", "settings": {"n_boot": 0}})
>>> table = pd.DataFrame({"stack": ["main"], "layer": [0], "head": [0], "role": ["local"], "tags": [["local"]]})
>>> _ = store.write_entry("abc-123", {"source": "run/checkpoint-5", "step": 5}, table, {"model": {}})
>>> [e["step"] for e in store.entries()], store.table("abc-123")["role"].tolist()
([5], ['local'])
"""

from __future__ import annotations

import hashlib
import io
import json
import os
import time
from pathlib import Path

from .core.protocol import json_safe, read_json
from .errors import AttnposError
from .files import write_atomic

STORE_SCHEMA = "attnpos.sweep-store/1"
ENTRY_SCHEMA = "attnpos.sweep-entry/1"
FAILED_SCHEMA = "attnpos.sweep-failed/1"
SEEN_SCHEMA = "attnpos.sweep-seen/1"


def digest(data: bytes | str, size: int = 12) -> str:
    if isinstance(data, str):
        data = data.encode("utf-8")
    return hashlib.blake2b(data, digest_size=size).hexdigest()


def source_stamp(folder: str | os.PathLike) -> str:
    """A cheap stamp of a checkpoint folder's files (names, sizes, modification times): equal stamps mean the
    folder was not touched, so its stored result can be reused without loading the weights."""
    p = Path(folder).resolve()
    parts = [str(p)]
    try:
        for f in sorted(p.iterdir()):
            if f.is_file():
                st = f.stat()
                parts.append(f"{f.name}:{st.st_size}:{st.st_mtime_ns}")
    except OSError:
        parts.append("unreadable")
    return digest("|".join(parts), 16)


def _dump(data) -> str:
    return json.dumps(json_safe(data), indent=1, ensure_ascii=False, allow_nan=False) + "\n"


class SweepStore:
    """A sweep's folder (see the module doc). Open it with :meth:`open`."""

    def __init__(self, root: Path, meta: dict):
        self.root = Path(root)
        self.meta = meta

    # ------------------------------------------------------------------ opening
    @classmethod
    def check(cls, root: str | os.PathLike, meta: dict) -> dict | None:
        """Refuse a ``root`` that cannot hold this sweep (a file, a foreign folder, a store of other texts or
        settings) without writing anything; returns the existing store's description, or None for a new one."""
        root = Path(root)
        if root.exists() and not root.is_dir():
            raise AttnposError(f"The sweep store {root} is a file; --out takes a folder (new, or one an earlier "
                               "sweep wrote).")
        here = root / "store.json"
        if root.is_dir() and any(root.iterdir()) and not here.is_file():
            raise AttnposError(f"The folder {root} is not empty and is not a sweep store (no store.json). Give a new "
                               "folder, or the folder of an earlier sweep to resume it.")
        if not here.is_file():
            return None
        old = read_json(here, "sweep store")
        if not isinstance(old, dict) or old.get("schema") != STORE_SCHEMA:
            raise AttnposError(f"{here} is not a sweep store file this attnpos reads (schema "
                               f"{old.get('schema') if isinstance(old, dict) else None!r}). Give a new folder.")
        for k in ("texts_digest", "settings"):
            if json_safe(old.get(k)) != json_safe(meta.get(k)):
                raise AttnposError(
                    f"The sweep store {root} was made with other {'texts' if k == 'texts_digest' else 'scan settings'} "
                    f"({k}: {old.get(k)!r}, now {meta.get(k)!r}). One store holds one set of texts and settings, "
                    "so its results stay comparable: give another --out, or the same texts and settings to "
                    "resume it.")
        return old

    @classmethod
    def open(cls, root: str | os.PathLike, meta: dict) -> "SweepStore":
        """Open the store at ``root`` (created if missing). ``meta`` (``texts_digest``, ``settings``) must match
        what an existing store was made with: results of other texts or settings are not mixed in one store."""
        root = Path(root)
        old = cls.check(root, meta)
        if old is not None:
            return cls(root, old)
        root.mkdir(parents=True, exist_ok=True)
        body = {"schema": STORE_SCHEMA, **meta, "created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())}
        write_atomic(root / "store.json", _dump(body))
        return cls(root, body)

    @classmethod
    def read(cls, root: str | os.PathLike) -> "SweepStore":
        """An existing store, whatever its texts and settings (for reading results)."""
        here = Path(root) / "store.json"
        if not here.is_file():
            raise AttnposError(f"{root} is not a sweep store (no store.json). Give the --out folder of a sweep.")
        meta = read_json(here, "sweep store")
        if not isinstance(meta, dict) or meta.get("schema") != STORE_SCHEMA:
            raise AttnposError(f"{here} is not a sweep store file this attnpos reads. Run the sweep again.")
        return cls(Path(root), meta)

    # ------------------------------------------------------------------ writing
    def write_entry(self, key: str, point: dict, heads, scan_json: dict, **extra) -> Path:
        """One checkpoint's result: the head table as Parquet, then the entry JSON that completes it."""
        folder = self.root / "entries" / key
        folder.mkdir(parents=True, exist_ok=True)
        buf = io.BytesIO()
        table = heads.reset_index(drop=True).copy()
        # columns of mappings (e.g. each role tag's support) go in as JSON text: Parquet cannot hold an empty struct
        as_json = [c for c in table.columns if table[c].map(lambda v: isinstance(v, dict)).any()]
        for c in as_json:
            table[c] = table[c].map(lambda v: json.dumps(v, sort_keys=True) if isinstance(v, dict) else None)
        table.to_parquet(buf, index=False)
        data = buf.getvalue()
        write_atomic(folder / "heads.parquet", data)
        entry = {"schema": ENTRY_SCHEMA, "key": key, **point, "parquet_digest": digest(data, 16), "json_columns": as_json,
                 "written": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()), **extra, "scan": scan_json}
        path = write_atomic(folder / "entry.json", _dump(entry))
        self.clear_failure(point.get("stamp"))
        return path

    def write_seen(self, point: dict, key: str) -> Path:
        """Record that the checkpoint ``point`` (by its stamp) has the result ``key``."""
        folder = self.root / "seen"
        folder.mkdir(parents=True, exist_ok=True)
        return write_atomic(folder / f"{point['stamp']}.json", _dump({"schema": SEEN_SCHEMA, **point, "key": key}))

    def write_failure(self, point: dict, error: str) -> Path:
        folder = self.root / "failed"
        folder.mkdir(parents=True, exist_ok=True)
        body = {"schema": FAILED_SCHEMA, **point, "error": error,
                "written": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())}
        return write_atomic(folder / f"{point['stamp']}.json", _dump(body))

    def clear_failure(self, stamp: str | None) -> None:
        if stamp:
            try:
                (self.root / "failed" / f"{stamp}.json").unlink()
            except FileNotFoundError:
                pass

    def write_loss(self, curves: dict) -> None:
        """Keep the training loss curves beside the results (merged with what the store already holds)."""
        old = self.loss()
        old.update(curves)
        write_atomic(self.root / "loss.json", _dump({"schema": "attnpos.sweep-loss/1", "runs": old}))

    # ------------------------------------------------------------------ reading
    def entries(self) -> list[dict]:
        """Every complete entry (its JSON without the scan), read from the files; incomplete ones are skipped."""
        out = []
        for f in sorted((self.root / "entries").glob("*/entry.json")):
            e = self._entry(f)
            if e is not None:
                e = dict(e)
                e.pop("scan", None)
                out.append(e)
        return sorted(out, key=lambda e: (e.get("step") is None, e.get("step") or 0, e.get("name") or ""))

    def _entry(self, f: Path) -> dict | None:
        try:
            e = json.loads(f.read_text(encoding="utf-8"))
            data = (f.parent / "heads.parquet").read_bytes()
        except (OSError, ValueError, UnicodeDecodeError):
            return None
        if not isinstance(e, dict) or e.get("schema") != ENTRY_SCHEMA or e.get("key") != f.parent.name:
            return None
        if e.get("parquet_digest") != digest(data, 16):
            return None
        return e

    def entry(self, key: str) -> dict:
        e = self._entry(self.root / "entries" / key / "entry.json")
        if e is None:
            raise AttnposError(f"The sweep store {self.root} has no complete result {key!r}.")
        return e

    def table(self, key: str):
        """The head table of one entry."""
        import pandas as pd

        e = self.entry(key)
        table = pd.read_parquet(self.root / "entries" / key / "heads.parquet")
        for c in e.get("json_columns") or []:
            if c in table:
                table[c] = table[c].map(lambda v: json.loads(v) if isinstance(v, str) else None)
        return table

    def _seen(self, f: Path) -> dict | None:
        try:
            e = json.loads(f.read_text(encoding="utf-8"))
        except (OSError, ValueError, UnicodeDecodeError):
            return None
        if not isinstance(e, dict) or e.get("schema") != SEEN_SCHEMA or not isinstance(e.get("key"), str):
            return None
        if self._entry(self.root / "entries" / e["key"] / "entry.json") is None:
            return None
        return e

    def done(self, stamp: str) -> str | None:
        """The key of the stored result of the checkpoint with this stamp, or None when it is not done."""
        e = self._seen(self.root / "seen" / f"{stamp}.json")
        return e["key"] if e else None

    def seen(self) -> list[dict]:
        """Every checkpoint that has a complete result (its point, with the result's key)."""
        return [e for e in (self._seen(f) for f in sorted((self.root / "seen").glob("*.json"))) if e]

    def failures(self) -> list[dict]:
        out = []
        for f in sorted((self.root / "failed").glob("*.json")):
            try:
                e = json.loads(f.read_text(encoding="utf-8"))
            except (OSError, ValueError, UnicodeDecodeError):
                continue
            if isinstance(e, dict) and e.get("schema") == FAILED_SCHEMA:
                out.append(e)
        return out

    def loss(self) -> dict:
        f = self.root / "loss.json"
        if not f.is_file():
            return {}
        try:
            data = json.loads(f.read_text(encoding="utf-8"))
        except (OSError, ValueError, UnicodeDecodeError):
            return {}
        return dict(data.get("runs") or {}) if isinstance(data, dict) else {}

    def loss_for(self, runs) -> dict:
        every = self.loss()
        return {r: every[r] for r in sorted(runs) if r in every}

    def scan(self, key: str):
        """One entry as a :class:`~attnpos.results.scan.Scan` (head table from Parquet, the rest from JSON)."""
        from .core import columns, keys as keys_mod
        from .results.scan import Scan

        e = self.entry(key)
        data = dict(e["scan"])
        profiles = data.pop("profiles", None) or []
        rows = self.table(key).to_dict("records")
        heads = []
        for i, r in enumerate(rows):
            r["tags"] = list(r.get("tags") if r.get("tags") is not None else [])
            h = {"key": keys_mod.head_key(r["stack"], r["layer"], r["head"]), **columns.to_entry(r)}
            if i < len(profiles) and profiles[i]:
                h["profile"] = profiles[i]
            heads.append(h)
        data["heads"] = heads
        return Scan.from_json(data)

    def rebuild_index(self) -> Path:
        """Write ``index.json`` from the entry and failure files (it is a listing; nothing reads it back)."""
        body = {"schema": "attnpos.sweep-index/1",
                "entries": [{k: e.get(k) for k in ("key", "name", "source", "step", "stamp")} for e in self.entries()],
                "checkpoints": [{k: e.get(k) for k in ("name", "source", "step", "stamp", "key")} for e in self.seen()],
                "failed": [{k: e.get(k) for k in ("name", "source", "step", "error")} for e in self.failures()]}
        return write_atomic(self.root / "index.json", _dump(body))
