"""Messy text inputs: each ends in a correct result or one clear error paragraph (CLI: non-zero exit, no traceback).

External checks: Python's own codecs write the encoded inputs, and the byte-order marks are the Unicode Standard's
(§23.8; RFC 3629 §6 for UTF-8), named beside the tests that use them; the tokenizer is transformers' GPT-2 one."""

from __future__ import annotations

import json

import numpy as np
import pytest

import attnpos
from attnpos import texts
from attnpos.capture import record
from attnpos.errors import AttnposError
from attnpos.reducers import WeightStats

import tiny
from hostile_kit import FERRY, HARBOUR, assert_clean_error

pytestmark = pytest.mark.hostile

FAST = ("--boot", "0", "--no-shift", "--no-induction")


@pytest.fixture(scope="module")
def gpt2():
    return tiny.subject("gpt2")


# ------------------------------------------------------------------------------------------ empty / whitespace

@pytest.mark.parametrize("body", ["", "  \n\t\r\n  \n"], ids=["empty", "whitespace"])
def test_empty_or_whitespace_file_is_refused_by_name(tmp_path, gpt2_dir, cli, body):
    f = tmp_path / "blank_notes.txt"
    f.write_text(body, encoding="utf-8")
    code, out, err = cli("scan", gpt2_dir, "--text", f, *FAST)
    assert_clean_error(code, err, "blank_notes", "empty")
    with pytest.raises(AttnposError, match="blank_notes"):
        texts.read([f])


def test_only_blank_lines_with_lines_mode_is_refused(tmp_path, gpt2_dir, cli):
    f = tmp_path / "gaps.txt"
    f.write_text("\n   \n\t\n", encoding="utf-8")
    code, _, err = cli("scan", gpt2_dir, "--text", f, "--lines", *FAST)
    assert_clean_error(code, err, "no texts")


def test_empty_list_of_strings_is_refused():
    with pytest.raises(AttnposError, match="No texts"):
        texts.as_raw([])
    with pytest.raises(AttnposError, match="whitespace"):
        texts.as_raw(["fine text here", "   "])


# ------------------------------------------------------------------------------------------ a single token

def test_single_token_text_is_refused_not_given_roles(tmp_path, gpt2_dir, cli, gpt2):
    # one word becomes [CLS] word [SEP]: a single ordinary query is no basis for a head's role
    f = tmp_path / "one.txt"
    f.write_text("ferry", encoding="utf-8")
    code, out, err = cli("scan", gpt2_dir, "--text", f, *FAST)
    assert_clean_error(code, err, "3 tokens")
    assert "role" not in out
    with pytest.raises(AttnposError, match="3 tokens"):
        attnpos.scan(gpt2, ["ferry"], n_boot=0, shift=False, induction=False)


def test_single_token_text_beside_a_real_text_is_scanned(gpt2):
    sc = attnpos.scan(gpt2, ["ferry", FERRY], n_boot=0, shift=False, induction=False)
    assert [t["n_tokens"] for t in sc.texts] == [3, len(texts.prepare(gpt2, texts.from_strings([FERRY]))[0])]
    assert np.isfinite(sc.heads["mass_previous"].astype(float)).all()
    # the captured weights still sum to one over the allowed keys of the three-token text
    rec = record(gpt2, ["ferry"], [WeightStats()], keep="all")
    for w in rec.maps.values():
        np.testing.assert_allclose(w.sum(-1), 1.0, atol=1e-5)


# ------------------------------------------------------------------------------------------ bytes that are not text

def test_binary_file_is_refused(tmp_path, gpt2_dir, cli):
    f = tmp_path / "photo.txt"
    f.write_bytes(b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR" + bytes(range(256)))
    code, _, err = cli("scan", gpt2_dir, "--text", f, *FAST)
    assert_clean_error(code, err, "photo.txt", "binary")


def test_latin1_file_is_refused_with_the_offending_byte(tmp_path, gpt2_dir, cli):
    f = tmp_path / "menu.txt"
    # ISO 8859-1 encodes é as the single byte 0xE9, which is not valid UTF-8 (RFC 3629: a lead byte 0xE0-0xEF
    # needs two continuation bytes); "caf" is 3 bytes after "the " (4), so the byte is at offset 7
    f.write_bytes("the caf\u00e9 opens at eight".encode("latin-1"))
    code, _, err = cli("scan", gpt2_dir, "--text", f, *FAST)
    assert_clean_error(code, err, "menu.txt", "utf-8", "0xe9", "offset 7")


def test_utf16_file_is_named_as_utf16(tmp_path):
    f = tmp_path / "wide.txt"
    # Python's utf-16 codec writes a byte-order mark first (FF FE on little-endian machines; Unicode Standard §23.8)
    f.write_bytes("the ferry leaves at seven".encode("utf-16"))
    with pytest.raises(AttnposError, match="UTF-16"):
        texts.read([f])


def test_utf8_byte_order_mark_is_not_part_of_the_text(tmp_path, gpt2):
    a, b = tmp_path / "bom.txt", tmp_path / "plain.txt"
    # EF BB BF is U+FEFF encoded in UTF-8, the UTF-8 byte-order mark (Unicode Standard §23.8; RFC 3629 §6)
    a.write_bytes(b"\xef\xbb\xbf" + FERRY.encode("utf-8"))
    b.write_bytes(FERRY.encode("utf-8"))
    ua, ub = texts.prepare(gpt2, texts.read([a, b]))
    assert ua.ids == ub.ids


# ------------------------------------------------------------------------------------------ long lines and windows

def test_very_long_line_is_windowed_without_losing_a_token(tmp_path, gpt2):
    # ~120 kB on one line; windows must tile the body tokens exactly, in order
    line = " ".join(f"crate {i} holds {['pears', 'plums', 'figs'][i % 3]}" for i in range(6000))
    f = tmp_path / "ledger.txt"
    f.write_text(line + "\n", encoding="utf-8")
    raw = texts.read([f], lines=True)
    assert len(raw) == 1 and raw[0].text == line
    with pytest.warns(texts.WindowNotice, match="windows"):
        units = texts.prepare(gpt2, raw, max_tokens=200)
    body = gpt2.tokenizer(line, add_special_tokens=False)["input_ids"]
    assert len(units) == -(-len(body) // 198)          # [CLS] + 198 + [SEP] per window
    assert all(len(u) <= 200 for u in units)
    joined = [t for u in units for t, sp in zip(u.ids, u.special) if not sp]
    assert joined == body
    assert [u.window for u in units][0][0] == 0 and units[-1].window[1] == len(body)
    assert all(a.window[1] == b.window[0] for a, b in zip(units, units[1:]))


def test_text_longer_than_the_learned_table_is_windowed_with_a_notice(tmp_path, gpt2_dir, cli):
    # the checkpoint's position table has 40 rows; a longer text would index past it
    s = attnpos.load(gpt2_dir)
    assert s.schemes == ["learned-absolute"] * 2 and s.context_limit == 40
    body = " ".join(f"pier {i} is painted blue" for i in range(20))
    n_body = len(s.tokenizer(body, add_special_tokens=False)["input_ids"])
    assert n_body > 40
    f = tmp_path / "piers.txt"
    f.write_text(body, encoding="utf-8")
    out_json = tmp_path / "scan.json"
    code, out, err = cli("scan", gpt2_dir, "--text", f, "--json", out_json, *FAST)
    assert code == 0, err
    assert "notice:" in err and "windows" in err and "Traceback" not in err
    doc = json.loads(out_json.read_text(encoding="utf-8"))
    wins = [t["window"] for t in doc["texts"]]
    assert len(wins) == -(-n_body // 38)
    assert all(t["n_tokens"] <= 40 for t in doc["texts"])
    assert wins[0][0] == 0 and wins[-1][1] == n_body
    assert all(a[1] == b[0] for a, b in zip(wins, wins[1:]))
    assert [t["name"] for t in doc["texts"]][:2] == ["piers#1", "piers#2"]


@pytest.mark.parametrize("bad", [0, -3])
def test_non_positive_max_tokens_is_refused(gpt2, bad):
    with pytest.raises(AttnposError, match="max_tokens|--max-tokens"):
        texts.prepare(gpt2, texts.from_strings([FERRY]), max_tokens=bad)


def test_non_positive_max_tokens_on_the_command_line(gpt2_dir, tmp_path, capsys):
    from attnpos.cli import main

    f = tmp_path / "a.txt"
    f.write_text(FERRY, encoding="utf-8")
    with pytest.raises(SystemExit) as exc:
        main(["scan", str(gpt2_dir), "--text", str(f), "--max-tokens", "0", *FAST])
    assert exc.value.code == 2
    assert "max-tokens" in capsys.readouterr().err


def test_negative_bootstrap_count_is_refused_on_the_command_line(gpt2_dir, capsys):
    from attnpos.cli import main

    with pytest.raises(SystemExit) as exc:
        main(["scan", str(gpt2_dir), "--boot", "-1"])
    assert exc.value.code == 2
    assert "--boot" in capsys.readouterr().err


def test_negative_bootstrap_count_from_python_means_no_intervals(gpt2):
    sc = attnpos.scan(gpt2, [FERRY, HARBOUR], n_boot=-1, shift=False, induction=False)
    assert sc.heads["share_distance_lo"].isna().all()
    assert np.isfinite(sc.heads["share_distance"].astype(float)).all()


# ------------------------------------------------------------------------------------------ scripts and emoji

MIXED = ("Ferry \U0001F6A2 leaves at seven \u2014 \u6e21\u8239 \u0432 \u0441\u0435\u043c\u044c "
         "\U0001F469\u200d\U0001F467 and returns at noon, \u0638\u0647\u0631\u0627\u064b; "
         "cafe\u0301 \U0001F642\U0001F642 ok.")


def test_mixed_scripts_and_emoji_are_scanned_with_unknown_pieces_counted(gpt2):
    u = texts.prepare(gpt2, texts.from_strings([MIXED]))[0]
    unk = gpt2.tokenizer.unk_token_id
    assert unk in u.ids                                     # MiniLM's vocabulary lacks the emoji
    # only the template tokens are special: an unknown piece is still the user's text
    assert u.special[0] and u.special[-1] and not u.special[1:-1].any()
    sc = attnpos.scan(gpt2, [MIXED], n_boot=0, shift=False, induction=False)
    for col in ("mass_previous", "mass_first", "entropy_ratio", "share_distance", "share_residual"):
        assert np.isfinite(sc.heads[col].astype(float)).all(), col


def test_emoji_only_text_gives_numbers_not_silent_nans(gpt2):
    only = "\U0001F6A2 \U0001F642 \U0001F6A2 \U0001F642 \U0001F6A2 \U0001F642 \U0001F6A2"
    sc = attnpos.scan(gpt2, [only], n_boot=0, shift=False, induction=False)
    assert np.isfinite(sc.heads["mass_previous"].astype(float)).all()
    assert np.isfinite(sc.heads["entropy_ratio"].astype(float)).all()


def test_tokenizer_whose_unknown_token_is_also_its_end_token_keeps_it_special(gpt2):
    # GPT-2-style tokenizers use one id for unk, bos and eos: that id stays special
    class Tok:
        all_special_ids = [7]
        unk_token_id = 7
        eos_token_id = 7

        def __call__(self, text, add_special_tokens=True):
            ids = [10 + len(w) for w in text.split()]
            return {"input_ids": ids + ([7] if add_special_tokens else [])}

        def decode(self, ids, **kw):
            return f"<{ids[0]}>"

    class S:
        tokenizer = Tok()
        context_limit = None

    u = texts.prepare(S(), texts.from_strings(["aa bbb cccc"]))[0]
    assert u.ids == [12, 13, 14, 7]
    assert u.special.tolist() == [False, False, False, True]


# ------------------------------------------------------------------------------------------ folders

def test_folder_without_txt_files_is_refused(tmp_path, gpt2_dir, cli):
    d = tmp_path / "drafts"
    d.mkdir()
    (d / "notes.md").write_text(FERRY, encoding="utf-8")
    (d / "sub").mkdir()
    (d / "sub" / "deep.txt").write_text(FERRY, encoding="utf-8")   # not looked for: one level only
    code, _, err = cli("scan", gpt2_dir, "--text", d, *FAST)
    assert_clean_error(code, err, "drafts", "no .txt")


def test_missing_text_path_is_refused(tmp_path, gpt2_dir, cli):
    code, _, err = cli("scan", gpt2_dir, "--text", tmp_path / "nowhere.txt", *FAST)
    assert_clean_error(code, err, "nowhere.txt")


def test_folder_of_texts_is_read_in_name_order(tmp_path, gpt2):
    d = tmp_path / "logs"
    d.mkdir()
    (d / "b.txt").write_text(HARBOUR, encoding="utf-8")
    (d / "a.txt").write_text(FERRY, encoding="utf-8")
    (d / "skip.csv").write_text("x,y", encoding="utf-8")
    raw = texts.read([d])
    assert [r.name for r in raw] == ["a", "b"] and raw[0].text == FERRY


def test_unreadable_text_file_is_reported(tmp_path, gpt2_dir, cli, monkeypatch):
    # permissions cannot be used to provoke this when tests run as root, so the read itself fails
    f = tmp_path / "locked.txt"
    f.write_text(FERRY, encoding="utf-8")
    real_read, real_open = type(f).read_bytes, type(f).open

    def denied(real):
        def read(self, *a, **k):
            if self.name == "locked.txt":
                raise PermissionError(13, "Permission denied")
            return real(self, *a, **k)
        return read

    monkeypatch.setattr(type(f), "read_bytes", denied(real_read))
    monkeypatch.setattr(type(f), "open", denied(real_open))       # the text is sniffed through open() first
    code, _, err = cli("scan", gpt2_dir, "--text", f, *FAST)
    assert_clean_error(code, err, "locked.txt", "permission denied", "readable")


@pytest.mark.parametrize("flag", ["--json", "--html"])
def test_output_into_a_missing_folder_is_refused_before_scanning(tmp_path, gpt2_dir, cli, monkeypatch, flag):
    calls = []
    from attnpos import pipeline as scan_mod
    monkeypatch.setattr(scan_mod, "scan", lambda *a, **k: calls.append(1))
    f = tmp_path / "t.txt"
    f.write_text(FERRY, encoding="utf-8")
    code, _, err = cli("scan", gpt2_dir, "--text", f, flag, tmp_path / "not-made-yet" / "out.file", *FAST)
    assert_clean_error(code, err, "not-made-yet", "does not exist", flag)
    code, _, err = cli("scan", gpt2_dir, "--text", f, flag, tmp_path, *FAST)
    assert_clean_error(code, err, "is a folder", flag)
    assert not calls                                    # refused before any work was done
