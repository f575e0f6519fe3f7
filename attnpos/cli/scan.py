"""``attnpos scan``: per-head masses, score split, slope, shift test, induction, roles; JSON and an HTML report."""

from __future__ import annotations

from pathlib import Path

from ..core import settings
from . import _common as c



def add_arguments(p) -> None:
    c.add_model_arguments(p)
    c.add_text_arguments(p)
    p.add_argument("--json", type=Path, default=None, metavar="OUT", help="write the scan as JSON (attnpos.scan/2)")
    p.add_argument("--html", type=Path, default=None, metavar="OUT", help="write a self-contained HTML report")
    p.add_argument("--boot", type=c.count(0), default=settings.SCAN_BOOT, metavar="N",
                   help=f"bootstrap resamples for intervals (default {settings.SCAN_BOOT})")
    p.add_argument("--no-shift", action="store_true", help="skip the shift test")
    p.add_argument("--no-induction", action="store_true", help="skip the induction test")
    p.add_argument("--findings", type=Path, default=None, metavar="FILE",
                   help="findings file to include in the HTML report")


def check(args) -> None:
    c.check_outputs({"--json": args.json, "--html": args.html},
                    {"--findings": args.findings, "--text": args.text})
    c.check_model(args)
    args.raw_texts = c.read_texts(args)
    args.store = None
    if args.html and args.findings:
        from ..findings import Findings

        args.store = Findings(args.findings)
        args.store.all()      # a corrupt findings file is reported (and backed up) before the scan, not after


def run(args) -> int:
    from ..pipeline import scan as do_scan

    subject = c.load_subject(args, command="scan")
    result = do_scan(subject, args.raw_texts, max_tokens=args.max_tokens, n_boot=args.boot, shift=not args.no_shift,
                     induction=not args.no_induction)
    print(result.text())
    if args.json:
        c.write("scan JSON", args.json, lambda: result.save(args.json))
    if args.html:
        from ..report import write_report

        c.write("HTML report", args.html, lambda: write_report(result, args.html, findings=args.store))
    return 0
