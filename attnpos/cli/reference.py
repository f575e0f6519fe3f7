"""``attnpos reference corpus|probe|table``: facts about the reference models' corpus and training."""

from __future__ import annotations

from pathlib import Path

from ..locate import reference_names



def add_arguments(p) -> None:
    sub = p.add_subparsers(dest="what", metavar="WHAT", required=True)
    c = sub.add_parser("corpus", help="print the corpus's size, hash and unigram entropy; --out writes the text")
    c.add_argument("--seed", type=int, default=None, help="corpus seed (default: the reference models' own)")
    c.add_argument("--out", type=Path, default=None, help="write the corpus text to this file")
    q = sub.add_parser("probe", help="quick ridge probe for absolute position of reference models, per layer")
    q.add_argument("schemes", nargs="*", default=["none"], choices=reference_names())
    q.add_argument("--seed", type=int, default=0)
    sub.add_parser("table", help="the training table of the shipped reference models (from their configs)")


def check(args) -> None:
    if args.what == "corpus" and args.out is not None:
        from ._common import check_outputs

        check_outputs({"--out": args.out})


def run(args) -> int:
    if args.what == "corpus":
        from ..files import write_atomic
        from ..reference import corpus

        docs = corpus.generate_documents(corpus.CORPUS_SEED if args.seed is None else args.seed)
        text = corpus.corpus_text(docs)
        print(f"documents {len(docs)}  bytes {len(text.encode())}  sha256 {corpus.corpus_sha256(docs)}  "
              f"unigram entropy {corpus.unigram_entropy(corpus.split_documents(docs)[0]):.4f} nats/byte")
        if args.out:
            write_atomic(args.out, text)
    elif args.what == "probe":
        from ..reference.position_probe import report

        print(report(args.schemes, seed=args.seed))
    else:
        from ..reference.training_table import table

        print(table())
    return 0
