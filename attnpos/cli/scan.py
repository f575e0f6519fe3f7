"""``attnpos scan``: per-head masses, score split, slope, shift test, induction, roles; JSON and an HTML report."""

from __future__ import annotations

from pathlib import Path

from ..core import settings
from ..errors import AttnposError
from . import _common as c



def add_arguments(p) -> None:
    c.add_model_arguments(p)
    c.add_text_arguments(p)
    p.add_argument("--json", type=Path, default=None, metavar="OUT", help="write the scan as JSON (attnpos.scan/3)")
    p.add_argument("--html", type=Path, default=None, metavar="OUT", help="write a self-contained HTML report")
    p.add_argument("--boot", type=c.count(0), default=settings.SCAN_BOOT, metavar="N",
                   help=f"bootstrap resamples for intervals (default {settings.SCAN_BOOT})")
    p.add_argument("--no-shift", action="store_true", help="skip the shift test")
    p.add_argument("--no-induction", action="store_true", help="skip the induction test")
    p.add_argument("--findings", type=Path, default=None, metavar="FILE",
                   help="findings file to include in the HTML report")
    p.add_argument("--figures", type=Path, default=None, metavar="DIR",
                   help="write the atlas and the notable heads' cards as PNG, SVG and PDF figures into DIR "
                        "(created if missing)")


def check(args) -> None:
    loc = c.check_model(args)
    c.check_outputs({"--json": args.json, "--html": args.html},
                    {"--findings": args.findings, "--text": c.TextInputs(args.text or []),
                     "the model folder": c.model_files(loc)})
    if args.figures is not None:
        fig = args.figures.expanduser()
        if fig.exists() and not fig.is_dir():
            raise AttnposError(f"{fig} is a file; --figures takes a folder to write the figures into.")
        if not fig.absolute().parent.is_dir():
            raise AttnposError(f"The folder {fig.absolute().parent} for --figures does not exist. Create it first, "
                               "or give a folder inside an existing one.")
    args.raw_texts = c.read_texts(args)
    args.store = None
    if (args.html or args.figures) and args.findings:
        from ..findings import Findings

        args.store = Findings(args.findings)
        args.store.all()      # a corrupt findings file is reported (and backed up) before the scan, not after


def starting(args) -> None:
    """The command's first line, printed before anything heavy is imported (torch alone takes seconds)."""
    c.announce(args, "scan")


def run(args) -> int:
    from ..pipeline import scan as do_scan

    subject = c.load_subject(args)
    result = do_scan(subject, args.raw_texts, max_tokens=args.max_tokens, n_boot=args.boot, shift=not args.no_shift,
                     induction=not args.no_induction)
    print(result.text())
    if args.json:
        c.write("scan JSON", args.json, lambda: result.save(args.json))
    if args.html:
        from ..report import write_report

        c.write("HTML report", args.html, lambda: write_report(result, args.html, findings=args.store))
    if args.figures is not None:
        from ..views.figures import write_figures

        marks = None
        if args.store is not None:
            from ..views.data import finding_rows, marks_from

            marks = marks_from(finding_rows(args.store, result))
        try:
            paths = write_figures(result, args.figures, marks=marks)
        except OSError as exc:
            raise AttnposError(f"Could not write the figures to {args.figures} ({exc.strerror or exc}). Check free "
                               "space and permissions, then try again.") from None
        print(f"wrote {len(paths)} figures to {args.figures} (atlas, {len(paths) // 3 - 1} cards; PNG, SVG, PDF)")
    return 0
