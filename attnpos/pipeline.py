"""The full scan: load → record → split → shift test → induction test → roles → :class:`~attnpos.results.scan.Scan`.

Example::

    >>> import attnpos
    >>> scan = attnpos.scan("ref:rope")                     # the bundled sample texts
    >>> scan.heads.query("role == 'previous-token'")[["layer", "head"]].values.tolist()
    [[0, 1]]
    >>> scan = attnpos.scan("/models/ckpt", ["my text ..."], n_boot=200)                # doctest: +SKIP
    >>> scan.save("scan.json")                                                          # doctest: +SKIP
"""

from __future__ import annotations

import platform
from typing import Any

import numpy as np

from . import __version__
from .capture import record
from .core import progress as _progress, settings
from .errors import AttnposError
from .induction import induction_scores
from .reducers import BOOT_UNITS, SplitStats, WeightStats
from .results.scan import Scan
from .roles import head_table
from .shift import ShiftTest
from .split import Split
from .subject import Subject, load
from .texts import as_raw, prepare, texts_hash


def versions() -> dict:
    import torch
    import transformers

    return {"attnpos": __version__, "torch": torch.__version__, "transformers": transformers.__version__,
            "numpy": np.__version__, "python": platform.python_version()}


def scan(model: Any, texts=None, *, scheme=None, max_tokens: int | None = None, n_boot: int = settings.SCAN_BOOT,
         shift: bool = True, induction: bool = True, keep_maps: int = 2, max_map_tokens: int = 512,
         progress: bool | None = None, allow_pickle: bool = False, trust_remote_code: bool = False,
         allow_missing_weights: bool = False) -> Scan:
    """Scan a model on texts and return a :class:`~attnpos.results.scan.Scan`.

    Args:
        model: a :class:`~attnpos.subject.Subject`, a folder, or ``"ref:<scheme>"``.
        texts: strings, ``pathlib.Path`` files/folders, or None for the bundled sample texts.
        scheme: state the position scheme by hand (see :func:`attnpos.load`).
        max_tokens: split texts into windows of at most this many tokens (default: the training length when the
            model records it, else the model's context limit).
        n_boot: bootstrap resamples over texts for the intervals.
        shift / induction: run the shift test / the induction test.
        keep_maps: keep full weight maps (for the card view) of the first this-many texts, if they have at most
            ``max_map_tokens`` tokens.
    """
    subject = model if isinstance(model, Subject) else load(model, scheme=scheme, allow_pickle=allow_pickle,
                                                            trust_remote_code=trust_remote_code,
                                                            allow_missing_weights=allow_missing_weights)
    if max_tokens is None and subject.training_length:
        # past the training length a model is in territory it never saw (that is `attnpos length`'s question);
        # a scan describes the model where it was trained
        max_tokens = subject.training_length
    units = prepare(subject, as_raw(texts), max_tokens=max_tokens)
    if all(int((~u.special).sum()) < 3 for u in units):
        raise AttnposError("Every text is shorter than 3 tokens (not counting special tokens such as [CLS], [SEP] "
                           "or BOS); attention statistics need longer texts. Pass at least one text of a few words.")
    kept = {i for i in range(min(keep_maps, len(units))) if len(units[i]) <= max_map_tokens}
    _progress.note(f"scan: recording {len(units)} text windows of {subject.name}", progress)
    tester = ShiftTest() if shift else None
    # the shift test's unshifted pass is part of this recording where it can be (causal layers)
    shift_base = tester.base_reducer(subject, units) if tester is not None else None
    reducers = [WeightStats(), SplitStats()] + ([shift_base] if shift_base is not None else [])
    rec = record(subject, units=units, reducers=reducers, keep=lambda k: k[0] in kept, progress=progress)
    _progress.note(f"scan: fitting the score split ({n_boot} bootstrap resamples)", progress)
    fit = Split(n_boot=n_boot).fit(rec)
    if shift:
        _progress.note("scan: shift test", progress)
    sh = tester.run(subject, units, base=rec.results.pop(shift_base.name, None) if shift_base else None) \
        if tester is not None else None
    if induction:
        _progress.note("scan: induction test", progress)
    ind = induction_scores(subject) if induction else None
    table = head_table(subject, rec.results["weights"], fit, sh, ind)
    info = subject.describe()
    info["capture"] = rec.capture
    info["score_kind"] = rec.score_kind
    profile = {"distance": fit.distance,
               "value": fit.profile.reshape(-1, fit.profile.shape[-1]),
               "low": fit.profile_lo.reshape(-1, fit.profile.shape[-1]),
               "high": fit.profile_hi.reshape(-1, fit.profile.shape[-1])}
    w = rec.results["weights"]
    extra = {
        "split": {"n_texts": fit.n_texts, "n_boot": fit.n_boot},
        "near": {"distance": w["near_distance"].tolist(),
                 "mean": w["near_mean"].reshape(-1, w["near_mean"].shape[-1]).tolist()},
    }
    if sh is not None:
        extra["shift"] = {"kind": sh.shift_kind, "kinds": list(sh.kinds), "offset": sh.offset, "note": sh.note}
    # display tokens of every window up to BOOT_UNITS windows; past that only of the windows whose maps are kept
    # (the views' only use of them), so a long text does not keep millions of strings: the rest are empty lists
    show = (lambda i: True) if len(units) <= BOOT_UNITS else (lambda i: i in kept)
    tokens = [list(u.tokens) if show(i) else [] for i, u in enumerate(units)]
    if len(units) > BOOT_UNITS:
        extra["split"]["windows_per_unit"] = rec.results["split"].get("windows_per_unit", 1)
        extra["tokens_left_out"] = sum(1 for i in range(len(units)) if not show(i))
    return Scan(model=info, texts=[u.describe() for u in units], tokens=tokens,
                special=[np.flatnonzero(u.special).tolist() for u in units], heads=table, profile=profile,
                maps=rec.maps, texts_hash=texts_hash(units), versions=versions(), extra=extra)
