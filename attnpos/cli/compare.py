"""``attnpos compare``: two checkpoints (or two saved scans) head by head."""

from __future__ import annotations

from pathlib import Path

from ..core import settings
from . import _common as c



def add_arguments(p) -> None:
    p.add_argument("a", help="model A: folder, ref:<scheme>, or a scan JSON file")
    p.add_argument("b", help="model B: folder, ref:<scheme>, or a scan JSON file")
    c.add_text_arguments(p)
    c.add_json_argument(p, "comparison")
    p.add_argument("--boot", type=c.count(0), default=settings.SCAN_BOOT, metavar="N",
                   help=f"bootstrap resamples for intervals ({settings.SCAN_BOOT})")
    p.add_argument("--all", action="store_true", help="list every head, not only the changed ones")
    p.add_argument("--no-shift", action="store_true", help="skip the shift test in the scans")
    p.add_argument("--no-induction", action="store_true", help="skip the induction test in the scans")
    c.add_loading_arguments(p)


def _is_scan_file(x: str) -> bool:
    return x.endswith(".json") and Path(x).is_file()


def check(args) -> None:
    inputs = {"A": Path(args.a) if _is_scan_file(args.a) else None,
              "B": Path(args.b) if _is_scan_file(args.b) else None, "--text": c.TextInputs(args.text or [])}
    for name in ("a", "b"):
        if not _is_scan_file(getattr(args, name)):
            inputs[f"model {name.upper()}"] = c.model_files(c.check_model(args, name))
    c.check_outputs({"--json": args.json}, inputs)
    args.sides = []
    for name in ("a", "b"):
        x = getattr(args, name)
        if _is_scan_file(x):
            from ..results.scan import Scan

            args.sides.append(Scan.load(x))          # a damaged scan file is refused now
        else:
            args.sides.append(None)
    args.raw_texts = None if all(s is not None for s in args.sides) else c.read_texts(args)


def starting(args) -> None:
    """The command's first line, printed before anything heavy is imported (torch alone takes seconds)."""
    for name, s in zip(("a", "b"), args.sides):
        if s is None:
            c.announce(args, "compare", name)


def run(args) -> int:
    from ..compare import compare

    sides = []
    for name, s in zip(("a", "b"), args.sides):
        if s is None:
            from ..subject import load

            s = load(getattr(args, name), allow_pickle=args.allow_pickle, trust_remote_code=args.trust_remote_code,
                     dtype=getattr(args, "dtype", "float32"), allow_missing_weights=args.allow_missing_weights)
        sides.append(s)
    res = compare(*sides, args.raw_texts, all_heads=args.all, n_boot=args.boot, shift=not args.no_shift,
                  induction=not args.no_induction, max_tokens=args.max_tokens)
    print(res.text())
    if args.json:
        c.write("comparison JSON", args.json, lambda: res.save(args.json))
    return 0
