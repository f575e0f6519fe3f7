"""The command line: ``attnpos scan | probe | length | stretch | ablate | compare | sweep | train | reference``.

One module per sub-command in this package, each with ``add_arguments(parser)``,
``check(args)`` — every check that needs no model: output paths, input files, head keys, numbers, the model folder
(:mod:`attnpos.locate`) —, optionally ``starting(args)`` (the first line, naming what is loaded, printed before torch
is imported) and ``run(args) -> int``. :func:`main` runs ``check`` before ``run``, so a bad argument is
refused before torch or a model is loaded, and turns :class:`~attnpos.errors.AttnposError` into a short message and
a non-zero exit (``--debug`` shows the traceback). Only the chosen sub-command's module is imported, and nothing
below this package imports it or argparse.
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys
import warnings

from ..errors import AttnposError

COMMANDS = ("scan", "probe", "length", "stretch", "ablate", "compare", "sweep", "train", "reference")

_HELP = {
    "scan": "scan a model: per-head masses, score split, slope, shift test, induction, roles",
    "probe": "ridge probes for absolute position per layer, with a shuffled control and an untrained copy",
    "length": "behaviour past the training length: per-position loss, entropy and first-token weight per head, "
              "role drift",
    "stretch": "what-if context extension: rerun a RoPE model under linear / dynamic / YaRN / Llama 3 scaling; loss "
               "per position of each and which heads break past the training length",
    "ablate": "ablate heads one at a time: change of loss (with an interval) and of the final hidden states — the "
              "intervention that backs a role",
    "compare": "compare two checkpoints head by head: role, score-split shares and slope changes beyond their "
               "intervals",
    "sweep": "scan every checkpoint of a training run in parallel (Dask distributed) into a resumable store: when "
             "did each head get its role",
    "train": "train one reference model on CPU: attnpos train SCHEME --out DIR [--minutes M] [--context N] "
             "[--seed S] [--steps N]",
    "reference": "the reference models: their corpus (size, hash, entropy), a quick position probe, the training "
                 "table",
}
"""One line of help per sub-command, here so that ``attnpos --help`` imports no command module."""


def _module(name: str):
    return importlib.import_module(f".{name}", __name__)


def build_parser(command: str | None = "*") -> argparse.ArgumentParser:
    """The parser; ``command`` says whose arguments to add: ``"*"`` every sub-command's, a name that one's (the
    others get their line of help only), None none (the top-level help)."""
    from .. import __version__

    parser = argparse.ArgumentParser(
        prog="attnpos",
        description="Find out how a trained transformer uses token position. Attention weights are evidence, "
                    "not explanation: confirm roles with the shift test or an ablation.")
    parser.add_argument("--version", action="version", version=f"attnpos {__version__}")
    parser.add_argument("--debug", action="store_true", help="show tracebacks")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMANDS:
        p = sub.add_parser(name, help=_HELP[name], description=_HELP[name])
        p.add_argument("--debug", action="store_true", help="show tracebacks")
        if command in ("*", name):
            mod = _module(name)
            mod.add_arguments(p)
            p.set_defaults(_module=mod)
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
    mod = getattr(args, "_module", None)
    if mod is None:
        parser.print_help()
        return 2
    debug = getattr(args, "debug", False)
    warnings.simplefilter("ignore", RuntimeWarning)
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            mod.check(args)                 # everything that needs no model, before the model loads
            if hasattr(mod, "starting"):
                mod.starting(args)          # its first line: what it loads, before torch is imported
            if not debug:
                from transformers.utils import logging as hf_logging

                hf_logging.set_verbosity_error()
            code = mod.run(args)
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
