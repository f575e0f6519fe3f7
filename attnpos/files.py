"""Writing files so that a reader never sees half of one: every file attnpos writes goes through here.

:func:`write_atomic` writes to a uniquely named temporary file in the same folder, fsyncs it, keeps the old file's
permissions and renames it over the target (``os.replace`` is atomic on one file system), then fsyncs the folder.
A failure part-way (a full disk, an encoding error, Ctrl-C) leaves the previous file as it was and no temporary
behind. :func:`write_new` never replaces anything (backups).

>>> import tempfile, pathlib
>>> p = pathlib.Path(tempfile.mkdtemp()) / "out.json"
>>> write_atomic(p, '{"a": 1}').read_text()
'{"a": 1}'
"""

from __future__ import annotations

import os
import stat
import uuid
from contextlib import suppress
from pathlib import Path


def fsync_dir(folder: Path) -> None:
    """Make a rename in ``folder`` durable (best effort: not every platform lets a folder be opened)."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def temp_copy(path: Path, data: bytes) -> Path:
    """``data`` written and fsynced to a new, uniquely named temporary file beside ``path`` (same folder, so a
    rename is atomic)."""
    tmp = path.parent / f".{path.name}.{uuid.uuid4().hex[:12]}.tmp"
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
    except BaseException:
        with suppress(OSError):
            os.unlink(tmp)
        raise
    return tmp


def write_atomic(path: str | os.PathLike, data: bytes | str) -> Path:
    """Write ``data`` (text is encoded as UTF-8) to ``path`` so that readers see the old file or the new one, never
    a part of either. Returns the path."""
    path = Path(path)
    if isinstance(data, str):
        data = data.encode("utf-8")
    try:
        mode = stat.S_IMODE(path.stat().st_mode)
    except FileNotFoundError:
        mode = None
    tmp = temp_copy(path, data)
    try:
        if mode is not None:
            os.chmod(tmp, mode)
        os.replace(tmp, path)
    except BaseException:
        with suppress(OSError):
            os.unlink(tmp)
        raise
    fsync_dir(path.parent)
    return path


def write_new(path: str | os.PathLike, data: bytes | str) -> Path:
    """Write ``data`` to a new file at ``path``; raises ``FileExistsError`` rather than replace anything."""
    path = Path(path)
    if isinstance(data, str):
        data = data.encode("utf-8")
    tmp = temp_copy(path, data)
    try:
        os.link(tmp, path)  # fails if path exists: a backup is never overwritten
    finally:
        with suppress(OSError):
            os.unlink(tmp)
    fsync_dir(path.parent)
    return path
