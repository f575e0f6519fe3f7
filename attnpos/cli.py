"""The command line: ``attnpos scan | probe | length | compare | train``.

Each sub-command lives in the module that owns its stage and exposes ``add_arguments(parser)`` and
``run(args) -> int``; this file only wires them (one line of help each, in :data:`COMMANDS`) and turns
:class:`~attnpos.errors.AttnposError` into a short message and a non-zero exit (``--debug`` shows the traceback).
Only the chosen sub-command's module is imported, so ``attnpos --help`` and ``attnpos compare`` do not start torch.
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys
import warnings
from pathlib import Path

from .errors import AttnposError

# sub-command → (module that implements it, one line of help)
COMMANDS = {
    "scan": ("attnpos.cli", "scan a model: per-head masses, score split, slope, shift test, induction, roles"),
    "probe": ("attnpos.probes", "ridge probes for absolute position per layer, with a shuffled control and an "
                                "untrained copy"),
    "length": ("attnpos.length", "behaviour past the training length: per-position loss, entropy and first-token "
                                 "weight per head, role drift"),
    "ablate": ("attnpos.ablation", "ablate heads one at a time: change of loss (with an interval) and of the final "
                                   "hidden states — the intervention that backs a role"),
    "compare": ("attnpos.compare", "compare two checkpoints head by head: role, score-split shares and slope "
                                   "changes beyond their intervals"),
    "train": ("attnpos.reference.train", "Train one reference model on CPU: ``attnpos train SCHEME --out DIR "
                                         "[--minutes M] [--context N] [--seed S] [--steps N]``."),
}


def _count(minimum: int):
    """An argparse type: a whole number of at least ``minimum`` (argparse turns the error into a usage message)."""
    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
        if value < minimum:
            raise argparse.ArgumentTypeError(f"{value} is too small: give at least {minimum}")
        return value
    return parse


def add_text_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--text", action="append", type=Path, default=None, metavar="PATH",
                   help="a .txt file (one text) or a folder (each .txt a text); repeatable; default: the bundled "
                        "sample texts")
    p.add_argument("--lines", action="store_true", help="make each non-empty line its own text")
    p.add_argument("--max-tokens", type=_count(1), default=None, metavar="N",
                   help="split texts into windows of at most N tokens (default: the model's context limit)")


def add_model_arguments(p: argparse.ArgumentParser, default: str | None = "ref:rope") -> None:
    p.add_argument("model", nargs="?" if default else None, default=default,
                   help="model folder (config.json + *.safetensors) or ref:<scheme>" +
                        (f" (default {default})" if default else ""))
    p.add_argument("--scheme", default=None,
                   help="state the position scheme by hand (one name, or comma-separated per layer): "
                        "learned-absolute, sinusoidal, relative-bias, alibi, rope, none")
    p.add_argument("--allow-pickle", action="store_true",
                   help="also load pickle (*.bin) weights, with torch's weights_only restriction")
    p.add_argument("--trust-remote-code", action="store_true",
                   help="run modelling code shipped inside the model folder (only for folders you trust)")


def load_subject(args):
    from .subject import load

    scheme = args.scheme.split(",") if args.scheme and "," in args.scheme else args.scheme
    return load(args.model, scheme=scheme, allow_pickle=args.allow_pickle,
                trust_remote_code=args.trust_remote_code)


def read_texts(args):
    from .texts import default_texts, read

    return read(args.text, lines=args.lines) if args.text else default_texts()


def add_arguments(p: argparse.ArgumentParser) -> None:
    add_model_arguments(p)
    add_text_arguments(p)
    p.add_argument("--json", type=Path, default=None, metavar="OUT", help="write the scan as JSON (attnpos.scan/1)")
    p.add_argument("--html", type=Path, default=None, metavar="OUT", help="write a self-contained HTML report")
    p.add_argument("--boot", type=_count(0), default=100, metavar="N", help="bootstrap resamples for intervals (default 100)")
    p.add_argument("--no-shift", action="store_true", help="skip the shift test")
    p.add_argument("--no-induction", action="store_true", help="skip the induction test")
    p.add_argument("--findings", type=Path, default=None, metavar="FILE",
                   help="findings file to include in the HTML report")


def print_table(scan, out=None) -> None:
    out = out if out is not None else sys.stdout   # looked up at call time: stdout may be redirected
    m = scan.model
    scheme = m["scheme"] if isinstance(m["scheme"], str) else ",".join(m["scheme"])
    print(f"{m['name']}  {m['architecture']}  scheme={scheme}  layers={m['layers']} heads={m['heads']}  "
          f"causal={m['causal']}  capture={m.get('capture')} ({m.get('score_kind')})", file=out)
    print(f"texts: {len(scan.texts)} ({sum(t['n_tokens'] for t in scan.texts)} tokens)  "
          f"fingerprint {m['fingerprint'][:16]}", file=out)
    hdr = (f"{'head':<12} {'role':<15} {'prev':>5} {'next':>5} {'first':>5} {'self':>5}  {'dist':>5} {'slot':>5} "
           f"{'cont':>5} {'resid':>5}  {'slope':>7}  {'ind':>5}  shift")
    print(hdr, file=out)
    print("-" * len(hdr), file=out)

    def f(x, w=5, nd=2):
        try:
            xf = float(x)
        except (TypeError, ValueError):
            return "—".rjust(w)
        return ("—" if xf != xf else f"{xf:.{nd}f}").rjust(w)

    for _, r in scan.heads.iterrows():
        name = (f"{r['stack'][:3]}:" if r["stack"] != "main" else "") + f"L{r['layer']}.H{r['head']}"
        shift = "—" if r.get("shift_verdict") is None else f"{r['shift_verdict']} ({float(r['shift_change']):.3f})"
        print(f"{name:<12} {r['role']:<15} {f(r['mass_previous'])} {f(r['mass_next'])} {f(r['mass_first'])} "
              f"{f(r['mass_self'])}  {f(r['share_distance'])} {f(r['share_slot'])} {f(r['share_content'])} "
              f"{f(r['share_residual'])}  {f(r['slope'], 7, 3)}  {f(r['induction'])}  {shift}", file=out)
    counts = scan.role_counts()
    print("roles: " + ", ".join(f"{k} {v}" for k, v in sorted(counts.items(), key=lambda kv: -kv[1])), file=out)
    print("note: " + scan.caution, file=out)


def check_output(path: Path | None, flag: str) -> None:
    """Refuse an output path that cannot be written before any work is done (a scan can take minutes)."""
    if path is None:
        return
    if path.is_dir():
        raise AttnposError(f"{path} is a folder; {flag} takes a file path (e.g. {path / 'attnpos-scan'}"
                           f"{'.json' if flag == '--json' else '.html'}).")
    folder = path.expanduser().absolute().parent
    if not folder.is_dir():
        raise AttnposError(f"The folder {folder} for {flag} does not exist. Create it first, or give a path in an "
                           "existing folder.")


def _write(what: str, path: Path, write) -> None:
    try:
        write()
    except OSError as exc:
        raise AttnposError(f"Could not write the {what} to {path} ({exc.strerror or exc}). Check free space and "
                           "permissions, then try again.") from None


def run(args) -> int:
    from .pipeline import scan as do_scan

    check_output(args.json, "--json")
    check_output(args.html, "--html")
    findings = None
    if args.html and args.findings:
        from .findings import Findings

        findings = Findings(args.findings)
        findings.all()          # a corrupt findings file is reported (and backed up) before the scan, not after
    subject = load_subject(args)
    raw = read_texts(args)
    result = do_scan(subject, raw, max_tokens=args.max_tokens, n_boot=args.boot, shift=not args.no_shift,
                     induction=not args.no_induction)
    print_table(result)
    if args.json:
        _write("scan JSON", args.json, lambda: result.save(args.json))
        print(f"wrote {args.json}")
    if args.html:
        from .report import write_report

        _write("HTML report", args.html, lambda: write_report(result, args.html, findings=findings))
        print(f"wrote {args.html}")
    return 0


def build_parser(command: str | None = "*") -> argparse.ArgumentParser:
    """The parser; ``command`` says whose arguments to add: ``"*"`` every sub-command's, a name that one's (the
    others get their line of help only), None none (the top-level help)."""
    from . import __version__

    parser = argparse.ArgumentParser(
        prog="attnpos",
        description="Find out how a trained transformer uses token position. Attention weights are evidence, "
                    "not explanation: confirm roles with the shift test or an ablation.")
    parser.add_argument("--version", action="version", version=f"attnpos {__version__}")
    parser.add_argument("--debug", action="store_true", help="show tracebacks")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, (modname, text) in COMMANDS.items():
        p = sub.add_parser(name, help=text, description=text)
        p.add_argument("--debug", action="store_true", help="show tracebacks")
        if command in ("*", name):
            mod = importlib.import_module(modname)
            mod.add_arguments(p)
            p.set_defaults(_run=mod.run)
    return parser


def cli_reference() -> str:
    """The ``--help`` of attnpos and of every sub-command, as the README's CLI reference shows it."""
    old = os.environ.get("COLUMNS")
    os.environ["COLUMNS"] = "100"          # argparse wraps to the terminal width: fix it for a stable text
    try:
        parser = build_parser()
        parts = ["$ attnpos --help", parser.format_help().rstrip()]
        sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
        for name, p in sub.choices.items():
            parts += ["", f"$ attnpos {name} --help", p.format_help().rstrip()]
    finally:
        if old is None:
            os.environ.pop("COLUMNS", None)
        else:
            os.environ["COLUMNS"] = old
    return "\n".join(parts) + "\n"


def main(argv: list[str] | None = None) -> int:
    os.environ.setdefault("HF_HUB_OFFLINE", "1")
    os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")
    words = sys.argv[1:] if argv is None else list(argv)
    command = next((w for w in words if not w.startswith("-")), None)
    parser = build_parser(command if command in COMMANDS else None)
    args = parser.parse_args(words)
    if not getattr(args, "_run", None):
        parser.print_help()
        return 2
    debug = getattr(args, "debug", False)
    if not debug:
        from transformers.utils import logging as hf_logging

        hf_logging.set_verbosity_error()
    warnings.simplefilter("ignore", RuntimeWarning)
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            code = args._run(args)
        for w in caught:
            if "WindowNotice" in type(w.message).__name__ or "attnpos" in str(w.filename):
                print(f"notice: {w.message}", file=sys.stderr)
        return int(code or 0)
    except AttnposError as exc:
        if debug:
            raise
        print(f"attnpos: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("attnpos: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # noqa: BLE001 - the CLI shows no traceback unless --debug
        if debug:
            raise
        print(f"attnpos: unexpected error: {type(exc).__name__}: {exc}\nRerun with --debug for the traceback, "
              "and please report it.", file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
