"""Compare two checkpoints head by head: which heads changed role, score-split shares or slope.

Typical use: the same architecture before and after context extension or fine-tuning. Each side is a
:class:`~attnpos.results.scan.Scan` (or a model, scanned here on the same texts). A head is listed when

* its **role** differs, or
* one of its **shares** (distance, slot, content, residual) changed *beyond its intervals*: the two 90% bootstrap
  intervals (over texts) do not overlap, or
* its **slope** changed beyond its intervals, in the same sense.

Without intervals (a scan of one text, or ``n_boot=0``) shares and slopes cannot be judged and only roles are
compared; the result says so. Both sides must have the same grid of heads (stacks, layers, heads per layer);
different model classes with the same grid can be compared (a note says so), different grids cannot.

Example::

    >>> from attnpos.views.synthetic import synthetic_scan
    >>> res = compare(synthetic_scan(seed=0), synthetic_scan(seed=1))      # two saved scans would do the same
    >>> res.summary["heads"], list(res.table().columns[:4])
    (16, ['key', 'stack', 'layer', 'head'])

Command line: ``attnpos compare A B --text notes/ --json diff.json`` (A and B: model folders, ``ref:<scheme>``,
or scan JSON files written by ``attnpos scan --json``).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from .errors import AttnposError
from .core import keys
from .core.columns import PART_NAMES
from .results.compare import CAUTION, COLUMNS, CompareResult  # noqa: F401
from .results.scan import Scan


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


def compare_scans(a: Scan, b: Scan, *, all_heads: bool = False) -> CompareResult:
    """The head-by-head comparison of two scans (see the module doc): a
    :class:`~attnpos.results.compare.CompareResult` whose ``table()`` lists the changed heads (every head with
    ``all_heads``)."""
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
        for part in PART_NAMES:
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
        rows.append({"key": keys.head_key(*key), "stack": key[0], "layer": key[1], "head": key[2],
                     "role_a": ra["role"], "role_b": rb["role"],
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
    return CompareResult(a=a.model, b=b.model, rows=df, summary=summary, notes=notes, all_heads=all_heads)


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


def compare(a, b, texts=None, *, all_heads: bool = False, **scan_kwargs) -> CompareResult:
    """Compare two checkpoints head by head.

    Args:
        a, b: :class:`~attnpos.results.scan.Scan` objects, Subjects, model folders, ``"ref:<scheme>"`` names, or scan JSON
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
