"""Tests for the findings store (attnpos/findings.py): persistence, locking, corruption, staleness, export.

External check: the Markdown export is read back with the table rule of the GitHub Flavored Markdown spec
(0.29-gfm, "Tables (extension)"), written from the spec in ``_gfm_cells``; the rest is the store's own behaviour."""

from __future__ import annotations

import doctest
import json
import multiprocessing
import os
import re
import tempfile
from pathlib import Path

import filelock
import pytest

import tiny
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import attnpos.findings as findings_module
from attnpos.errors import AttnposError
from attnpos.findings import FORMAT, STATUSES, Finding, Findings, canonical_target, parse_target


@pytest.fixture
def path(tmp_path: Path) -> Path:
    return tmp_path / "attnpos-findings.json"


def _listing(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir())


# ---------------------------------------------------------------------------------------------------------------
# Round trip, restart, basic operations


def test_round_trip_through_the_file_and_a_new_store(path: Path) -> None:
    store = Findings(path)
    assert not path.exists()  # created on the first write, not before
    assert store.all() == []
    made = store.add("L3.H2", "looks one back", status="supported", fingerprint="fp-a", texts_hash="tx-1",
                     author="ana")
    assert path.exists()
    doc = json.loads(path.read_text(encoding="utf-8"))
    assert doc["format"] == FORMAT
    assert doc["findings"] == [made.to_dict()]

    again = Findings(str(path))  # a "restarted kernel": a fresh object, path given as str
    [read] = again.all()
    assert read == made
    assert (read.target, read.kind, read.stack, read.layer, read.head) == ("L3.H2", "head", "main", 3, 2)
    assert (read.status, read.body, read.fingerprint, read.texts_hash, read.author) == (
        "supported", "looks one back", "fp-a", "tx-1", "ana")
    assert re.fullmatch(r"[0-9a-f]{12}", read.id)
    assert read.created == read.updated and read.created.endswith("+00:00")
    assert again.get(made.id) == made
    assert Finding.from_dict(made.to_dict()) == made


def test_every_read_sees_other_writers(path: Path) -> None:
    first, second = Findings(path), Findings(path)
    a = first.add("model", "one")
    assert [f.id for f in second.all()] == [a.id]
    b = second.add("L0", "two")
    assert [f.id for f in first.all()] == [a.id, b.id]  # file order = order added
    second.remove(a.id)
    assert [f.id for f in first.all()] == [b.id]


def test_relative_path_keeps_working_after_the_notebook_changes_folder(tmp_path: Path, monkeypatch) -> None:
    (tmp_path / "elsewhere").mkdir()
    monkeypatch.chdir(tmp_path)
    store = Findings("notes.json")
    monkeypatch.chdir(tmp_path / "elsewhere")
    store.add("L1", "still the same file")
    assert (tmp_path / "notes.json").exists()
    assert not (tmp_path / "elsewhere" / "notes.json").exists()


def test_symlinked_file_is_written_through_not_replaced(tmp_path: Path) -> None:
    real = tmp_path / "real.json"
    link = tmp_path / "link.json"
    Findings(real).add("model", "first")
    link.symlink_to(real)
    from attnpos.findings import LinkNotice

    with pytest.warns(LinkNotice, match="symbolic link"):      # resolved, and said so
        Findings(link).add("model", "second")
    assert link.is_symlink()
    assert [f.body for f in Findings(real).all()] == ["first", "second"]


def test_missing_folder_and_folder_path_are_refused(tmp_path: Path) -> None:
    with pytest.raises(AttnposError, match="does not exist"):
        Findings(tmp_path / "no-such-folder" / "f.json")
    with pytest.raises(AttnposError, match="is a folder"):
        Findings(tmp_path)


def test_update_and_remove(path: Path) -> None:
    store = Findings(path)
    a = store.add("L2.H1", "first draft", fingerprint="fp")
    b = store.add("L2", "layer note")
    changed = store.update(a.id, body="second draft")
    assert changed.body == "second draft" and changed.status == "open"
    assert changed.created == a.created and changed.updated > a.updated
    assert (changed.id, changed.target, changed.fingerprint) == (a.id, a.target, a.fingerprint)
    changed = store.update(a, status="ruled-out")  # a Finding works as well as its id
    assert (changed.body, changed.status) == ("second draft", "ruled-out")
    assert Findings(path).get(a.id) == changed

    before = path.read_bytes()
    assert store.update(a.id) == changed                      # nothing asked: nothing written
    assert store.update(a.id, status="ruled-out") == changed  # same value: nothing written
    assert path.read_bytes() == before

    store.remove(a.id)
    assert [f.id for f in Findings(path).all()] == [b.id]
    for call in (lambda: store.remove(a.id), lambda: store.get(a.id), lambda: store.update(a.id, body="x")):
        with pytest.raises(AttnposError, match=a.id):
            call()
    with pytest.raises(AttnposError, match="finding id"):
        store.get("")


def test_ids_are_distinct(path: Path) -> None:
    store = Findings(path)
    ids = [store.add("model", str(n)).id for n in range(60)]
    assert len(set(ids)) == 60 == len(store.all())


def test_adding_the_same_finding_again_adds_nothing(path: Path) -> None:
    # a notebook cell that records findings, run three times, leaves them once (demo notebook 01 did 2 → 4 → 6)
    store = Findings(path)
    for _ in range(3):
        a = store.add("L1.H2", "follows distance", status="open", fingerprint="fp", texts_hash="tx")
        b = store.add("model", "relative everywhere", status="supported", fingerprint="fp", texts_hash="tx")
    assert [f.id for f in store.all()] == [a.id, b.id]
    # a new status updates that finding in place; other evidence or another body is another finding
    c = store.add("L1.H2", "follows distance", status="supported", fingerprint="fp", texts_hash="tx")
    assert c.id == a.id and store.get(a.id).status == "supported" and len(store.all()) == 2
    store.add("L1.H2", "follows distance", fingerprint="fp-other", texts_hash="tx")
    store.add("L1.H2", "follows distance, and the shift test agrees", fingerprint="fp", texts_hash="tx")
    assert len(store.all()) == 4


# ---------------------------------------------------------------------------------------------------------------
# Validation


@pytest.mark.parametrize("status", ["confirmed", "", "OPEN?", None, 3, "ruled out maybe"])
def test_invalid_status_is_refused_and_nothing_written(path: Path, status) -> None:
    store = Findings(path)
    with pytest.raises(AttnposError) as info:
        store.add("model", "x", status=status)
    assert all(s in str(info.value) for s in STATUSES)
    assert not path.exists()
    f = store.add("model", "x")
    before = path.read_bytes()
    if status is not None:  # update(status=None) means "leave the status as it is"
        with pytest.raises(AttnposError, match="status"):
            store.update(f.id, status=status)
    assert path.read_bytes() == before


@pytest.mark.parametrize("given_status, stored", [("Supported", "supported"), ("ruled out", "ruled-out"),
                                                  (" ruled_out ", "ruled-out"), ("open", "open")])
def test_status_spelling_is_normalised(path: Path, given_status: str, stored: str) -> None:
    assert Findings(path).add("model", "x", status=given_status).status == stored


@pytest.mark.parametrize("target, canonical, parts", [
    ("model", "model", ("model", "main", None, None)),
    (" Model ", "model", ("model", "main", None, None)),
    ("L3", "L3", ("layer", "main", 3, None)),
    ("l03", "L3", ("layer", "main", 3, None)),
    ("L3.H2", "L3.H2", ("head", "main", 3, 2)),
    ("main:l3 . h2", "L3.H2", ("head", "main", 3, 2)),
    ("decoder:L1.H0", "decoder:L1.H0", ("head", "decoder", 1, 0)),
    ("Encoder:L5", "encoder:L5", ("layer", "encoder", 5, None)),
    ({"kind": "head", "stack": "main", "layer": 3, "head": 2}, "L3.H2", ("head", "main", 3, 2)),
    ({"kind": "layer", "layer": 0}, "L0", ("layer", "main", 0, None)),
    ({"kind": "model", "stack": "main", "layer": None, "head": None}, "model", ("model", "main", None, None)),
    ({"kind": "head", "stack": "decoder", "layer": 1, "head": 7}, "decoder:L1.H7", ("head", "decoder", 1, 7)),
])
def test_targets_parse_to_canonical_form(path: Path, target, canonical: str, parts: tuple) -> None:
    assert canonical_target(target) == canonical
    got = parse_target(target)
    assert (got["kind"], got["stack"], got["layer"], got["head"]) == parts
    f = Findings(path).add(target, "x")
    assert (f.target, f.kind, f.stack, f.layer, f.head) == (canonical, *parts)


def test_numpy_style_integers_are_accepted_in_dict_targets() -> None:
    np = pytest.importorskip("numpy")
    assert canonical_target({"kind": "head", "layer": np.int64(4), "head": np.int32(1)}) == "L4.H1"


@pytest.mark.parametrize("target", [
    "", "H2", "L", "L-1", "L3.H", "L3.H2.H1", "layer3", "L3 H2", "decoder:model", ":L1", "3", "L٣",
    {"layer": 1}, {"kind": "head", "layer": 1}, {"kind": "layer", "layer": 1, "head": 0},
    {"kind": "model", "layer": 0}, {"kind": "model", "stack": "decoder"}, {"kind": "layer", "layer": -1},
    {"kind": "layer", "layer": True}, {"kind": "layer", "layer": 1.5}, {"kind": "layer", "layer": "1"},
    {"kind": "head", "layer": 1, "head": 2, "colour": "red"}, {"kind": "layer", "layer": 1, "stack": "Not ok!"},
    3, None, ("L", 3),
])
def test_invalid_targets_are_refused_and_nothing_written(path: Path, target) -> None:
    store = Findings(path)
    with pytest.raises(AttnposError, match="target"):
        store.add(target, "x")
    with pytest.raises(AttnposError, match="target"):
        store.for_target(target)
    assert not path.exists()


@pytest.mark.parametrize("kwargs, word", [
    ({"body": None}, "body"), ({"body": 12}, "body"), ({"body": "bad \ud800 text"}, "surrogate"),
    ({"fingerprint": 5}, "fingerprint"), ({"texts_hash": 0.5}, "texts hash"), ({"author": 1}, "author"),
    ({"fingerprint": "fp\udc80"}, "surrogate"),
])
def test_invalid_fields_are_refused(path: Path, kwargs: dict, word: str) -> None:
    args = {"target": "model", "body": "x", **kwargs}
    with pytest.raises(AttnposError, match=word):
        Findings(path).add(**args)
    assert not path.exists()


def test_for_target_matches_exactly_and_accepts_any_spelling(path: Path) -> None:
    store = Findings(path)
    head = store.add("L1.H0", "head")
    store.add("L1", "layer")
    store.add("model", "model")
    dec = store.add("decoder:L1.H0", "decoder head")
    assert store.for_target("l1.h0") == [head]
    assert store.for_target({"kind": "head", "layer": 1, "head": 0}) == [head]
    assert store.for_target({"kind": "head", "stack": "decoder", "layer": 1, "head": 0}) == [dec]
    assert [f.body for f in store.for_target("L1")] == ["layer"]
    assert store.for_target("L7.H7") == []


# ---------------------------------------------------------------------------------------------------------------
# Staleness


def test_stale_by_fingerprint(path: Path) -> None:
    store = Findings(path)
    here = store.add("L0.H0", "made here", fingerprint="fp-here")
    there = store.add("L0.H0", "made on another checkpoint", fingerprint="fp-there")
    unstamped = store.add("L0.H0", "no stamp")
    assert dict((f.id, s) for f, s in store.check("fp-here")) == {here.id: False, there.id: True,
                                                                   unstamped.id: False}
    assert dict((f.id, s) for f, s in store.check("fp-there")) == {here.id: True, there.id: False,
                                                                    unstamped.id: False}
    assert [f for f, _ in store.check("fp-here")] == store.all()
    assert not unstamped.stamped and here.stamped


def test_stale_by_texts_hash_only_when_both_sides_have_one(path: Path) -> None:
    store = Findings(path)
    with_hash = store.add("L2", "on texts A", fingerprint="fp", texts_hash="texts-A")
    without = store.add("L2", "texts unknown", fingerprint="fp")
    assert with_hash.is_stale("fp", "texts-B") is True
    assert with_hash.is_stale("fp", "texts-A") is False
    assert with_hash.is_stale("fp") is False            # caller has no hash: judged on the fingerprint
    assert without.is_stale("fp", "texts-B") is False   # finding has no hash: judged on the fingerprint
    assert with_hash.is_stale("other", "texts-A") is True
    got = {f.id: s for f, s in store.check("fp", "texts-B")}
    assert got == {with_hash.id: True, without.id: False}


@pytest.mark.parametrize("unknown", [None, "", "  "])
def test_an_unknown_subject_makes_every_stamped_finding_stale(path: Path, unknown) -> None:
    store = Findings(path)
    stamped = store.add("model", "x", fingerprint="fp", texts_hash="t")
    unstamped = store.add("model", "y", fingerprint=unknown, texts_hash=unknown)  # blank stamps count as none
    assert (unstamped.fingerprint, unstamped.texts_hash) == (None, None)
    assert {f.id: s for f, s in store.check(unknown, unknown)} == {stamped.id: True, unstamped.id: False}
    assert stamped.is_stale(unknown) and not unstamped.is_stale(unknown)
    assert stamped.is_stale("fp", unknown) is False  # an unknown texts hash is not compared


@pytest.mark.parametrize("bad", [7, b"fp", ["fp"]])
def test_stamps_must_be_text(path: Path, bad) -> None:
    store = Findings(path)
    f = store.add("model", "x", fingerprint="fp")
    with pytest.raises(AttnposError, match="fingerprint"):
        store.check(bad)
    with pytest.raises(AttnposError, match="fingerprint"):
        f.is_stale(bad)
    with pytest.raises(AttnposError, match="texts hash"):
        store.check("fp", bad)
    with pytest.raises(AttnposError, match="fingerprint"):
        store.add("model", "x", fingerprint=bad)


# ---------------------------------------------------------------------------------------------------------------
# Concurrency


def _add_many(path: str, worker: int, count: int, queue) -> None:
    try:
        store = Findings(path)
        ids = []
        for n in range(count):
            ids.append(store.add(f"L{worker}.H{n % 4}", f"worker {worker} note {n}", fingerprint=f"fp{worker}").id)
        # Then change every one of its own notes while the other workers are still adding theirs.
        for fid in ids:
            store.update(fid, status="supported")
        queue.put((worker, ids))
    except BaseException as exc:  # report instead of leaving the parent waiting
        queue.put((worker, f"{type(exc).__name__}: {exc}"))


def test_processes_writing_one_file_lose_nothing(path: Path) -> None:
    workers, per_worker = 4, 25
    # Separate processes, like separate kernels. A fork server imports attnpos once and forks the workers from
    # it, which keeps the test fast (the package imports torch) without forking this (possibly threaded) process.
    ctx = multiprocessing.get_context("forkserver")
    ctx.set_forkserver_preload(["attnpos.findings", __name__])
    queue = ctx.Queue()
    procs = [ctx.Process(target=_add_many, args=(str(path), w, per_worker, queue)) for w in range(workers)]
    for p in procs:
        p.start()
    reported = dict(queue.get(timeout=60) for _ in procs)
    for p in procs:
        p.join(timeout=60)
        assert p.exitcode == 0
    assert all(isinstance(ids, list) for ids in reported.values()), reported
    found = Findings(path).all()
    assert len(found) == workers * per_worker
    assert len({f.id for f in found}) == workers * per_worker
    assert {f.id for f in found} == {fid for ids in reported.values() for fid in ids}
    assert {f.body for f in found} == {f"worker {w} note {n}" for w in range(workers) for n in range(per_worker)}
    assert all(f.status == "supported" for f in found)  # no update was lost to a concurrent add either
    assert not [name for name in _listing(path.parent) if name.endswith(".tmp")]


def test_threads_writing_one_file_lose_nothing(path: Path) -> None:
    stores = [Findings(path) for _ in range(4)]

    def run(n: int) -> None:
        for k in range(15):
            stores[n].add("model", f"thread {n} note {k}")

    assert not tiny.in_threads(run, 4)
    assert len(Findings(path).all()) == 60


def test_a_held_lock_makes_a_change_wait_then_fail_clearly(path: Path) -> None:
    store = Findings(path, lock_timeout=0.2)
    store.add("model", "before")
    before = path.read_bytes()
    other = filelock.FileLock(str(path) + ".lock")
    with other:
        with pytest.raises(AttnposError, match="lock"):
            store.add("model", "while locked")
        assert [f.body for f in store.all()] == ["before"]  # reading never waits for the lock
    assert path.read_bytes() == before
    store.add("model", "after")
    assert len(store.all()) == 2


# ---------------------------------------------------------------------------------------------------------------
# Corrupt files


def _good_bytes(path: Path) -> bytes:
    store = Findings(path)
    store.add("L1.H1", "a note worth keeping", fingerprint="fp")
    store.add("model", "another")
    return path.read_bytes()


CORRUPTIONS = {
    "invalid-json": lambda good: b"{this is not json",
    "truncated": lambda good: good[: len(good) // 2],
    "empty": lambda good: b"",
    "not-utf8": lambda good: b"\xff\xfe\x00garbage",
    "wrong-format": lambda good: good.replace(FORMAT.encode(), b"someone-elses-format/3"),
    "no-format": lambda good: json.dumps({"findings": []}).encode(),
    "top-level-list": lambda good: b"[]",
    "bad-status": lambda good: good.replace(b'"status": "open"', b'"status": "maybe"'),
    "bad-target": lambda good: good.replace(b'"target": "L1.H1"', b'"target": "L1.H9"'),
    "duplicate-id": lambda good: json.dumps(
        {"format": FORMAT, "findings": json.loads(good)["findings"][:1] * 2}).encode(),
}

SALVAGED = {"bad-target": ["another"], "duplicate-id": ["a note worth keeping"]}
"""What recover() keeps of each corruption: the entries that are still valid findings (first of each id)."""


@pytest.mark.parametrize("kind", sorted(CORRUPTIONS))
def test_corrupt_file_is_backed_up_reported_and_never_overwritten(path: Path, kind: str) -> None:
    bad = CORRUPTIONS[kind](_good_bytes(path))
    path.write_bytes(bad)
    store = Findings(path)

    with pytest.raises(AttnposError) as info:
        store.all()
    message = str(info.value)
    assert "corrupt" in message and "recover()" in message and str(path) in message
    backups = [p for p in path.parent.iterdir() if ".corrupt-" in p.name]
    assert len(backups) == 1
    backup = backups[0]
    assert re.fullmatch(r"attnpos-findings\.corrupt-\d{8}T\d{6}Z(-\d+)?\.json", backup.name)
    assert str(backup) in message
    assert backup.read_bytes() == bad

    # Every change is refused and leaves the bytes alone; reading again reuses the same backup.
    for change in (lambda: store.add("model", "new note"), lambda: store.update("0123456789ab", body="x"),
                   lambda: store.remove("0123456789ab")):
        with pytest.raises(AttnposError, match="corrupt"):
            change()
        assert path.read_bytes() == bad
    for read in (store.to_json, store.to_markdown, lambda: store.get("x"), lambda: Findings(path).all()):
        with pytest.raises(AttnposError, match="corrupt"):
            read()
    assert [p for p in path.parent.iterdir() if ".corrupt-" in p.name] == [backup]

    # recover() is the explicit way out: the bytes stay in the backup, the store starts afresh with the entries
    # that are still valid findings (never fewer notes than a reader can find) and works.
    assert store.recover() == backup
    assert backup.read_bytes() == bad
    assert [f.body for f in store.all()] == SALVAGED.get(kind, [])
    store.add("model", "fresh start")
    assert [f.body for f in Findings(path).all()] == SALVAGED.get(kind, []) + ["fresh start"]
    assert backup.read_bytes() == bad


def test_a_file_corrupted_twice_gets_two_backups(path: Path) -> None:
    path.write_bytes(b"{one")
    with pytest.raises(AttnposError):
        Findings(path).all()
    path.write_bytes(b"{two")
    with pytest.raises(AttnposError):
        Findings(path).all()
    backups = sorted(p for p in path.parent.iterdir() if ".corrupt-" in p.name)
    assert sorted(p.read_bytes() for p in backups) == [b"{one", b"{two"]


def test_recover_moves_aside_without_an_earlier_read(path: Path) -> None:
    path.write_bytes(b"\x00\x01 broken")
    backup = Findings(path).recover()
    assert backup is not None and backup.read_bytes() == b"\x00\x01 broken"
    assert json.loads(path.read_text()) == {"format": FORMAT, "findings": []}


def test_recover_refuses_a_readable_file_and_ignores_a_missing_one(path: Path) -> None:
    store = Findings(path)
    assert store.recover() is None
    assert not path.exists()
    store.add("model", "keep me")
    before = path.read_bytes()
    with pytest.raises(AttnposError, match="readable"):
        store.recover()
    assert path.read_bytes() == before
    assert not [p for p in path.parent.iterdir() if ".corrupt-" in p.name]


def test_newer_format_is_refused_clearly_and_left_alone(path: Path) -> None:
    data = json.dumps({"format": "attnpos.findings/2", "findings": [], "extra": 1}).encode()
    path.write_bytes(data)
    store = Findings(path)
    with pytest.raises(AttnposError, match="newer attnpos") as info:
        store.all()
    assert "attnpos.findings/2" in str(info.value) and "Upgrade" in str(info.value)
    with pytest.raises(AttnposError, match="newer attnpos"):
        store.add("model", "x")
    assert path.read_bytes() == data


# ---------------------------------------------------------------------------------------------------------------
# Atomic writes


@pytest.mark.parametrize("failing", ["replace", "fsync"])
def test_a_failed_write_leaves_the_old_file_intact(path: Path, monkeypatch, failing: str) -> None:
    store = Findings(path)
    kept = store.add("L4.H4", "must survive")
    before = path.read_bytes()

    def boom(*args, **kwargs):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, failing, boom)
    with pytest.raises(AttnposError, match="unchanged"):
        store.add("model", "half-written")
    with pytest.raises(AttnposError, match="unchanged"):
        store.update(kept.id, body="changed")
    monkeypatch.undo()

    assert path.read_bytes() == before
    assert Findings(path).all() == [kept]
    assert _listing(path.parent) == ["attnpos-findings.json", "attnpos-findings.json.lock"]  # no temp files left


def test_write_goes_through_a_temp_file_in_the_same_folder(path: Path, monkeypatch) -> None:
    seen: list[tuple[str, str]] = []
    real_replace = os.replace

    def spy(src, dst, *args, **kwargs):
        seen.append((str(src), str(dst)))
        return real_replace(src, dst, *args, **kwargs)

    monkeypatch.setattr(os, "replace", spy)
    Findings(path).add("model", "x")
    [(src, dst)] = seen
    assert Path(src).parent == path.parent and dst == str(path) and src != dst


def test_existing_file_permissions_are_kept(path: Path) -> None:
    store = Findings(path)
    store.add("model", "x")
    os.chmod(path, 0o640)
    store.add("model", "y")
    assert (path.stat().st_mode & 0o777) == 0o640


# ---------------------------------------------------------------------------------------------------------------
# Export


def _md_rows(markdown: str) -> list[str]:
    return [line for line in markdown.splitlines() if line.startswith("|")]


def _gfm_cells(row: str) -> list[str]:
    """Split a table row the way GitHub-flavoured Markdown does: a pipe ends a cell unless backslash-escaped.

    Source: the GitHub Flavored Markdown spec (0.29-gfm), "Tables (extension)": "include a pipe in a cell’s
    content by escaping it". Written from that rule, not from our exporter.
    """
    cells, current, k = [], "", 0
    inner = row.strip()
    assert inner.startswith("|") and inner.endswith("|")
    inner = inner[1:]
    while k < len(inner):
        ch = inner[k]
        if ch == "\\" and k + 1 < len(inner):
            current += inner[k:k + 2]
            k += 2
            continue
        if ch == "|":
            cells.append(current.strip())
            current = ""
        else:
            current += ch
        k += 1
    return cells


def _unescape_cell(cell: str) -> str:
    """What a reader of the rendered table sees (for the escapes the export uses)."""
    out, k = "", 0
    while k < len(cell):
        if cell[k] == "\\" and k + 1 < len(cell) and cell[k + 1] in "\\|":
            out += cell[k + 1]
            k += 2
        elif cell.startswith("<br>", k):
            out += "\n"
            k += 4
        else:
            for entity, char in (("&lt;", "<"), ("&gt;", ">"), ("&amp;", "&")):
                if cell.startswith(entity, k):
                    out += char
                    k += len(entity)
                    break
            else:
                out += cell[k]
                k += 1
    return out


HOSTILE = ["a | b || c", "line one\nline two\r\nline three\rfour", "ends with a backslash \\",
           "<script>alert(1)</script>", '"><img src=x onerror=alert(1)>', "pipe \\| already escaped", "&amp; literal"]


def test_markdown_table_stays_intact_with_hostile_bodies(path: Path) -> None:
    store = Findings(path)
    made = [store.add(f"L{n}.H0", body, fingerprint="fp") for n, body in enumerate(HOSTILE)]
    markdown = store.to_markdown("fp")
    rows = _md_rows(markdown)
    assert len(rows) == 2 + len(made)  # header, rule, one line per finding
    header = _gfm_cells(rows[0])
    assert header[:4] == ["target", "status", "stale", "note"]
    body_rows = {cells[-1]: cells for cells in map(_gfm_cells, rows[2:])}
    for f in made:
        cells = body_rows[f.id]
        assert len(cells) == len(header)
        assert _unescape_cell(cells[3]) == re.sub(r"\r\n|\r", "\n", f.body)
    assert "<script>" not in markdown and "<img" not in markdown


@settings(max_examples=60, deadline=None)
@given(body=st.text())
def test_markdown_cells_hold_any_body(body: str) -> None:
    cell = findings_module._md_cell(body)
    assert "\n" not in cell and "\r" not in cell
    assert _gfm_cells(f"| {cell} | x |") == [cell.strip(), "x"]
    visible = re.sub(r"\r\n|[\r\n\u2028\u2029\x0b\x0c\x85]", "\n", body)
    visible = re.sub(r"[\x00-\x08\x0e-\x1f\x7f-\x9f]", "\ufffd", visible)
    assert _unescape_cell(cell) == visible


def test_markdown_groups_by_target_and_marks_staleness(path: Path) -> None:
    store = Findings(path)
    store.add("decoder:L0.H1", "d", fingerprint="fp")
    store.add("L2.H0", "h20", fingerprint="old")
    store.add("L0.H3", "h03", fingerprint="fp")
    store.add("model", "m")
    store.add("L0", "l0", fingerprint="fp", texts_hash="tA")
    store.add("L0.H3", "h03 again", fingerprint="fp")
    rows = [_gfm_cells(r) for r in _md_rows(store.to_markdown("fp", "tB"))[2:]]
    assert [(r[0], r[3]) for r in rows] == [("model", "m"), ("L0", "l0"), ("L0.H3", "h03"), ("L0.H3", "h03 again"),
                                            ("L2.H0", "h20"), ("decoder:L0.H1", "d")]
    stale = {r[3]: r[2] for r in rows}
    assert stale == {"m": "unstamped", "l0": "**stale**", "h03": "no", "h03 again": "no", "h20": "**stale**",
                     "d": "no"}
    unchecked = [_gfm_cells(r)[2] for r in _md_rows(store.to_markdown())[2:]]
    assert set(unchecked) == {"not checked"}
    assert "evidence, not explanation" in store.to_markdown()


def test_markdown_of_an_empty_store(path: Path) -> None:
    markdown = Findings(path).to_markdown()
    assert "No findings yet." in markdown and not _md_rows(markdown)


def test_json_export_round_trips(path: Path, tmp_path: Path) -> None:
    store = Findings(path)
    store.add("L1.H1", "with | pipe\nand newline", fingerprint="fp", texts_hash="t", author="bo")
    store.add("decoder:L0", "decoder layer", status="ruled-out")
    out = store.export(tmp_path / "out.json")
    assert out == tmp_path / "out.json"
    assert json.loads(out.read_text(encoding="utf-8")) == store.to_json()
    assert Findings(out).all() == store.all()
    assert [Finding.from_dict(d) for d in store.to_json()["findings"]] == store.all()


def test_markdown_export_and_bad_export_paths(path: Path, tmp_path: Path) -> None:
    store = Findings(path)
    store.add("model", "x", fingerprint="fp")
    out = store.export(tmp_path / "notes.MD", fingerprint="other")
    assert out.read_text(encoding="utf-8") == store.to_markdown("other")
    assert "**stale**" in out.read_text(encoding="utf-8")
    with pytest.raises(AttnposError, match=r"\.md or \.json"):
        store.export(tmp_path / "notes.txt")
    with pytest.raises(AttnposError, match="findings file itself"):
        store.export(path)
    with pytest.raises(AttnposError, match="does not exist"):
        store.export(tmp_path / "missing" / "notes.md")


def test_from_dict_rejects_tampered_records(path: Path) -> None:
    record = Findings(path).add("L1.H2", "x").to_dict()
    for change in ({"layer": 9}, {"kind": "layer"}, {"status": "maybe"}, {"created": "yesterday"},
                   {"target": "l1.h2"}, {"layer": True}):
        with pytest.raises(AttnposError, match="not a valid finding"):
            Finding.from_dict({**record, **change})
    with pytest.raises(AttnposError, match="missing"):
        Finding.from_dict({k: v for k, v in record.items() if k != "body"})


# ---------------------------------------------------------------------------------------------------------------
# Property: any body survives the file exactly


@settings(max_examples=75, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(body=st.text(), author=st.one_of(st.none(), st.text()),
       extra=st.sampled_from(["", "|", "\n", "<script>alert('x')</script>", "\r\n|\\", "\x00", "\u2028"]))
def test_any_body_round_trips_exactly(body: str, author, extra: str) -> None:
    with tempfile.TemporaryDirectory() as folder:
        file = Path(folder) / "f.json"
        text = body + extra + body
        made = Findings(file).add("L0.H0", text, author=author)
        again = Findings(file).get(made.id)
        assert again.body == text and again.author == author
        assert again == made
        updated = Findings(file).update(made.id, body=extra + body)
        assert Findings(file).get(made.id).body == extra + body == updated.body


# ---------------------------------------------------------------------------------------------------------------
# The docstring examples are runnable


def test_docstring_examples_run() -> None:
    result = doctest.testmod(findings_module, optionflags=doctest.ELLIPSIS)
    assert result.attempted >= 10
    assert result.failed == 0
