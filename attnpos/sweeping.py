"""The sweep: scan every checkpoint of a training run with the same texts, in parallel on Dask distributed, into a
resumable store, and read the run's timeline back (:class:`~attnpos.results.sweep.SweepResult`).

Example::

    >>> import attnpos
    >>> tl = attnpos.sweep("runs/rope", out="runs/rope-sweep")               # doctest: +SKIP
    >>> tl.role_emergence()["previous-token"]          # a 600-step RoPE run, demo notebook 06 # doctest: +SKIP
    {'step': 100, 'heads': ['L0.H1']}
    >>> attnpos.sweep("runs/rope", out="runs/rope-sweep",                    # doctest: +SKIP
    ...               scheduler="tcp://scheduler-host:8786")                  # the same sweep on a cluster

What is swept (:func:`find_checkpoints`): a run folder's ``checkpoint-<step>/`` folders (and the final model in
the run folder itself, when it holds one), or any list of model folders and ``ref:<scheme>`` names. The step of
each checkpoint comes from its folder name, else ``trainer_state.json``, else the reference trainer's record in
``config.json``; without any, the order given. The training loss curve comes from ``trainer_state.json``'s
``log_history`` or the reference trainer's ``train_loss_history`` (:func:`loss_curves`).

How it runs: one Dask task per checkpoint (:func:`scan_checkpoint`), on a ``LocalCluster`` of ``workers`` processes
with one thread each (the default), or on the cluster whose scheduler address is given. Each task loads the
checkpoint, computes its fingerprint and the texts' hash, skips the scan if the store already holds that result,
else scans and returns the head table and the scan's JSON. The driver (this process) writes each result into the
store as it arrives (:mod:`attnpos.sweep_store`), so the workers need to read the checkpoints but never write
anywhere, and every checkpoint is written once: a task whose worker died is rerun by Dask and still returns once.
A checkpoint that cannot be scanned (a damaged file, a task that kept killing its worker) is recorded as failed
with its error, and the others go on. Interrupted (Ctrl-C, a kill), the store keeps every finished result; run the
same sweep again and it scans only what is missing.
"""

from __future__ import annotations

import json
import os
import re
import socket
import time
import warnings
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Callable, Iterable

from .core import keys, settings
from .errors import AttnposError
from .results.sweep import STATS, SweepResult
from .sweep_store import SweepStore, digest, source_stamp

CHECKPOINT_FOLDER = re.compile(r"^checkpoint-(\d+)$")
SCHEDULER_ADDRESS = re.compile(r"^(?:(tcp|tls|ws|wss|ucx)://)?[A-Za-z0-9_.\-\[\]:]+:\d{1,5}$")


@dataclass(frozen=True)
class Checkpoint:
    """One checkpoint to scan: ``source`` (what :func:`attnpos.load` takes), ``name``, ``step`` and where it came
    from (``step_from``), the ``run`` folder it belongs to (for the loss curve), and the ``stamp`` of its files."""

    source: str
    name: str
    step: int | None
    step_from: str
    run: str
    stamp: str

    def point(self) -> dict:
        return asdict(self)


# ------------------------------------------------------------------------------------------------ what to sweep

def _trainer_state(folder: Path) -> dict | None:
    f = folder / "trainer_state.json"
    if not f.is_file():
        return None
    try:
        data = json.loads(f.read_text(encoding="utf-8"))
    except (OSError, ValueError, UnicodeDecodeError):
        return None
    return data if isinstance(data, dict) else None


def _step_of(folder: Path, config: dict) -> tuple[int | None, str]:
    m = CHECKPOINT_FOLDER.match(folder.name)
    if m:
        return int(m.group(1)), "folder name"
    state = _trainer_state(folder)
    if state and isinstance(state.get("global_step"), int):
        return int(state["global_step"]), "trainer_state.json"
    record = config.get("attnpos_training")
    if isinstance(record, dict) and isinstance(record.get("steps"), int):
        return int(record["steps"]), "training record"
    return None, "order"


def find_checkpoints(targets: str | os.PathLike | Iterable[str | os.PathLike], *, allow_pickle: bool = False,
                     trust_remote_code: bool = False) -> list[Checkpoint]:
    """The checkpoints ``targets`` names, in step order, each checked as :func:`attnpos.locate.locate` checks a
    model (no torch). ``targets``: a run folder (its ``checkpoint-*`` folders and, when it holds a model, the final
    one), a model folder or ``ref:<scheme>``, a ``.txt`` file listing such names one per line, or a list of these."""
    from .locate import locate

    def listed(t, **kw):
        # the weights are checked where they are loaded, on the worker: a checkpoint whose weights are damaged is
        # then recorded as failed with its error and the rest of the sweep goes on
        return locate(t, check_weights=False, **kw)

    if isinstance(targets, (str, os.PathLike)):
        targets = [targets]
    names: list[str] = []
    for t in targets:
        t = str(t)
        p = Path(t).expanduser()
        if p.is_file() and p.suffix == ".txt":
            try:
                listed = [ln.strip() for ln in p.read_text(encoding="utf-8").splitlines()]
            except (OSError, UnicodeDecodeError) as exc:
                raise AttnposError(f"Could not read the list of checkpoints {p} ({exc}).") from None
            names += [ln for ln in listed if ln and not ln.startswith("#")]
        else:
            names.append(t)
    if not names:
        raise AttnposError("Nothing to sweep: give a run folder (with checkpoint-* folders), model folders or "
                           "ref:<scheme> names.")
    found: list[Checkpoint] = []
    for t in names:
        p = Path(t).expanduser()
        if not t.startswith("ref:") and p.is_dir():
            subs = sorted((q for q in p.iterdir() if q.is_dir() and CHECKPOINT_FOLDER.match(q.name)),
                          key=lambda q: int(CHECKPOINT_FOLDER.match(q.name).group(1)))
            if subs:
                run = str(p.resolve())
                steps = set()
                for q in subs:
                    loc = listed(q, allow_pickle=allow_pickle, trust_remote_code=trust_remote_code)
                    step, origin = _step_of(loc.path, loc.config)
                    steps.add(step)
                    found.append(Checkpoint(str(loc.path), loc.name, step, origin, run, source_stamp(loc.path)))
                if (p / "config.json").is_file():           # the final model, saved in the run folder itself
                    loc = listed(p, allow_pickle=allow_pickle, trust_remote_code=trust_remote_code)
                    step, origin = _step_of(loc.path, loc.config)
                    if step is None or step not in steps:
                        found.append(Checkpoint(str(loc.path), loc.name, step, origin, run, source_stamp(loc.path)))
                continue
        loc = listed(t, allow_pickle=allow_pickle, trust_remote_code=trust_remote_code)
        step, origin = _step_of(loc.path, loc.config)
        run = str(loc.path.parent.resolve()) if CHECKPOINT_FOLDER.match(loc.path.name) else str(loc.path.resolve())
        found.append(Checkpoint(t if t.startswith("ref:") else str(loc.path), loc.name, step, origin, run,
                                source_stamp(loc.path)))
    seen, unique = set(), []
    for c in found:
        if c.stamp not in seen:
            seen.add(c.stamp)
            unique.append(c)
    steps = [c.step for c in unique]
    if any(s is None for s in steps) or len(set(steps)) != len(steps):
        # no common step axis: the order given is the axis
        unique = [Checkpoint(c.source, c.name, i, "order", c.run, c.stamp) for i, c in enumerate(unique)]
    return sorted(unique, key=lambda c: c.step)


def loss_curves(checkpoints: list[Checkpoint]) -> dict:
    """The training loss curve of each run the checkpoints belong to: ``trainer_state.json``'s ``log_history``
    (the run folder's, else its latest checkpoint's), else the longest ``train_loss_history`` the reference
    trainer recorded in a checkpoint's config. Runs with neither have no curve."""
    from .locate import locate

    by_run: dict[str, list[Checkpoint]] = {}
    for c in checkpoints:
        by_run.setdefault(c.run, []).append(c)
    out = {}
    for run, cs in by_run.items():
        folders = [Path(run)] + [locate(c.source).path if c.source.startswith("ref:") else Path(c.source)
                                 for c in sorted(cs, key=lambda c: -c.step)]
        curve = None
        for f in folders:
            state = _trainer_state(f)
            if state and isinstance(state.get("log_history"), list):
                pts = [(int(h["step"]), float(h["loss"])) for h in state["log_history"]
                       if isinstance(h, dict) and isinstance(h.get("step"), int)
                       and isinstance(h.get("loss"), (int, float))]
                if pts:
                    curve = {"source": str(f / "trainer_state.json"), "unit": "training loss as the Trainer logged it",
                             "points": pts}
                    break
        if curve is None:
            best: list = []
            src = None
            for f in folders:
                try:
                    cfg = json.loads((f / "config.json").read_text(encoding="utf-8"))
                except (OSError, ValueError, UnicodeDecodeError):
                    continue
                hist = (cfg.get("attnpos_training") or {}).get("train_loss_history") if isinstance(cfg, dict) else None
                if isinstance(hist, list) and len(hist) > len(best):
                    best, src = hist, f / "config.json"
            if best:
                curve = {"source": f"{src} (attnpos_training.train_loss_history)",
                         "unit": "nats per byte, running mean of the last 50 batches",
                         "points": [(int(s), float(v)) for s, v in best]}
        if curve is not None:
            pts = sorted(curve.pop("points"))
            out[run] = {**curve, "step": [s for s, _ in pts], "loss": [v for _, v in pts]}
    return out


# ------------------------------------------------------------------------------------------------ the task

def scan_checkpoint(source: str, raw_texts: list, options: dict, known: list[str]) -> dict:
    """Scan one checkpoint (runs on a Dask worker). Returns ``{"status": "ok", "key", "heads" (Parquet-ready
    DataFrame), "scan" (the scan's JSON without head rows), ...}``, ``{"status": "cached", "key"}`` when the store
    already holds this checkpoint on these texts (``known``), or ``{"status": "failed", "error"}``."""
    os.environ.setdefault("HF_HUB_OFFLINE", "1")
    os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")
    os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")
    t0 = time.perf_counter()
    where = {"worker_pid": os.getpid(), "worker_host": socket.gethostname()}
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        out = _scan_checkpoint(source, raw_texts, options, known, t0)
    notices = sorted({str(w.message) for w in caught if "attnpos" in str(w.filename) or "Notice" in type(w.message).__name__})
    return {**out, **where, "notices": notices}


def _scan_checkpoint(source, raw_texts, options, known, t0) -> dict:
    try:
        import torch

        torch.set_num_threads(max(1, int(options.get("threads", 1))))
        from .pipeline import scan
        from .subject import load
        from .texts import prepare, texts_hash

        subject = load(source, allow_pickle=options.get("allow_pickle", False),
                       trust_remote_code=options.get("trust_remote_code", False))
        max_tokens = options.get("max_tokens") or subject.training_length
        th = texts_hash(prepare(subject, raw_texts, max_tokens=max_tokens))
        key = f"{subject.fingerprint[:24]}-{th}"
        if key in set(known):
            return {"status": "cached", "key": key}
        result = scan(subject, raw_texts, max_tokens=options.get("max_tokens"), n_boot=options.get("n_boot", 0),
                      shift=options.get("shift", True), induction=options.get("induction", True), keep_maps=0,
                      progress=False)
        data = result.to_json()
        data["profiles"] = [h.get("profile") for h in data.pop("heads")]
        return {"status": "ok", "key": key, "heads": result.heads, "scan": data,
                "seconds": round(time.perf_counter() - t0, 3)}
    except Exception as exc:  # noqa: BLE001 - any failure of one checkpoint is recorded, the sweep goes on
        text = str(exc).strip().splitlines()
        return {"status": "failed", "error": f"{type(exc).__name__}: {text[0][:400] if text else ''}"}


# ------------------------------------------------------------------------------------------------ the sweep

def _texts_digest(raw) -> str:
    return digest("\x1e".join(f"{r.name}\x1f{r.text}" for r in raw), 16)


def _options(n_boot, shift, induction, max_tokens, allow_pickle, trust_remote_code, threads) -> dict:
    return {"n_boot": int(n_boot), "shift": bool(shift), "induction": bool(induction),
            "max_tokens": int(max_tokens) if max_tokens else None, "allow_pickle": bool(allow_pickle),
            "trust_remote_code": bool(trust_remote_code), "threads": int(threads)}


def store_meta(raw_texts, *, n_boot: int = settings.SWEEP_BOOT, shift: bool = True, induction: bool = True,
               max_tokens: int | None = None) -> dict:
    """What a store is made for: the texts' digest and the scan settings (a store of other ones is refused)."""
    return {"texts_digest": _texts_digest(raw_texts),
            "settings": {"n_boot": int(n_boot), "shift": bool(shift), "induction": bool(induction),
                         "max_tokens": int(max_tokens) if max_tokens else None}}


def require_engine() -> None:
    """Dask distributed and pyarrow are the optional extra ``sweep``; say how to install them when missing."""
    import importlib.util

    missing = [m for m in ("distributed", "pyarrow") if importlib.util.find_spec(m) is None]
    if missing:
        raise AttnposError(f"attnpos sweep needs {' and '.join(missing)} (Dask distributed runs the scans, pyarrow "
                           "writes the head tables): pip install 'attnpos[sweep]'.")


def check_scheduler(address: str | None) -> None:
    if address is not None and not SCHEDULER_ADDRESS.match(str(address)):
        raise AttnposError(f"{address!r} is not a scheduler address; give it as the Dask scheduler prints it, e.g. "
                           "tcp://10.0.0.5:8786 (protocol://host:port).")


def connect(scheduler: str | None = None, workers: int = settings.SWEEP_WORKERS):
    """A Dask client: on the cluster at ``scheduler``, or on a new ``LocalCluster`` of ``workers`` processes with
    one thread each. Returns ``(client, cluster or None)``; close both when done."""
    import logging

    from dask.distributed import Client, LocalCluster

    if scheduler is not None:
        check_scheduler(scheduler)
        try:
            return Client(scheduler, timeout="20s"), None
        except (OSError, TimeoutError) as exc:
            raise AttnposError(f"Could not reach the Dask scheduler at {scheduler} ({exc}). Check the address, "
                               "and that the scheduler runs and this machine may connect to it.") from None
    cluster = LocalCluster(n_workers=int(workers), threads_per_worker=1, processes=True, dashboard_address=":0",
                           silence_logs=logging.ERROR)
    return Client(cluster), cluster


def record_result(store: SweepStore, c: Checkpoint, out: dict) -> str:
    """Write what :func:`scan_checkpoint` returned for ``c`` into the store; returns its status."""
    point = c.point()
    if out["status"] == "ok":
        store.write_entry(out["key"], point, out["heads"], out["scan"], seconds=out.get("seconds"),
                          worker_pid=out.get("worker_pid"), worker_host=out.get("worker_host"),
                          notices=out.get("notices") or [])
    if out["status"] in ("ok", "cached"):
        store.write_seen(point, out["key"])
        return out["status"]
    store.write_failure(point, out.get("error") or "unknown error")
    return "failed"


def sweep(targets, texts=None, *, out: str | os.PathLike, scheduler: str | None = None,
          workers: int = settings.SWEEP_WORKERS, client=None, n_boot: int = settings.SWEEP_BOOT, shift: bool = True,
          induction: bool = True, max_tokens: int | None = None, allow_pickle: bool = False,
          trust_remote_code: bool = False, threads: int = 1,
          on_result: Callable[[Checkpoint, str, dict], None] | None = None) -> SweepResult:
    """Scan every checkpoint of ``targets`` (see :func:`find_checkpoints`) on ``texts`` (as :func:`attnpos.scan`
    takes them; None: the bundled samples) into the store ``out``, in parallel on Dask, and return the timeline.

    Args:
        scheduler: the address of a Dask scheduler (``tcp://host:8786``); None starts a local cluster of
            ``workers`` processes, one thread each, for the duration of the sweep.
        client: an existing ``dask.distributed.Client`` to use instead (left open).
        n_boot / shift / induction / max_tokens: the scan's settings (see :func:`attnpos.scan`).
        threads: torch threads per task.
        on_result: called as ``on_result(checkpoint, status, info)`` after each checkpoint's result is stored
            (``status``: ``ok``, ``cached`` or ``failed``).
    """
    from .texts import as_raw

    if workers < 1:
        raise AttnposError(f"workers must be at least 1, got {workers}.")
    check_scheduler(scheduler)
    require_engine()
    points = find_checkpoints(targets, allow_pickle=allow_pickle, trust_remote_code=trust_remote_code)
    raw = as_raw(texts)
    options = _options(n_boot, shift, induction, max_tokens, allow_pickle, trust_remote_code, threads)
    store = SweepStore.open(out, store_meta(raw, n_boot=n_boot, shift=shift, induction=induction,
                                            max_tokens=max_tokens))
    store.write_loss(loss_curves(points))
    todo = [c for c in points if store.done(c.stamp) is None]
    if todo:
        own = client is None
        cluster = None
        if own:
            client, cluster = connect(scheduler, workers)
        futures = {}
        try:
            known = sorted({e["key"] for e in store.entries()})
            stamp = digest(f"{time.time_ns()}-{os.getpid()}", 6)
            for c in todo:
                fut = client.submit(scan_checkpoint, c.source, raw, options, known, pure=False,
                                    key=f"attnpos-scan-{c.stamp}-{stamp}")
                futures[fut] = c
            from dask.distributed import as_completed

            for fut in as_completed(list(futures)):
                c = futures[fut]
                try:
                    res = fut.result()
                except Exception as exc:  # noqa: BLE001 - e.g. KilledWorker: the task kept killing its worker
                    res = {"status": "failed", "error": f"{type(exc).__name__}: {str(exc)[:400]}"}
                status = record_result(store, c, res)
                store.rebuild_index()
                if on_result is not None:
                    on_result(c, status, {k: v for k, v in res.items() if k not in ("heads", "scan")})
        finally:
            for fut in futures:
                if not fut.done():
                    fut.cancel()
            if own:
                client.close()
                if cluster is not None:
                    cluster.close()
            store.rebuild_index()
    result = timeline(store, points)
    result.save(Path(out) / "timeline.json")
    return result


# ------------------------------------------------------------------------------------------------ the timeline

def timeline(store: SweepStore | str | os.PathLike, points: list[Checkpoint] | None = None) -> SweepResult:
    """The timeline of the checkpoints ``points`` (default: every checkpoint the store holds a result for)."""
    import pandas as pd

    if not isinstance(store, SweepStore):
        store = SweepStore.read(store)
    if points is None:
        points = sorted((Checkpoint(**{k: s[k] for k in Checkpoint.__dataclass_fields__}) for s in store.seen()),
                        key=lambda c: (c.step, c.name))
    failures = {f.get("stamp"): f for f in store.failures()}
    rows, pts, model, th = [], [], {}, ""
    for c in points:
        key = store.done(c.stamp)
        p = {**c.point(), "status": "missing", "error": None, "key": key}
        if key is not None:
            p["status"] = "ok"
            t = store.table(key)
            t["key"] = [keys.head_key(s, la, h) for s, la, h in zip(t["stack"], t["layer"], t["head"])]
            t["step"] = c.step
            rows.append(t[["step", "key", "stack", "layer", "head", "role", "tags", *STATS]])
            scan = store.entry(key)["scan"]
            model = {k: (scan.get("model") or {}).get(k) for k in ("name", "architecture", "scheme", "layers", "heads",
                                                                    "fingerprint")}
            th = scan.get("texts_hash") or th
        elif c.stamp in failures:
            p["status"], p["error"] = "failed", failures[c.stamp].get("error")
        pts.append(p)
    heads = pd.concat(rows, ignore_index=True) if rows else None
    return SweepResult(points=pts, heads=heads, loss=store.loss_for({c.run for c in points}), model=model,
                       settings={"texts_hash": th, **store.meta.get("settings", {}), "store": str(store.root),
                                 "step_axis": "order" if any(c.step_from == "order" for c in points) else "step"})
