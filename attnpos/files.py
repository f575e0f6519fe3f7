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
import re
import stat
import uuid
from contextlib import suppress
from pathlib import Path

from .errors import AttnposError

_FINDINGS_START = re.compile(rb'\A\s*\{\s*"format"\s*:\s*"attnpos\.findings/')


def is_findings_file(path: str | os.PathLike) -> bool:
    """Whether ``path`` is an existing attnpos findings file (recognised by its first bytes, as the findings store
    writes them: ``{"format": "attnpos.findings/…``)."""
    try:
        with open(path, "rb") as fh:
            return bool(_FINDINGS_START.match(fh.read(4096)))
    except OSError:
        return False


def check_writable(path: Path, *, findings: bool = False) -> None:
    """Refuse, before anything is written, to replace a read-only file, or a findings file with anything else
    (``findings=True``: the findings store itself is writing)."""
    try:
        st = path.stat()
    except OSError:
        return
    if stat.S_ISREG(st.st_mode) and not st.st_mode & 0o222:
        raise AttnposError(f"{path} is read-only (mode {stat.S_IMODE(st.st_mode):o}), so attnpos did not replace "
                           "it. Make it writable (chmod u+w) if you mean to overwrite it, or write to another path.")
    if not findings and is_findings_file(path):
        raise AttnposError(f"{path} is an attnpos findings file; writing anything else there would destroy its "
                           "notes, so attnpos left it unchanged. Write to another path.")


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


def safe_text(text: str) -> str:
    r"""``text`` with the bytes of a name that is not UTF-8 (Python's surrogate escapes) shown as ``\xNN``, so a
    file name in another encoding can be written into JSON, HTML or Markdown.

    >>> print(safe_text(b"caf\xe9.txt".decode("utf-8", "surrogateescape")))
    caf\xe9.txt
    """
    try:
        return text.encode("utf-8", "surrogateescape").decode("utf-8", "backslashreplace")
    except UnicodeEncodeError:
        return text.encode("utf-8", "backslashreplace").decode("utf-8")


def encode_text(data: bytes | str, path: Path) -> bytes:
    """Text as UTF-8; a lone surrogate (from a file name that is not UTF-8) is an error before anything is written."""
    if isinstance(data, bytes):
        return data
    try:
        return data.encode("utf-8")
    except UnicodeEncodeError as exc:
        raise AttnposError(f"Could not write {path}: the content holds a character that is not valid UTF-8 "
                           f"({exc.object[exc.start:exc.end]!a} at {exc.start}), usually from a file name in another "
                           "encoding. Rename the file to UTF-8; the old file was left as it was.") from None


def write_atomic(path: str | os.PathLike, data: bytes | str, *, findings: bool = False) -> Path:
    """Write ``data`` (text is encoded as UTF-8) to ``path`` so that readers see the old file or the new one, never
    a part of either. Returns the path.

    Refused with an :class:`~attnpos.errors.AttnposError` (nothing written): a read-only target, and a findings
    file as the target unless ``findings=True`` (only the findings store passes it). A symlink at ``path`` is
    replaced by the new file, never written through."""
    path = Path(path)
    data = encode_text(data, path)
    check_writable(path, findings=findings)
    try:
        mode = stat.S_IMODE(path.lstat().st_mode) if not path.is_symlink() else None
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
    data = encode_text(data, path)
    tmp = temp_copy(path, data)
    try:
        os.link(tmp, path)  # fails if path exists: a backup is never overwritten
    finally:
        with suppress(OSError):
            os.unlink(tmp)
    fsync_dir(path.parent)
    return path


def move_files_into(staging: str | os.PathLike, folder: str | os.PathLike) -> list[Path]:
    """Move every file that a library wrote into ``staging`` (a temporary folder inside ``folder``, e.g. by
    ``save_pretrained``) into ``folder``: each is fsynced and renamed over its namesake, so every file of
    ``folder`` is the old one or the new one, never a part. Returns the files moved."""
    staging, folder = Path(staging), Path(folder)
    moved = []
    for f in sorted(staging.iterdir()):
        if not f.is_file():
            continue
        fd = os.open(f, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)
        target = folder / f.name
        check_writable(target)
        os.replace(f, target)
        moved.append(target)
    fsync_dir(folder)
    return moved
