"""``attnpos sweep``: scan every checkpoint of a training run with the same texts, in parallel on Dask distributed,
into a resumable store; print the timeline (when each head's role appeared)."""

from __future__ import annotations

from pathlib import Path

from ..core import settings
from . import _common as c


def add_arguments(p) -> None:
    p.add_argument("targets", nargs="+", metavar="RUN_DIR_OR_LIST",
                   help="a run folder (its checkpoint-<step>/ folders, and the final model when the folder holds "
                        "one), model folders or ref:<scheme> names, or a .txt file listing them one per line")
    c.add_text_arguments(p)
    p.add_argument("--out", required=True, type=Path, metavar="STORE",
                   help="the store folder: new, or the folder of an earlier sweep to resume it")
    p.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="run on the Dask cluster whose scheduler is at ADDRESS (e.g. tcp://host:8786); default: a "
                        "local cluster on this machine")
    p.add_argument("--workers", type=c.count(1), default=None, metavar="N",
                   help=f"worker processes of the local cluster, one thread each (default {settings.SWEEP_WORKERS})")
    p.add_argument("--boot", type=c.count(0), default=settings.SWEEP_BOOT, metavar="N",
                   help=f"bootstrap resamples per scan (default {settings.SWEEP_BOOT}: the timeline reads point values)")
    p.add_argument("--no-shift", action="store_true", help="skip the shift test")
    p.add_argument("--no-induction", action="store_true", help="skip the induction test")
    p.add_argument("--json", type=Path, default=None, metavar="OUT",
                   help="also write the timeline as JSON (attnpos.sweep/1) here; the store always holds "
                        "STORE/timeline.json")
    c.add_loading_arguments(p)


def check(args) -> None:
    from ..errors import AttnposError
    from ..sweep_store import SweepStore
    from ..sweeping import check_scheduler, find_checkpoints, require_engine, store_meta

    require_engine()
    check_scheduler(args.scheduler)
    if args.scheduler is not None and args.workers is not None:
        raise AttnposError("--workers sizes the local cluster a sweep starts; with --scheduler the cluster's own "
                           "workers run the scans. Drop one of the two.")
    out = Path(args.out)
    if not out.expanduser().absolute().parent.is_dir():
        raise AttnposError(f"The folder {out.expanduser().absolute().parent} for --out does not exist. Create it "
                           "first, or give a path in an existing folder.")
    c.check_outputs({"--json": args.json}, {"--text": args.text})
    args.checkpoints = find_checkpoints(args.targets, allow_pickle=args.allow_pickle,
                                        trust_remote_code=args.trust_remote_code)
    args.raw_texts = c.read_texts(args)
    SweepStore.check(out, store_meta(args.raw_texts, n_boot=args.boot, shift=not args.no_shift,
                                     induction=not args.no_induction, max_tokens=args.max_tokens))


def run(args) -> int:
    from ..sweeping import sweep

    total = len(args.checkpoints)
    done = [0]

    def report(ck, status, info):
        done[0] += 1
        extra = f" ({info.get('seconds')} s)" if status == "ok" else (f": {info.get('error')}" if status == "failed"
                                                                     else " (already in the store)")
        print(f"[{done[0]}/{total}] step {ck.step} {ck.name}: {status}{extra}", flush=True)

    where = args.scheduler or f"a local cluster of {args.workers or settings.SWEEP_WORKERS} workers"
    print(f"sweeping {total} checkpoints on {where} into {args.out}", flush=True)
    result = sweep(args.targets, args.raw_texts, out=args.out, scheduler=args.scheduler,
                   workers=args.workers or settings.SWEEP_WORKERS, n_boot=args.boot, shift=not args.no_shift,
                   induction=not args.no_induction, max_tokens=args.max_tokens, allow_pickle=args.allow_pickle,
                   trust_remote_code=args.trust_remote_code, on_result=report)
    print(result.text())
    print(f"wrote {Path(args.out) / 'timeline.json'}")
    if args.json:
        c.write("timeline JSON", args.json, lambda: result.save(args.json))
    return 1 if result.failed() else 0
