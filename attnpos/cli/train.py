"""``attnpos train``: train one reference model on CPU."""

from __future__ import annotations

import shlex
from pathlib import Path

from ..core import schemes, settings
from ..locate import reference_names
from . import _common as c



def add_arguments(p) -> None:
    shipped = set(reference_names())
    p.add_argument("scheme", choices=[s for s in schemes.names() if s in shipped],
                   help="position scheme of the model to train")
    p.add_argument("--out", required=True, type=Path, help="folder to save the trained model and tokenizer into")
    p.add_argument("--minutes", type=c.positive_number, default=None,
                   help="time budget in minutes (default 4.5 when --steps is not given); always a hard cap")
    p.add_argument("--context", type=c.count(2), default=settings.REFERENCE_CONTEXT,
                   help=f"training context length in tokens (default {settings.REFERENCE_CONTEXT})")
    p.add_argument("--seed", type=int, default=0, help="seed for initialisation and batches (default 0)")
    p.add_argument("--steps", type=c.count(1), default=None,
                   help="number of updates (default: as many as fit in --minutes, measured at the start)")
    p.add_argument("--batch", type=c.count(1), default=32, help="windows per batch (default 32)")
    p.add_argument("--lr", type=c.positive_number, default=3e-3, help="peak learning rate (default 3e-3)")
    p.add_argument("--threads", type=c.count(1), default=2, help="torch CPU threads (default 2)")
    p.add_argument("--save-every", type=c.count(1), default=None, metavar="K",
                   help="also save the model every K updates into OUT/checkpoint-<step>/ (for attnpos sweep)")
    p.add_argument("--log-every", type=c.count(1), default=50, metavar="N",
                   help="record the running training loss every N updates (default 50)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")


def command_line(args) -> str:
    """The command that reproduces this run (recorded in the saved config)."""
    parts = ["attnpos", "train", args.scheme, "--out", str(args.out), "--context", str(args.context),
             "--seed", str(args.seed)]
    if args.steps is not None:
        parts += ["--steps", str(args.steps)]
    if args.minutes is not None:
        parts += ["--minutes", f"{args.minutes:g}"]
    if args.batch != 32:
        parts += ["--batch", str(args.batch)]
    if args.lr != 3e-3:
        parts += ["--lr", f"{args.lr:g}"]
    if args.save_every is not None:
        parts += ["--save-every", str(args.save_every)]
    if args.log_every != 50:
        parts += ["--log-every", str(args.log_every)]
    return shlex.join(parts)


def check(args) -> None:
    out = Path(args.out)
    if out.exists() and not out.is_dir():
        from ..errors import AttnposError

        raise AttnposError(f"--out {out} is a file; give a folder to save the model into.")


def run(args) -> int:
    from ..reference.train import train

    minutes = args.minutes
    if minutes is None and args.steps is None:
        minutes = 4.5
    _, record = train(args.scheme, args.out, context=args.context, seed=args.seed, steps=args.steps,
                      minutes=minutes, batch=args.batch, lr=args.lr, threads=args.threads,
                      progress=not args.quiet, command=command_line(args), save_every=args.save_every,
                      log_every=args.log_every)
    print(f"{args.scheme}: {record['steps']} steps in {record['minutes']:.2f} min; "
          f"loss per byte (nats) train {record['train_loss_per_byte']:.4f}, val {record['val_loss_per_byte']:.4f} "
          f"(untrained {record['val_loss_per_byte_untrained']:.4f}; unigram entropy "
          f"{record['unigram_entropy_per_byte']:.4f}); saved to {args.out}"
          + (f" (and a checkpoint every {args.save_every} steps)" if args.save_every else ""))
    return 0
