"""The byte-level tokenizer shared by all six reference models.

Token ids 0-255 are the UTF-8 bytes themselves (id == byte value), then three special tokens:
256 = ``<bos>``, 257 = ``<eos>``, 258 = ``<pad>``. Any text round-trips, whatever its script, emoji or control
characters, because every byte has its own id.

The tokenizer is built with the ``tokenizers`` library and wrapped in transformers' ``PreTrainedTokenizerFast``,
so it saves as a plain ``tokenizer.json`` and loads with ``AutoTokenizer.from_pretrained(folder)`` offline and
without remote code. Encoding with special tokens prepends ``<bos>``. Special-token names written inside the
text are encoded as ordinary bytes (``split_special_tokens=True``), so a document that happens to contain
the characters ``<bos>`` does not change its token count.
"""

from __future__ import annotations

from tokenizers import Tokenizer, decoders, models, pre_tokenizers, processors

N_BYTES = 256
BOS_TOKEN, EOS_TOKEN, PAD_TOKEN = "<bos>", "<eos>", "<pad>"
BOS_ID, EOS_ID, PAD_ID = 256, 257, 258
VOCAB_SIZE = 259


def _byte_symbols() -> list[str]:
    """The printable stand-in character for each byte value 0..255, in byte order.

    The ``ByteLevel`` pre-tokenizer maps every byte to one printable character (and the ``ByteLevel`` decoder maps
    it back). We write the table down (``_gpt2_byte_table``) and check it against the pre-tokenizer itself on
    every ASCII byte and on characters whose UTF-8 forms cover the lead and continuation bytes.
    """
    table = _gpt2_byte_table()
    pre = pre_tokenizers.ByteLevel(add_prefix_space=False, use_regex=False)
    probes = [chr(b) for b in range(0x80)] + [chr(cp) for cp in (0x80, 0xBF, 0x7FF, 0x800, 0xFFFD, 0x1F600)]
    for ch in probes:
        got = "".join(piece for piece, _ in pre.pre_tokenize_str(ch))
        want = "".join(table[x] for x in ch.encode("utf-8"))
        if got != want:  # pragma: no cover - would mean tokenizers changed its byte table
            raise RuntimeError(f"byte table disagrees with tokenizers' ByteLevel for {ch!r}: {got!r} != {want!r}")
    return [table[b] for b in range(N_BYTES)]


def _gpt2_byte_table() -> dict[int, str]:
    """Byte → printable character as used by the ByteLevel pre-tokenizer (common practice, from GPT-2's encoder):
    printable Latin-1 bytes map to themselves, the rest to U+0100 upwards in byte order."""
    keep = list(range(ord("!"), ord("~") + 1)) + list(range(0xA1, 0xAD)) + list(range(0xAE, 0x100))
    table, extra = {}, 0
    for b in range(256):
        if b in keep:
            table[b] = chr(b)
        else:
            table[b] = chr(256 + extra)
            extra += 1
    return table


def build_backend() -> Tokenizer:
    """The raw ``tokenizers.Tokenizer``: one token per byte, id == byte value, specials after."""
    symbols = _byte_symbols()
    vocab = {s: i for i, s in enumerate(symbols)}
    tok = Tokenizer(models.BPE(vocab=vocab, merges=[], fuse_unk=False, byte_fallback=False))
    tok.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=False, use_regex=False)
    tok.decoder = decoders.ByteLevel()
    tok.add_special_tokens([BOS_TOKEN, EOS_TOKEN, PAD_TOKEN])
    assert tok.token_to_id(BOS_TOKEN) == BOS_ID and tok.token_to_id(PAD_TOKEN) == PAD_ID
    tok.post_processor = processors.TemplateProcessing(
        single=f"{BOS_TOKEN} $A",
        pair=f"{BOS_TOKEN} $A {BOS_TOKEN}:1 $B:1",
        special_tokens=[(BOS_TOKEN, BOS_ID)],
    )
    return tok


def build_tokenizer(model_max_length: int | None = None):
    """A ``PreTrainedTokenizerFast`` over the byte vocabulary, ready for ``save_pretrained``."""
    from transformers import PreTrainedTokenizerFast

    kwargs = {}
    if model_max_length is not None:
        kwargs["model_max_length"] = int(model_max_length)
    return PreTrainedTokenizerFast(
        tokenizer_object=build_backend(),
        bos_token=BOS_TOKEN,
        eos_token=EOS_TOKEN,
        pad_token=PAD_TOKEN,
        clean_up_tokenization_spaces=False,
        split_special_tokens=True,
        padding_side="right",
        **kwargs,
    )


def encode_bytes(text: str) -> list[int]:
    """Plain byte ids of ``text`` without specials (fast path used by the trainer; equals the tokenizer's output)."""
    return list(text.encode("utf-8"))
