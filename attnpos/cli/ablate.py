"""``attnpos ablate``: replace heads' outputs and measure what the model loses — the intervention that backs a role."""

from __future__ import annotations

from ..core import keys, settings
from ..errors import AttnposError
from . import _common as c



def add_arguments(p) -> None:
    c.add_model_arguments(p)
    p.add_argument("--heads", default=None, metavar="KEYS",
                   help="comma-separated heads as attnpos scan prints them (L0.H1,L2.H3, decoder:L1.H0; a layer L2 "
                        "means each of its heads); default: every head")
    c.add_text_arguments(p)
    p.add_argument("--how", choices=settings.ABLATION_HOWS, default=settings.ABLATION_HOWS[0],
                   help="replace the head's output by its mean over the texts (default) or by zeros")
    p.add_argument("--together", action="store_true",
                   help="ablate the given heads all at once (one row) instead of one at a time")
    p.add_argument("--boot", type=c.count(0), default=settings.ABLATION_BOOT, metavar="N",
                   help=f"bootstrap resamples over texts ({settings.ABLATION_BOOT})")
    c.add_json_argument(p, "results")


def check(args) -> None:
    if args.heads is not None:
        parsed = keys.parse_keys(args.heads)      # the grammar: a bad key is refused before the model loads
        if not parsed:
            raise AttnposError("--heads is empty: give keys such as L0.H1,L2.H3, or leave it out for every head.")
    loc = c.check_model(args)
    c.check_outputs({"--json": args.json}, {"--text": c.TextInputs(args.text or []),
                                             "the model folder": c.model_files(loc)})
    if args.heads is not None:
        # heads the model does not have are refused now, from config.json, not after the model loaded
        n_layers, n_heads = c.config_shape(loc.config)
        for k in parsed:
            if k.stack == keys.MAIN and k.layer is not None and n_layers is not None and k.layer >= n_layers:
                raise AttnposError(f"{args.model} has no head {k} (--heads): it has {n_layers} layers (L0 … "
                                   f"L{n_layers - 1}).")
            if k.head is not None and n_heads is not None and k.head >= n_heads:
                raise AttnposError(f"{args.model} has no head {k} (--heads): it has {n_heads} heads per layer (H0 … "
                                   f"H{n_heads - 1}).")
    args.raw_texts = c.read_texts(args)


def starting(args) -> None:
    """The command's first line, printed before anything heavy is imported (torch alone takes seconds)."""
    c.announce(args, "ablate")


def run(args) -> int:
    from ..ablation import ablate

    res = ablate(c.load_subject(args), args.heads, args.raw_texts, how=args.how, together=args.together,
                 max_tokens=args.max_tokens, n_boot=args.boot)
    print(res.text())
    if args.json:
        c.write("ablation JSON", args.json, lambda: res.save(args.json))
    return 0
