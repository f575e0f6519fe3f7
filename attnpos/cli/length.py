"""``attnpos length``: behaviour past the training length — per-position loss, entropy and first-token weight per
head, role drift."""

from __future__ import annotations


from ..core import settings
from . import _common as c



def add_arguments(p) -> None:
    c.add_model_arguments(p)
    p.add_argument("--to", type=c.count(4), required=True, metavar="N",
                   help="sequence length in tokens (may exceed the training length)")
    c.add_long_text_arguments(p, settings.LENGTH_SEQUENCES, f"at most K sequences ({settings.LENGTH_SEQUENCES})")
    p.add_argument("--bins", type=c.count(1), default=settings.LENGTH_BINS,
                   help=f"about this many query-position bins ({settings.LENGTH_BINS})")
    p.add_argument("--boot", type=c.count(0), default=settings.LENGTH_BOOT,
                   help=f"bootstrap resamples for loss intervals ({settings.LENGTH_BOOT})")
    c.add_json_argument(p, "results")


def check(args) -> None:
    loc = c.check_model(args)
    from ..sizes import refuse_long_sequence

    refuse_long_sequence(loc.config, args.to, f"attnpos length --to {args.to} on {args.model}")
    c.check_outputs({"--json": args.json}, {"--text": c.TextInputs(args.text or []),
                                             "the model folder": c.model_files(loc)})
    from ..texts import read

    args.raw_texts = read(args.text) if args.text else None


def starting(args) -> None:
    """The command's first line, printed before anything heavy is imported (torch alone takes seconds)."""
    c.announce(args, "length")


def run(args) -> int:
    from ..length import length

    res = length(c.load_subject(args), args.raw_texts, to=args.to, training_length=args.training_length,
                 n_sequences=args.sequences, bins=args.bins, n_boot=args.boot)
    print(res.text())
    if args.json:
        c.write("length JSON", args.json, lambda: res.save(args.json))
    return 0
