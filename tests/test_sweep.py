"""Sweeps over training checkpoints on Dask distributed: a run of 12 checkpoints written by ``train --save-every``
swept on a 2-worker local cluster; a worker killed mid-sweep; a corrupt checkpoint; an interrupted and a killed
sweep resumed without scanning anything twice; the timeline's emergence steps.

External check: Dask's own LocalCluster and its rescheduling of the tasks of a dead worker (the engine under
test is the real one, not a stand-in). Everything else here is the package's own behaviour.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import pandas as pd
import pytest

import attnpos
from attnpos.errors import AttnposError
from attnpos.results.sweep import SweepResult
from attnpos.sweep_store import SweepStore
from attnpos.sweeping import find_checkpoints, loss_curves, sweep, timeline

pytest.importorskip("distributed")
pytest.importorskip("pyarrow")

TEXTS = ["The ferry to the north island leaves at nine and returns at four, unless the wind turns.",
         "At the lighthouse the keeper logs the weather twice a day and winds the clock on Sundays."]
TINY = dict(batch=2, context=32, corpus_bytes=60_000, n_layers=2, hidden=32, heads=2, val_windows=4,
            progress=False)


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory):
    """A real training run of the RoPE reference build, 12 updates, a checkpoint after each: 11 checkpoint
    folders plus the final model in the run folder."""
    from attnpos.reference.train import train

    out = tmp_path_factory.mktemp("run") / "rope"
    _, record = train("rope", out, steps=12, save_every=1, log_every=1, **TINY)
    return out, record


@pytest.fixture(scope="module")
def client():
    from dask.distributed import Client, LocalCluster

    cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0",
                           silence_logs=50)
    c = Client(cluster)
    try:
        yield c
    finally:
        c.close()
        cluster.close()


def _entries(store: Path) -> list[dict]:
    return SweepStore.read(store).entries()


# ------------------------------------------------------------------------------------------------ save-every

def test_save_every_writes_checkpoints_in_the_model_layout(run_dir):
    run, record = run_dir
    found = find_checkpoints(run)
    assert [c.step for c in found] == list(range(1, 13))
    assert [c.step_from for c in found] == ["folder name"] * 11 + ["training record"]
    for c in found:
        assert (Path(c.source) / "model.safetensors").is_file() and (Path(c.source) / "tokenizer.json").is_file()
    mid = json.loads((run / "checkpoint-6" / "config.json").read_text())["attnpos_training"]
    assert mid["steps"] == 6 and mid["intermediate"] is True
    assert mid["train_loss_history"] == record["train_loss_history"][:6]
    curve = loss_curves(found)[str(run.resolve())]
    assert curve["step"] == list(range(1, 13)) and curve["loss"] == [v for _, v in record["train_loss_history"]]


def test_saving_checkpoints_does_not_change_the_training(tmp_path):
    from attnpos.reference.train import train

    plain, _ = train("rope", None, steps=5, **TINY)
    saved, _ = train("rope", tmp_path / "run", steps=5, save_every=2, **TINY)
    a, b = plain.state_dict(), saved.state_dict()
    assert a.keys() == b.keys() and all(bool((a[k] == b[k]).all()) for k in a)     # bit for bit
    assert sorted(p.name for p in (tmp_path / "run").glob("checkpoint-*")) == ["checkpoint-2", "checkpoint-4"]


def test_a_trainer_state_file_gives_the_step_and_the_loss_curve(tmp_path, run_dir):
    run, _ = run_dir
    other = tmp_path / "hf-run"
    shutil.copytree(run / "checkpoint-4", other / "checkpoint-4")
    shutil.copytree(run / "checkpoint-8", other / "last")
    (other / "last" / "trainer_state.json").write_text(json.dumps(
        {"global_step": 80, "log_history": [{"step": 20, "loss": 3.5}, {"step": 40, "loss": 3.1},
                                            {"step": 40, "eval_loss": 3.3}, {"step": 80, "loss": 2.7}]}))
    found = find_checkpoints([other / "checkpoint-4", other / "last"])
    assert [(c.step, c.step_from) for c in found] == [(4, "folder name"), (80, "trainer_state.json")]
    curves = loss_curves([found[1]])
    (curve,) = curves.values()
    assert curve["step"] == [20, 40, 80] and curve["loss"] == [3.5, 3.1, 2.7]


# ------------------------------------------------------------------------------------------------ faults

def test_a_worker_killed_mid_sweep_is_replaced_and_nothing_is_lost_or_duplicated(run_dir, client, tmp_path):
    run, _ = run_dir
    store = tmp_path / "store"
    box: dict = {}
    seen: list = []

    def go():
        try:
            box["result"] = sweep(run, TEXTS * 2, out=store, client=client,
                                  on_result=lambda c, s, info: seen.append((c.stamp, s, info.get("worker_pid"))))
        except BaseException as exc:  # noqa: BLE001 - handed to the test thread
            box["error"] = exc

    t = threading.Thread(target=go)
    t.start()
    victim = None
    deadline = time.time() + 60
    while victim is None and time.time() < deadline and t.is_alive():
        busy = {w: list(ts) for w, ts in client.processing().items() if ts}
        if busy:
            addr, tasks = next(iter(busy.items()))
            pid = client.run(os.getpid, workers=[addr])[addr]
            os.kill(pid, signal.SIGKILL)                 # the worker process dies in the middle of its task
            victim = (pid, tasks[0])
        else:
            time.sleep(0.02)
    t.join(timeout=240)
    assert victim is not None, "no worker was ever busy"
    assert "error" not in box, box.get("error")
    res = box["result"]
    assert [p["status"] for p in res.points] == ["ok"] * 12
    keys = [p["key"] for p in res.points]
    assert len(set(keys)) == 12
    entries = _entries(store)
    assert sorted(e["key"] for e in entries) == sorted(keys)              # nothing lost, nothing twice
    assert len(list((store / "entries").iterdir())) == 12
    assert len(seen) == 12 and len({s for s, _, _ in seen}) == 12
    # the task the dead worker was running was run again by another worker process
    killed_stamp = next(c.stamp for c in find_checkpoints(run) if c.stamp in victim[1])
    rerun = next(e for e in entries if e["stamp"] == killed_stamp)
    assert rerun["worker_pid"] != victim[0]
    assert res.steps() == list(range(1, 13))


def test_a_corrupt_checkpoint_is_recorded_as_failed_and_the_rest_go_on(run_dir, client, tmp_path):
    run, _ = run_dir
    bad = tmp_path / "bad" / "checkpoint-7"
    shutil.copytree(run / "checkpoint-7", bad)
    data = (bad / "model.safetensors").read_bytes()
    (bad / "model.safetensors").write_bytes(data[:40] + b"\x00garbage" * 8)     # header kept, tensors cut off
    targets = [run / "checkpoint-2", bad, run / "checkpoint-9"]
    res = sweep(targets, TEXTS, out=tmp_path / "store", client=client)
    by_step = {p["step"]: p for p in res.points}
    assert by_step[2]["status"] == by_step[9]["status"] == "ok"
    assert by_step[7]["status"] == "failed" and by_step[7]["error"]
    (failure,) = SweepStore.read(tmp_path / "store").failures()
    assert failure["source"] == str(bad) and failure["error"] == by_step[7]["error"]
    assert "failed: " in res.text() and res.steps() == [2, 9]
    index = json.loads((tmp_path / "store" / "index.json").read_text())
    assert len(index["entries"]) == 2 and len(index["failed"]) == 1


def test_an_interrupted_sweep_leaves_a_valid_store_and_resumes_without_rescanning(run_dir, client, tmp_path):
    run, _ = run_dir
    store = tmp_path / "store"
    calls: list = []

    def stop_after_three(c, status, info):
        calls.append(c.step)
        if len(calls) == 3:
            raise KeyboardInterrupt                       # what Ctrl-C raises in the driver

    with pytest.raises(KeyboardInterrupt):
        sweep(run, TEXTS, out=store, client=client, on_result=stop_after_three)
    first = _entries(store)
    assert len(first) == 3
    assert not list(store.rglob("*.tmp"))                  # no half-written file anywhere
    index = json.loads((store / "index.json").read_text())
    assert sorted(e["key"] for e in index["entries"]) == sorted(e["key"] for e in first)
    written = {e["key"]: (store / "entries" / e["key"] / "entry.json").stat().st_mtime_ns for e in first}
    again: list = []
    res = sweep(run, TEXTS, out=store, client=client, on_result=lambda c, s, i: again.append((c.step, s)))
    done_first = {e["step"] for e in first}
    assert sorted(s for s, _ in again) == sorted(set(range(1, 13)) - done_first)    # only what was missing
    assert all(s == "ok" for _, s in again)
    for key, stamp in written.items():                     # the finished results were not written again
        assert (store / "entries" / key / "entry.json").stat().st_mtime_ns == stamp
    assert [p["status"] for p in res.points] == ["ok"] * 12
    # a third run scans nothing and gives the same timeline
    third: list = []
    assert sweep(run, TEXTS, out=store, client=client, on_result=lambda *a: third.append(a)).to_json() == res.to_json()
    assert third == []


def test_a_killed_sweep_process_resumes(run_dir, client, tmp_path):
    """The command line, run against the test's cluster by its scheduler address (the one change that takes a
    sweep to a real cluster), killed part-way, then resumed."""
    run, _ = run_dir
    store = tmp_path / "store"
    text = tmp_path / "t.txt"
    text.write_text(TEXTS[0])
    env = dict(os.environ, HF_HUB_OFFLINE="1", TOKENIZERS_PARALLELISM="false")
    proc = subprocess.Popen([sys.executable, "-m", "attnpos.cli", "sweep", str(run), "--text", str(text),
                             "--out", str(store), "--scheduler", client.scheduler.address], env=env, start_new_session=True,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        deadline = time.time() + 120
        while time.time() < deadline and proc.poll() is None:
            if (store / "store.json").is_file() and len(_entries(store)) >= 2:
                break
            time.sleep(0.05)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)            # the sweep and its local cluster, all at once
        proc.wait(timeout=30)
    before = {e["key"]: (store / "entries" / e["key"] / "entry.json").stat().st_mtime_ns for e in _entries(store)}
    assert 2 <= len(before) < 12
    assert not [p for p in store.rglob("*") if p.is_file() and not p.name.startswith(".")
                and p.suffix == ".json" and not _valid_json(p)]
    again: list = []
    res = sweep(run, attnpos.texts.read([text]), out=store, client=client, on_result=lambda c, s, i: again.append(s))
    assert [p["status"] for p in res.points] == ["ok"] * 12
    # scanned now: exactly the checkpoints without a result; one whose result was written just before the kill
    # (but not yet marked as done) is found in the store again ("cached"), not scanned
    assert again.count("ok") == 12 - len(before) and set(again) <= {"ok", "cached"}
    for key, stamp in before.items():
        assert (store / "entries" / key / "entry.json").stat().st_mtime_ns == stamp
    assert len(_entries(store)) == 12


def _valid_json(p: Path) -> bool:
    try:
        json.loads(p.read_text())
        return True
    except ValueError:
        return False


# ------------------------------------------------------------------------------------------------ the timeline

def test_the_timeline_matches_scanning_each_checkpoint_by_hand(run_dir, client, tmp_path):
    run, _ = run_dir
    res = sweep([run / "checkpoint-3", run / "checkpoint-11"], TEXTS, out=tmp_path / "store", client=client)
    assert res.steps() == [3, 11]
    for step, folder in ((3, run / "checkpoint-3"), (11, run / "checkpoint-11")):
        by_hand = attnpos.scan(str(folder), TEXTS, n_boot=0, progress=False)
        h = res.heads[res.heads["step"] == step].reset_index(drop=True)
        assert list(h["role"]) == list(by_hand.heads["role"])
        # the workers run torch with one thread, this process with two: sums may differ in the last bits
        for col in ("mass_previous", "entropy_ratio", "induction", "share_content"):
            pd.testing.assert_series_equal(h[col], by_hand.heads[col], check_names=False, rtol=1e-4)
        stored = SweepStore.read(tmp_path / "store")
        key = next(p["key"] for p in res.points if p["step"] == step)
        again = stored.scan(key)                           # the whole scan back from Parquet + JSON
        assert isinstance(again, attnpos.Scan) and again.model["fingerprint"] == by_hand.model["fingerprint"]
        # (check_dtype off: a scan read back from JSON holds whole-number columns as floats, as ever)
        pd.testing.assert_frame_equal(again.heads, by_hand.heads, rtol=1e-4, check_dtype=False)
        assert again.profile["value"].shape == by_hand.profile["value"].shape
    loaded = attnpos.load_result(tmp_path / "store" / "timeline.json")
    assert isinstance(loaded, SweepResult) and loaded.to_json() == res.to_json()
    assert timeline(tmp_path / "store").steps() == [3, 11]


def test_emergence_is_the_first_step_from_which_a_role_holds_to_the_end():
    def row(step, key, tags):
        return dict(step=step, key=key, stack="main", layer=0, head=int(key[-1]), role=tags[0], tags=tags)

    rows = []
    for s, a, b in [(0, ["mixed"], ["counting"]), (10, ["previous-token"], ["counting"]),
                    (20, ["mixed"], ["induction", "counting"]), (30, ["previous-token", "local"], ["counting"]),
                    (40, ["previous-token", "local"], ["mixed"])]:
        rows += [row(s, "L0.H0", a), row(s, "L0.H1", b)]
    res = SweepResult(points=[{"step": s, "status": "ok"} for s in (0, 10, 20, 30, 40)], heads=pd.DataFrame(rows))
    e = res.emergence().set_index(["head", "role"])
    assert e.loc[("L0.H0", "previous-token"), "emerged"] == 30
    assert e.loc[("L0.H0", "previous-token"), "first_seen"] == 10
    assert e.loc[("L0.H0", "local"), "emerged"] == 30
    assert ("L0.H1", "counting") not in e.index            # held until step 30, gone at the end: no emergence
    assert ("L0.H1", "induction") not in e.index
    assert e.loc[("L0.H1", "mixed"), "emerged"] == 40
    assert res.role_emergence()["previous-token"] == {"step": 30, "heads": ["L0.H0"]}
    assert list(res.grid().loc["L0.H0"]) == ["mixed", "previous-token", "mixed", "previous-token", "previous-token"]
    assert list(res.history("L0.H1")["role"]) == ["counting", "counting", "induction", "counting", "mixed"]
    with pytest.raises(AttnposError, match="No head"):
        res.history("L5.H0")


# ------------------------------------------------------------------------------------------------ bad arguments

def test_bad_sweep_arguments_are_refused_before_torch_loads(run_dir, tmp_path):
    run, _ = run_dir
    other = tmp_path / "other"
    other.mkdir()
    (other / "notes.txt").write_text("not a store")
    cases = [
        (["sweep", str(run), "--out", str(tmp_path / "s"), "--scheduler", "nonsense"], "not a scheduler address"),
        (["sweep", str(run), "--out", str(tmp_path / "s"), "--scheduler", "tcp://h:8786", "--workers", "3"],
         "Drop one"),
        (["sweep", "/no/such/run", "--out", str(tmp_path / "s")], "No model folder"),
        (["sweep", str(run), "--out", str(other)], "not a sweep store"),
        (["sweep", str(run), "--out", "/no/such/folder/s"], "does not exist"),
    ]
    code = ("import sys\nfrom attnpos.cli import main\n"
            f"for argv, message in {cases!r}:\n"
            "    rc = main(argv)\n"
            "    assert rc == 2, (argv, rc)\n"
            "assert 'torch' not in sys.modules and 'distributed' not in sys.modules\n")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120, cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    for _, message in cases:
        assert message in done.stderr
    assert "Traceback" not in done.stderr


def test_a_store_of_other_texts_is_refused(run_dir, client, tmp_path):
    run, _ = run_dir
    sweep([run / "checkpoint-1"], TEXTS, out=tmp_path / "s", client=client)
    with pytest.raises(AttnposError, match="other texts"):
        sweep([run / "checkpoint-1"], TEXTS[:1], out=tmp_path / "s", client=client)


def test_the_timeline_view_carries_the_grid_the_loss_and_a_static_rendering():
    import numpy as np

    from attnpos.views.timeline import Timeline, palette

    rows = [dict(step=s, key=f"L0.H{h}", stack="main", layer=0, head=h, role=r, tags=[r], induction=0.1 * s)
            for s in (100, 200, 400) for h, r in ((0, "counting"), (1, "induction" if s > 100 else "mixed"))]
    res = SweepResult(points=[{"step": s, "status": "ok"} for s in (100, 200, 400)], heads=pd.DataFrame(rows),
                      loss={"run": {"source": "trainer_state.json", "step": [50, 100, 300, 400],
                                    "loss": [3.0, 2.5, 2.6, 2.0]}})
    w = Timeline(res, head="L0.H1")
    names = [p["role"] for p in palette()]
    grid = np.frombuffer(w.roles, np.uint8).reshape(2, 3)
    assert [[names[c] for c in r] for r in grid] == [list(res.grid().loc[k]) for k in res.head_keys()]
    nums = np.frombuffer(w.numbers, "<f4").reshape(2, 3, len(w.meta["stat_names"]))
    k = w.meta["stat_names"].index("induction")
    np.testing.assert_allclose(nums[1, :, k], [10.0, 20.0, 40.0], rtol=1e-6)
    assert list(np.frombuffer(w.loss_values, "<f4")) == [50, 100, 300, 400, 3.0, 2.5, 2.6, 2.0]
    assert w.meta["role_emergence"]["induction"] == {"step": 200, "heads": ["L0.H1"]}
    page = w.to_html()
    assert page.count("class='apt-cell'") == 6 and "class='apt-loss'" in page
    assert "L0.H1</b> over the steps — induction from step 200" in page
    assert w._repr_mimebundle_()[0]["text/html"] == page
