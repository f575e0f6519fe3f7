"""``attnpos probe``: ridge probes for absolute position per layer, with a shuffled control and an untrained copy."""

from __future__ import annotations

from ..core import settings
from . import _common as c



def add_arguments(p) -> None:
    c.add_model_arguments(p)
    c.add_text_arguments(p)
    c.add_json_argument(p, "probe results")
    p.add_argument("--alpha", type=c.positive_number, action="append", default=None, metavar="A",
                   help="ridge penalty (repeat for a grid chosen on the training texts; default 1e-2 … 1e5)")
    p.add_argument("--folds", type=c.count(2), default=settings.PROBE_FOLDS,
                   help=f"folds over texts (default {settings.PROBE_FOLDS})")
    p.add_argument("--seed", type=int, default=0, help="seed of the control shuffle and the untrained copy")
    p.add_argument("--no-untrained", action="store_true", help="skip the untrained-copy baseline")
    p.add_argument("--no-bands", action="store_true", help="skip the RoPE frequency bands")


def check(args) -> None:
    loc = c.check_model(args)
    c.check_outputs({"--json": args.json}, {"--text": c.TextInputs(args.text or []),
                                             "the model folder": c.model_files(loc)})
    args.raw_texts = c.read_texts(args)


def starting(args) -> None:
    """The command's first line, printed before anything heavy is imported (torch alone takes seconds)."""
    c.announce(args, "probe")


def run(args) -> int:
    from ..probes import probe

    # the command owns the subject: its weights are freed once recorded, before the untrained copy is built
    res = probe(c.load_subject(args), args.raw_texts, alpha=args.alpha, seed=args.seed, folds=args.folds,
                untrained=not args.no_untrained, bands=not args.no_bands, max_tokens=args.max_tokens,
                release_model=True)
    print(res.text())
    if args.json:
        c.write("probe JSON", args.json, lambda: res.save(args.json))
    return 0
