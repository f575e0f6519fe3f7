"""Compare two checkpoints head by head: which heads changed role, score-split shares or slope.

Typical use: the same architecture before and after context extension or fine-tuning. Each side is a
:class:`~attnpos.result.Scan` (or a model, scanned here on the same texts). A head is listed when

* its **role** differs, or
* one of its **shares** (distance, slot, content, residual) changed *beyond its intervals*: the two 90% bootstrap
  intervals (over texts) do not overlap, or
* its **slope** changed beyond its intervals, in the same sense.

Without intervals (a scan of one text, or ``n_boot=0``) shares and slopes cannot be judged and only roles are
compared; the result says so. Both sides must have the same grid of heads (stacks, layers, heads per layer);
different model classes with the same grid can be compared (a note says so), different grids cannot.

Example::

    >>> table = compare("/ckpt/before", "/ckpt/after", texts)          # doctest: +SKIP
    >>> table[["layer", "head", "role_a", "role_b", "changed_shares"]]   # doctest: +SKIP

Command line: ``attnpos compare A B --text notes/ --json diff.json`` (A and B: model folders, ``ref:<scheme>``,
or scan JSON files written by ``attnpos scan --json``).
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import AttnposError
from .result import CAUTION as SCAN_CAUTION, SHARE_PARTS, Scan


CAUTION = ("A changed role or share says the attention pattern moved on these texts, which is evidence, not "
           "explanation; " + SCAN_CAUTION.split(": ", 1)[-1])

COLUMNS = ["stack", "layer", "head", "role_a", "role_b", "role_changed", "changed_shares", "slope_a", "slope_b",
           "slope_changed", "changed", "detail"]


def _apart(lo_a, hi_a, lo_b, hi_b) -> bool | None:
    """True when [lo_a, hi_a] and [lo_b, hi_b] do not overlap; None when an interval is missing."""
    vals = [lo_a, hi_a, lo_b, hi_b]
    if any(v is None or not np.isfinite(float(v)) for v in vals):
        return None
    return bool(hi_a < lo_b or hi_b < lo_a)


def _grid(scan: Scan) -> list[tuple]:
    return sorted(set(zip(scan.heads["stack"], scan.heads["layer"].astype(int), scan.heads["head"].astype(int))))


def check_same_grid(a: Scan, b: Scan) -> list[str]:
    """Raise unless both scans have the same heads; return notes (e.g. different model classes)."""
    ga, gb = _grid(a), _grid(b)
    if ga != gb:
        la = f"{a.model.get('layers')} layers × {a.model.get('heads')} heads ({a.model.get('architecture')})"
        lb = f"{b.model.get('layers')} layers × {b.model.get('heads')} heads ({b.model.get('architecture')})"
        raise AttnposError(f"The two checkpoints do not have the same heads: A has {la}, B has {lb}. Compare "
                           "checkpoints of one architecture (e.g. before and after fine-tuning or context "
                           "extension); for different architectures, read their scans side by side instead.")
    notes = []
    if a.model.get("architecture") != b.model.get("architecture"):
        notes.append(f"Different model classes ({a.model.get('architecture')} vs {b.model.get('architecture')}) with "
                     "the same grid of heads: heads are matched by layer and index only.")
    if a.texts_hash and b.texts_hash and a.texts_hash != b.texts_hash:
        notes.append("The two scans were made on different texts (or tokenizers); shares depend on the texts, so "
                     "rescan both on the same texts for a fair comparison.")
    if a.model.get("fingerprint") and a.model.get("fingerprint") == b.model.get("fingerprint"):
        notes.append("Both sides have the same fingerprint (identical config and weights).")
    return notes


def compare_scans(a: Scan, b: Scan, *, all_heads: bool = False) -> pd.DataFrame:
    """The head-by-head comparison of two scans (see the module doc). Only changed heads unless ``all_heads``.

    The returned DataFrame carries ``attrs["notes"]`` and ``attrs["summary"]``."""
    notes = check_same_grid(a, b)
    ta = a.heads.set_index(["stack", "layer", "head"])
    tb = b.heads.set_index(["stack", "layer", "head"])
    rows = []
    judged = 0
    for key in _grid(a):
        ra, rb = ta.loc[key], tb.loc[key]
        role_changed = ra["role"] != rb["role"]
        changed_shares = []
        details = []
        if role_changed:
            details.append(f"role {ra['role']} → {rb['role']}")
        any_interval = False
        for part in SHARE_PARTS:
            ap = _apart(ra[f"share_{part}_lo"], ra[f"share_{part}_hi"], rb[f"share_{part}_lo"], rb[f"share_{part}_hi"])
            if ap is not None:
                any_interval = True
            if ap:
                changed_shares.append(part)
                details.append(f"{part} share {float(ra[f'share_{part}']):.2f} "
                               f"[{float(ra[f'share_{part}_lo']):.2f}, {float(ra[f'share_{part}_hi']):.2f}] → "
                               f"{float(rb[f'share_{part}']):.2f} "
                               f"[{float(rb[f'share_{part}_lo']):.2f}, {float(rb[f'share_{part}_hi']):.2f}]")
        sl = _apart(ra["slope_lo"], ra["slope_hi"], rb["slope_lo"], rb["slope_hi"])
        if sl is not None:
            any_interval = True
        if sl:
            details.append(f"slope {float(ra['slope']):.3f} [{float(ra['slope_lo']):.3f}, {float(ra['slope_hi']):.3f}]"
                           f" → {float(rb['slope']):.3f} [{float(rb['slope_lo']):.3f}, {float(rb['slope_hi']):.3f}]")
        judged += any_interval
        changed = bool(role_changed or changed_shares or sl)
        rows.append({"stack": key[0], "layer": key[1], "head": key[2], "role_a": ra["role"], "role_b": rb["role"],
                     "role_changed": bool(role_changed), "changed_shares": changed_shares,
                     "slope_a": float(ra["slope"]), "slope_b": float(rb["slope"]), "slope_changed": bool(sl),
                     "changed": changed, "detail": "; ".join(details)})
    df = pd.DataFrame(rows, columns=COLUMNS)
    if judged == 0:
        notes.append("Neither scan has bootstrap intervals (one text, or n_boot=0), so only roles were compared. "
                     "Scan at least two texts with intervals to compare shares and slopes.")
    summary = {"heads": len(df), "changed": int(df["changed"].sum()), "role_changed": int(df["role_changed"].sum()),
               "shares_changed": int((df["changed_shares"].apply(len) > 0).sum()),
               "slope_changed": int(df["slope_changed"].sum()), "judged_with_intervals": int(judged)}
    out = df if all_heads else df[df["changed"]].reset_index(drop=True)
    out.attrs["notes"] = notes
    out.attrs["summary"] = summary
    out.attrs["a"] = a.model
    out.attrs["b"] = b.model
    return out


def _is_scan(x) -> bool:
    """A Scan, or a path to a scan JSON file (neither needs torch)."""
    return isinstance(x, Scan) or (isinstance(x, (str, Path)) and str(x).endswith(".json") and Path(x).is_file())


def _as_scan(x, texts, scan_kwargs) -> Scan:
    if isinstance(x, Scan):
        return x
    if _is_scan(x):
        return Scan.from_json(x)
    from .pipeline import scan as do_scan
    from .subject import Subject

    if isinstance(x, (str, Path, Subject)):
        from threadpoolctl import threadpool_limits

        # the split solves many small eigen-problems: one BLAS thread is faster (scoped to this call)
        with threadpool_limits(limits=1, user_api="blas"):
            return do_scan(x, texts, **scan_kwargs)
    raise AttnposError(f"Cannot compare a {type(x).__name__}: give a Scan, a Subject, a model folder, "
                       "'ref:<scheme>', or a scan JSON file.")


def compare(a, b, texts=None, *, all_heads: bool = False, **scan_kwargs) -> pd.DataFrame:
    """Compare two checkpoints head by head.

    Args:
        a, b: :class:`~attnpos.result.Scan` objects, Subjects, model folders, ``"ref:<scheme>"`` names, or scan JSON
            files. Models are scanned here, both on the same ``texts``.
        texts: texts for the scans (None: the bundled samples). Ignored for sides that are already scans.
        all_heads: return every head (with a ``changed`` column) instead of only the changed ones.
        scan_kwargs: passed to :func:`attnpos.scan` (e.g. ``n_boot``, ``shift``, ``induction``, ``max_tokens``).
    """
    if _is_scan(a) and _is_scan(b):                 # two saved scans: no model, no torch
        return compare_scans(_as_scan(a, None, {}), _as_scan(b, None, {}), all_heads=all_heads)
    from .subject import Subject, load

    if not isinstance(a, (Scan, Subject)) and not str(a).endswith(".json"):
        a = load(a)
    if not isinstance(b, (Scan, Subject)) and not str(b).endswith(".json"):
        b = load(b)
    if isinstance(a, Subject) and isinstance(b, Subject):
        ga = [(s.stack, s.layer) for s in a.sites]
        gb = [(s.stack, s.layer) for s in b.sites]
        if ga != gb or a.n_heads != b.n_heads:
            raise AttnposError(f"The two checkpoints do not have the same heads: A ({a.architecture}) has "
                               f"{a.n_layers} layers × {a.n_heads} heads, B ({b.architecture}) has {b.n_layers} "
                               f"layers × {b.n_heads} heads. Compare checkpoints of one architecture (e.g. before and "
                               "after fine-tuning or context extension).")
    sa = _as_scan(a, texts, scan_kwargs)
    sb = _as_scan(b, texts, scan_kwargs)
    return compare_scans(sa, sb, all_heads=all_heads)


def to_json(table: pd.DataFrame) -> dict:
    """JSON-safe form of a comparison."""
    from .result import json_safe

    heads = []
    for _, r in table.iterrows():
        heads.append({"stack": r["stack"], "layer": int(r["layer"]), "head": int(r["head"]),
                      "role": {"a": r["role_a"], "b": r["role_b"], "changed": bool(r["role_changed"])},
                      "changed_shares": list(r["changed_shares"]),
                      "slope": {"a": r["slope_a"], "b": r["slope_b"], "changed": bool(r["slope_changed"])},
                      "changed": bool(r["changed"]), "detail": r["detail"]})
    return json_safe({"a": table.attrs.get("a"), "b": table.attrs.get("b"), "summary": table.attrs.get("summary"),
                   "rule": "changed = role differs, or a share's / the slope's 90% bootstrap intervals do not overlap",
                   "heads": heads, "notes": table.attrs.get("notes", []), "caution": CAUTION})


def print_table(table: pd.DataFrame, out=None) -> None:
    out = out or sys.stdout
    a, b = table.attrs.get("a") or {}, table.attrs.get("b") or {}
    s = table.attrs.get("summary") or {}
    print(f"A: {a.get('name')} ({a.get('architecture')}, fingerprint {str(a.get('fingerprint'))[:12]})", file=out)
    print(f"B: {b.get('name')} ({b.get('architecture')}, fingerprint {str(b.get('fingerprint'))[:12]})", file=out)
    print(f"{s.get('changed', 0)} of {s.get('heads', 0)} heads changed (role {s.get('role_changed', 0)}, shares "
          f"{s.get('shares_changed', 0)}, slope {s.get('slope_changed', 0)}; a share or slope counts as changed when "
          "the two 90% intervals do not overlap)", file=out)
    shown = table[table["changed"]] if "changed" in table else table
    if len(shown):
        hdr = f"{'head':<12} {'role A':<15} {'role B':<15} {'shares changed':<34} {'slope A':>8} {'slope B':>8}"
        print(hdr, file=out)
        print("-" * len(hdr), file=out)
        for _, r in shown.iterrows():
            name = (f"{r['stack'][:3]}:" if r["stack"] != "main" else "") + f"L{r['layer']}.H{r['head']}"
            sl = lambda x: "—" if not np.isfinite(x) else f"{x:.3f}"  # noqa: E731
            mark = "*" if r["slope_changed"] else " "
            print(f"{name:<12} {r['role_a']:<15} {r['role_b']:<15} {', '.join(r['changed_shares']) or '—':<34} "
                  f"{sl(r['slope_a']):>8} {sl(r['slope_b']):>7}{mark}", file=out)
        print("(* slope changed beyond its intervals)", file=out)
    for n in table.attrs.get("notes", []):
        print("notice: " + n, file=out)
    print("note: " + CAUTION, file=out)


# --------------------------------------------------------------------------------------------------- CLI

def add_arguments(p) -> None:
    from .cli import add_text_arguments

    p.add_argument("a", help="model A: folder, ref:<scheme>, or a scan JSON file")
    p.add_argument("b", help="model B: folder, ref:<scheme>, or a scan JSON file")
    add_text_arguments(p)
    p.add_argument("--json", type=Path, default=None, metavar="OUT", help="write the comparison as JSON")
    p.add_argument("--boot", type=int, default=100, metavar="N", help="bootstrap resamples for intervals (100)")
    p.add_argument("--all", action="store_true", help="list every head, not only the changed ones")
    p.add_argument("--no-shift", action="store_true", help="skip the shift test in the scans")
    p.add_argument("--no-induction", action="store_true", help="skip the induction test in the scans")
    p.add_argument("--allow-pickle", action="store_true", help="also load pickle (*.bin) weights (weights_only)")
    p.add_argument("--trust-remote-code", action="store_true", help="run modelling code shipped in the folders")


def run(args) -> int:
    from .cli import read_texts

    def side(x):
        if _is_scan(x):
            return Scan.from_json(x)
        from .subject import load

        return load(x, allow_pickle=args.allow_pickle, trust_remote_code=args.trust_remote_code)

    a, b = side(args.a), side(args.b)
    texts = None if _is_scan(a) and _is_scan(b) else read_texts(args)
    table = compare(a, b, texts, all_heads=args.all, n_boot=args.boot,
                    shift=not args.no_shift, induction=not args.no_induction, max_tokens=args.max_tokens)
    print_table(table)
    if args.json:
        Path(args.json).write_text(json.dumps(to_json(table), indent=1, ensure_ascii=False), encoding="utf-8")
        print(f"wrote {args.json}")
    return 0
