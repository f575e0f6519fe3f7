"""Texts in: read files and folders, tokenise for a subject, split past the context limit, mark special tokens.

Example::

    >>> from attnpos import texts
    >>> raw = texts.read(["notes/", "extra.txt"], lines=False)        # doctest: +SKIP
    >>> units = texts.prepare(subject, raw, max_tokens=512)           # doctest: +SKIP
    >>> units[0].name, len(units[0].ids), units[0].special[:3]        # doctest: +SKIP

A text longer than the model's context limit (or ``max_tokens``) is split into consecutive windows, each a text
unit of its own, and a notice says so; nothing is silently truncated.
"""

from __future__ import annotations

import hashlib
import os
import warnings
from collections import abc
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable, Sequence

import numpy as np

from . import sizes
from .errors import AttnposError
from .files import safe_text

SAMPLE_DIR = Path(__file__).resolve().parent.parent / "sample_text"


class WindowNotice(UserWarning):
    """A text was split into windows because it is longer than the limit."""


@dataclass
class RawText:
    name: str
    text: str
    source: str


class DisplayTokens(abc.Sequence):
    """The display string of each token id of a unit (:func:`display_tokens`), decoded when read: a long text has
    millions of tokens and only the few windows whose maps are shown need theirs. Behaves like a list of str (a
    slice is a list)."""

    __slots__ = ("_tokenizer", "_ids")

    def __init__(self, tokenizer, ids: Sequence[int]):
        self._tokenizer, self._ids = tokenizer, ids

    def __len__(self) -> int:
        return len(self._ids)

    def __getitem__(self, k):
        if isinstance(k, slice):
            return display_tokens(self._tokenizer, self._ids[k])
        return display_tokens(self._tokenizer, [self._ids[k]])[0]

    def __iter__(self):
        return iter(display_tokens(self._tokenizer, self._ids))

    def __eq__(self, other) -> bool:
        return isinstance(other, abc.Sequence) and not isinstance(other, str) and list(self) == list(other)

    def __repr__(self) -> str:
        return f"DisplayTokens({list(self)!r})"


@dataclass
class TextUnit:
    """One tokenised text (or window of one) as the model sees it."""

    name: str
    source: str
    ids: list[int]
    tokens: Sequence[str]      # display string per token (user text: escape before rendering); from prepare() a
    #                            DisplayTokens, decoded when read
    special: np.ndarray        # bool per token: BOS/CLS/SEP/EOS/PAD...
    window: tuple[int, int] | None = None   # [start, end) in the source's body tokens, when split

    def __len__(self) -> int:
        return len(self.ids)

    def describe(self) -> dict:
        return {"name": self.name, "source": self.source, "n_tokens": len(self.ids),
                "window": list(self.window) if self.window else None}


def default_texts() -> list[RawText]:
    """The bundled sample texts (``sample_text/`` at the project root)."""
    if not SAMPLE_DIR.is_dir():
        raise AttnposError(f"The bundled sample texts were not found at {SAMPLE_DIR}. Install attnpos from its "
                           "source folder (`pip install -e .`) or pass your own texts with --text.")
    return read([SAMPLE_DIR])


SNIFF_BYTES = 8192
"""How much of a text file is looked at (for NUL bytes and a UTF-16 mark) before the rest is read."""

TEXT_MEMORY_FACTOR = 250
"""Bytes of memory per byte of text file, a rough upper bound for reading and tokenising it: the bytes, the
decoded text, the tokenizer's output for the whole text, and a token id and a display string per token as Python
objects (a byte-level tokenizer makes one token per byte). Measured with ref:rope when the whole text went through
the tokenizer at once: 235 bytes per byte at 1 MB, 198 at 5 MB; tokenised in pieces (:func:`encode_long`) 26 and 19
(``python bench/text_memory.py read 1000000 5000000``, see bench/README.md). The bound stays that of the whole
text at once, which a tokenizer whose tokens change at a cut still needs."""


def _decode(path: Path) -> str:
    try:
        with path.open("rb") as fh:
            head = fh.read(SNIFF_BYTES)
            _sniff(path, head)                 # a binary file is refused before it is read whole
            size = os.fstat(fh.fileno()).st_size
            sizes.refuse_if_too_big(size * TEXT_MEMORY_FACTOR, f"Reading {path} ({sizes.human_bytes(size)}) with its "
                                    "tokens", "Split the text into smaller files, or scan a part of it.")
            data = head + fh.read()
    except OSError as exc:
        raise AttnposError(f"Cannot read {path} ({exc.strerror or exc}). Check that the file exists and is readable "
                           "by you, then try again.") from None
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise AttnposError(f"{path} is not valid UTF-8 (byte 0x{data[exc.start]:02x} at offset {exc.start}). "
                           "Convert it, e.g. `iconv -f latin1 -t utf-8 in.txt > out.txt`.") from None


def _sniff(path: Path, data: bytes) -> None:
    if data[:2] in (b"\xff\xfe", b"\xfe\xff"):
        raise AttnposError(f"{path} is UTF-16 text (it starts with a UTF-16 byte-order mark); attnpos reads UTF-8. "
                           "Convert it, e.g. `iconv -f utf-16 -t utf-8 in.txt > out.txt`.")
    if b"\x00" in data:
        raise AttnposError(f"{path} looks like a binary file (it contains NUL bytes), not text. Pass plain UTF-8 "
                           "text files (.txt).")


def read(inputs: Iterable[str | Path] | str | Path, *, lines: bool = False) -> list[RawText]:
    """Read texts from files and folders.

    Args:
        inputs: paths; a file is one text, a folder gives each ``*.txt`` inside (sorted) as a text.
        lines: make each non-empty line its own text.
    """
    if isinstance(inputs, (str, Path)):
        inputs = [inputs]
    out: list[RawText] = []
    for item in inputs:
        p = Path(item).expanduser()
        if p.is_dir():
            files = sorted(f for f in p.iterdir() if f.suffix == ".txt" and f.is_file())
            if not files:
                raise AttnposError(f"The folder {p} has no .txt files. Put each text in its own .txt file, or "
                                   "pass files directly with --text.")
        elif p.is_file():
            files = [p]
        else:
            raise AttnposError(f"No file or folder at {p}. --text takes a .txt file or a folder of them.")
        for f in files:
            body = _decode(f)
            if lines:
                for k, line in enumerate(body.splitlines()):
                    if line.strip():
                        out.append(RawText(name=f"{safe_text(f.stem)}:{k + 1}", text=line,
                                           source=safe_text(str(f))))
            else:
                out.append(RawText(name=safe_text(f.stem), text=body, source=safe_text(str(f))))
    return check(out)


def check(raw: Sequence[RawText]) -> list[RawText]:
    raw = list(raw)
    if not raw:
        raise AttnposError("No texts to scan: the inputs were empty. Pass at least one non-empty .txt file with "
                           "--text (or a list of strings from Python).")
    empty = [r.name for r in raw if not r.text.strip()]
    if empty:
        raise AttnposError(f"These texts are empty or whitespace only: {', '.join(empty[:5])}. Remove them or add "
                           "text.")
    return raw


def from_strings(strings: Sequence[str], names: Sequence[str] | None = None) -> list[RawText]:
    names = list(names) if names is not None else [f"text{i}" for i in range(len(strings))]
    return check([RawText(name=n, text=s, source="<string>") for n, s in zip(names, strings)])


def as_raw(texts) -> list[RawText]:
    """Accept RawTexts, strings (raw text), Paths (files/folders) or None (the bundled samples)."""
    if texts is None:
        return default_texts()
    if isinstance(texts, (str, Path, RawText)):
        texts = [texts]
    texts = list(texts)
    if texts and all(isinstance(t, RawText) for t in texts):
        return check(texts)
    if texts and all(isinstance(t, Path) for t in texts):
        return read(texts)
    if texts and all(isinstance(t, str) for t in texts):
        return from_strings(texts)
    if not texts:
        return check([])
    raise AttnposError("texts must be a list of strings (the texts themselves), of pathlib.Path (files or "
                       "folders), or None for the bundled samples.")


def display_tokens(tokenizer, ids: Sequence[int]) -> list[str]:
    """The display string of each token id (what the views and tables show; user text: escape it)."""
    out = []
    for i in ids:
        try:
            s = tokenizer.decode([int(i)], skip_special_tokens=False, clean_up_tokenization_spaces=False)
        except Exception:  # noqa: BLE001 - some tokenizers fail on lone ids
            s = str(tokenizer.convert_ids_to_tokens(int(i)))
        out.append(s)
    return out


def _encode(tokenizer, text: str) -> list[int]:
    """Token ids without special tokens, quietly (the length check against the model's limit is ours)."""
    try:
        try:
            return list(tokenizer(text, add_special_tokens=False, verbose=False)["input_ids"])
        except TypeError:  # a tokenizer-like object without the verbose switch
            return list(tokenizer(text, add_special_tokens=False)["input_ids"])
    except (AttnposError, KeyboardInterrupt):
        raise
    except Exception as exc:  # noqa: BLE001 - the tokenizer's own errors (a broken vocabulary) explained
        raise AttnposError(f"The model's tokenizer failed on a text ({type(exc).__name__}: {str(exc)[:200]}). Its "
                           "tokenizer files are probably damaged or incomplete (an empty vocabulary, no unknown "
                           "token); save the tokenizer again with `tokenizer.save_pretrained(folder)`.") from None


ENCODE_PIECE = 1 << 16
"""Characters of a long text tokenised at a time (:func:`encode_long`): the tokenizer's own output for a whole
text (its token strings, offsets and masks) costs about 200 bytes per character at its peak."""

_SEAM = 256


def _cut_at(text: str, at: int) -> int | None:
    """A place at or after ``at`` to cut ``text``: before a single space between two non-spaces (tokenizers that
    attach a space to the word after it, and those that split on spaces, both cut there), within 4096
    characters; None when there is none."""
    for k in range(max(at, 1), min(at + 4096, len(text) - 1)):
        if text[k] == " " and not text[k - 1].isspace() and not text[k + 1].isspace():
            return k
    return None


def encode_long(tokenizer, text: str, piece: int = ENCODE_PIECE) -> list[int]:
    """:func:`_encode` of a text of any length, a piece of about ``piece`` characters at a time, so that memory
    does not grow with the tokenizer's output for the whole text. The ids are those of the whole text at once:
    each cut (see :func:`_cut_at`) is checked by tokenising the text around it both whole and in two parts;
    when a cut changes the tokens there, or no cut is found, the whole text is tokenised at once."""
    if len(text) <= piece:
        return _encode(tokenizer, text)
    cuts = [0]
    while len(text) - cuts[-1] > piece:
        k = _cut_at(text, cuts[-1] + piece)
        if k is None:
            return _encode(tokenizer, text)
        a, b = text[max(k - _SEAM, cuts[-1]):k], text[k:k + _SEAM]
        if _encode(tokenizer, a + b) != _encode(tokenizer, a) + _encode(tokenizer, b):
            return _encode(tokenizer, text)           # this tokenizer joins or changes tokens across the cut
        cuts.append(k)
    cuts.append(len(text))
    out: list[int] = []
    for a, b in zip(cuts[:-1], cuts[1:]):
        out.extend(_encode(tokenizer, text[a:b]))
    return out


def template(tokenizer) -> tuple[list[int], list[int]]:
    """The special tokens the tokenizer puts before and after a text (e.g. [CLS] … [SEP], or BOS …)."""
    probe = "x y"
    plain = tokenizer(probe, add_special_tokens=False)["input_ids"]
    full = tokenizer(probe, add_special_tokens=True)["input_ids"]
    n = len(plain)
    for a in range(len(full) - n + 1):
        if list(full[a:a + n]) == list(plain):
            return list(full[:a]), list(full[a + n:])
    return [], []


def prepare(subject, raw: Sequence[RawText], *, max_tokens: int | None = None,
            warn: bool = True) -> list[TextUnit]:
    """Tokenise texts for a subject; split any longer than the limit into windows (with a notice)."""
    tok = subject.tokenizer
    limit = subject.context_limit
    if max_tokens is not None and max_tokens < 1:
        raise AttnposError(f"max_tokens (--max-tokens) must be at least 1, not {max_tokens}; leave it out to use the "
                           "model's context limit.")
    if max_tokens is not None:
        limit = min(limit, max_tokens) if limit else max_tokens
    prefix, suffix = template(tok)
    special_ids = set(getattr(tok, "all_special_ids", []) or [])
    # the unknown token stands for a piece of the user's text (an emoji, a rare script), so it is an ordinary
    # token, unless the tokenizer also uses that id as a structural token (GPT-2 style: unk = bos = eos)
    unk = getattr(tok, "unk_token_id", None)
    structural = {getattr(tok, f"{k}_token_id", None) for k in ("bos", "eos", "pad", "cls", "sep", "mask")}
    if unk is not None and unk not in structural:
        special_ids.discard(unk)
    units: list[TextUnit] = []
    split: list[str] = []
    for r in check(raw):
        body = encode_long(tok, r.text)
        if not body:
            raise AttnposError(f"The text {r.name} produced no tokens with this tokenizer.")
        room = (limit - len(prefix) - len(suffix)) if limit else len(body)
        if room < 1:
            raise AttnposError(f"The limit of {limit} tokens leaves no room for text after the special tokens.")
        starts = list(range(0, len(body), room))
        if len(starts) > 1:
            split.append(f"{r.name} ({len(body)} tokens → {len(starts)})")
        for k, a in enumerate(starts):
            chunk = body[a:a + room]
            ids = prefix + chunk + suffix
            special = np.zeros(len(ids), dtype=bool)
            special[:len(prefix)] = True
            if suffix:
                special[len(ids) - len(suffix):] = True
            special |= np.isin(np.asarray(ids), list(special_ids)) if special_ids else False
            name = r.name if len(starts) == 1 else f"{r.name}#{k + 1}"
            units.append(TextUnit(name=name, source=r.source, ids=ids, tokens=DisplayTokens(tok, ids),
                                  special=special, window=(a, a + len(chunk)) if len(starts) > 1 else None))
    if split and warn:
        warnings.warn(f"{len(split)} text(s) longer than the limit of {limit} tokens were split into windows, each "
                      f"scanned as its own text: {', '.join(split)}.", WindowNotice, stacklevel=3)
    return units


def texts_hash(units: Sequence[TextUnit]) -> str:
    h = hashlib.blake2b(digest_size=12)
    for u in units:
        h.update(np.asarray(u.ids, dtype=np.int64).tobytes())
        h.update(b"|")
    return h.hexdigest()
