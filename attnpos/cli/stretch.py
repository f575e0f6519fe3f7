"""``attnpos stretch``: what-if context extension — a RoPE checkpoint rerun under each scaling (linear, dynamic,
YaRN, Llama 3), per-position loss of each and which heads break past the training length."""

from __future__ import annotations

from pathlib import Path

from ..core import settings
from ..errors import AttnposError
from . import _common as c


def add_arguments(p) -> None:
    c.add_model_arguments(p)
    p.add_argument("--to", type=c.count(4), required=True, metavar="N",
                   help="sequence length in tokens, past the training length")
    p.add_argument("--scaling", action="append", default=None, metavar="VARIANT",
                   help="a context-extension variant: linear[:F] (position interpolation), dynamic[:F] (NTK-style, "
                        "F default 2), yarn[:F[:BETA_FAST:BETA_SLOW]], llama3[:F[:LOW:HIGH]]; F defaults to N / "
                        "training length; repeatable (default: linear, dynamic, yarn); the unscaled model is always "
                        "measured")
    c.add_long_text_arguments(p, settings.STRETCH_SEQUENCES,
                              f"at most K sequences, read by every variant ({settings.STRETCH_SEQUENCES})")
    p.add_argument("--boot", type=c.count(0), default=settings.STRETCH_BOOT,
                   help=f"bootstrap resamples over sequences for the intervals ({settings.STRETCH_BOOT})")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    c.add_json_argument(p, "results")
    p.add_argument("--report", type=Path, default=None, metavar="OUT.html",
                   help="write a standalone HTML report: loss curves of every variant and the heads × variants grid")


def check(args) -> None:
    from ..core import scalings

    c.check_outputs({"--json": args.json, "--report": args.report}, {"--text": args.text})
    loc = c.check_model(args)
    cfg = loc.config or {}
    scheme = args.scheme.split(",") if getattr(args, "scheme", None) else None
    stated = scheme if scheme else [scalings.scheme_of_config(cfg)]
    if all(s is not None and s != "rope" for s in stated):
        raise AttnposError(scalings.refusal(stated[0], args.model))
    done = scalings.already_scaled(cfg.get("rope_parameters") or cfg.get("rope_scaling"))
    if done:
        raise AttnposError(f"{args.model} already uses {done} rope scaling; attnpos stretch starts from a plain "
                           "RoPE checkpoint (rope_type default).")
    L, source = scalings.training_length_of_config(cfg, args.training_length)
    scalings.check_request(args.to, L, source)
    args.variants = scalings.parse_all(args.scaling or ["linear", "dynamic", "yarn"], args.to / L)
    from ..texts import read

    args.raw_texts = read(args.text) if args.text else None


def run(args) -> int:
    from ..stretching import stretch

    res = stretch(c.load_subject(args), args.raw_texts, to=args.to, scalings=args.variants,
                  training_length=args.training_length, n_sequences=args.sequences, n_boot=args.boot,
                  progress=not args.quiet)
    print(res.text())
    if args.json:
        c.write("stretch JSON", args.json, lambda: res.save(args.json))
    if args.report:
        from ..stretch_report import write_stretch_report

        c.write("stretch report", args.report, lambda: write_stretch_report(res, args.report))
    return 0
