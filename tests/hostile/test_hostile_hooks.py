"""Faults during a run: afterwards the model, the attention registries and the hooks are exactly as before."""

from __future__ import annotations

import pytest
import torch

import attnpos
from attnpos.capture import FUNCTION_NAME, Reducer, record
from attnpos.errors import AttnposError
from attnpos.reducers import SplitStats, WeightStats

import tiny
from hostile_kit import FERRY, HARBOUR, assert_same_state, model_state

pytestmark = pytest.mark.hostile


class Interrupted(BaseException):
    """Like KeyboardInterrupt: not an Exception, so `except Exception` blocks do not catch it."""


class FailAt(Reducer):
    """Raises ``exc`` on the first capture of ``layer`` (of any stack) in text ``text``."""

    name = "fail"

    def __init__(self, exc: BaseException, layer: int = 1, text: int = 0):
        self.exc, self.layer, self.text = exc, layer, text

    def update(self, cap):
        if cap.site.layer == self.layer and cap.text == self.text:
            raise self.exc


def _inputs(s, ids):
    kw = {"input_ids": torch.tensor([ids])}
    if s.is_encoder_decoder:
        kw["decoder_input_ids"] = torch.tensor([[0] + ids[:-1]])
    return kw


def _outputs(s, ids):
    with torch.no_grad():
        out = s.model(**_inputs(s, ids))
    return out.logits if hasattr(out, "logits") else out.last_hidden_state


def _user_hook_counter(s):
    """A user's own forward hook on the first attention module: it must survive and keep firing."""
    calls = []
    handle = s.sites[0].module.register_forward_hook(lambda m, a, o: calls.append(1))
    return calls, handle


FAULTS = {
    "exception": lambda: RuntimeError("fault in a reducer"),
    "base-exception": lambda: Interrupted(),
    "keyboard-interrupt": lambda: KeyboardInterrupt(),
}


@pytest.mark.parametrize("arch,fault", [("llama", f) for f in FAULTS] + [
    ("bloom", "keyboard-interrupt"), ("bloom", "exception"), ("t5", "base-exception"), ("bert", "exception")])
def test_model_registry_and_hooks_restored_after_a_fault(arch, fault):
    # llama/bert: registry path; bloom: eager-weights path (after switching); t5: encoder + decoder stacks
    s = tiny.subject(arch)
    calls, handle = _user_hook_counter(s)
    ids = attnpos.texts.prepare(s, attnpos.texts.from_strings([FERRY]))[0].ids
    ref = _outputs(s, ids)
    before = model_state(s.model)
    exc = FAULTS[fault]()
    with pytest.raises(type(exc)):
        record(s, [HARBOUR, FERRY], [WeightStats(), FailAt(exc, layer=1, text=1), SplitStats()])
    assert_same_state(before, model_state(s.model))
    n = len(calls)
    # reference implementation: transformers' own forward of the untouched model, run before the fault
    assert torch.equal(_outputs(s, ids), ref)                    # outputs identical, bit for bit
    assert len(calls) == n + 1                                   # the user's hook is still there and fires
    handle.remove()
    # and the subject still records normally afterwards
    rec = record(s, [FERRY], [WeightStats()])
    assert rec.results["weights"]["mass"]["previous"].shape[0] == len(s.sites)


def test_restored_after_the_non_finite_check_fails():
    # finite weights whose q·k overflows: record() raises after the run; the model is left as it was
    model = tiny.build("llama")
    with torch.no_grad():
        for layer in model.model.layers:
            layer.self_attn.q_proj.weight.mul_(1e21)
            layer.self_attn.k_proj.weight.mul_(1e21)
    s = attnpos.from_model(model, tiny.tokenizer())
    before = model_state(s.model)
    with pytest.raises(AttnposError, match="NaN or infinite"):
        record(s, [FERRY], [WeightStats(), SplitStats()])
    assert_same_state(before, model_state(s.model))


def test_fault_inside_the_capture_function_itself_restores():
    # a capture that cannot be delivered (the run's text table is emptied) fails inside transformers' forward,
    # in the attention function attnpos registered, not in a reducer
    s = tiny.subject("qwen2")
    before = model_state(s.model)

    class BreakOnFirst(Reducer):
        name = "break"

        def update(self, cap):
            from attnpos import capture
            capture._ACTIVE[-1].units = []

    with pytest.raises(IndexError):
        record(s, [FERRY, HARBOUR], [BreakOnFirst()])
    assert_same_state(before, model_state(s.model))


def test_an_existing_registry_entry_of_the_same_name_is_put_back():
    from transformers import AttentionInterface
    from transformers.masking_utils import AttentionMaskInterface

    def sentinel_attention(*a, **k):
        raise AssertionError("never called during the run")

    def sentinel_mask(*a, **k):
        raise AssertionError("never called during the run")

    AttentionInterface.register(FUNCTION_NAME, sentinel_attention)
    AttentionMaskInterface.register(FUNCTION_NAME, sentinel_mask)
    try:
        s = tiny.subject("llama")
        record(s, [FERRY], [WeightStats()])
        assert AttentionInterface._global_mapping[FUNCTION_NAME] is sentinel_attention
        assert AttentionMaskInterface._global_mapping[FUNCTION_NAME] is sentinel_mask
        with pytest.raises(RuntimeError):
            record(s, [FERRY], [FailAt(RuntimeError("x"), layer=0)])
        assert AttentionInterface._global_mapping[FUNCTION_NAME] is sentinel_attention
        assert AttentionMaskInterface._global_mapping[FUNCTION_NAME] is sentinel_mask
    finally:
        AttentionInterface._global_mapping.pop(FUNCTION_NAME, None)
        AttentionMaskInterface._global_mapping.pop(FUNCTION_NAME, None)


def test_a_record_inside_a_reducer_leaves_the_outer_run_intact():
    # a reducer that itself records (e.g. an on-the-fly control) nests runs; both must unwind cleanly
    s = tiny.subject("llama")
    inner_subject = tiny.subject("gpt2")
    before = model_state(s.model)

    class Nested(Reducer):
        name = "nested"

        def begin(self, subject, units):
            self.n = 0

        def update(self, cap):
            if self.n == 0:
                record(inner_subject, [HARBOUR], [WeightStats()])
            self.n += 1

        def result(self):
            return self.n

    rec = record(s, [FERRY], [Nested(), WeightStats()])
    assert rec.results["nested"] == len(s.sites)
    assert_same_state(before, model_state(s.model))


def test_command_line_interrupt_and_unexpected_errors_show_no_traceback(gpt2_dir, tmp_path, cli, monkeypatch):
    from attnpos import pipeline as scan_mod

    text = tmp_path / "t.txt"
    text.write_text(FERRY, encoding="utf-8")

    def interrupted(*a, **k):
        raise KeyboardInterrupt

    monkeypatch.setattr(scan_mod, "record", interrupted)
    code, _, err = cli("scan", gpt2_dir, "--text", text, "--boot", "0")
    assert code == 130 and "interrupted" in err and "Traceback" not in err

    def broken(*a, **k):
        raise ZeroDivisionError("a bug")

    monkeypatch.setattr(scan_mod, "record", broken)
    code, _, err = cli("scan", gpt2_dir, "--text", text, "--boot", "0")
    assert code == 1 and "Traceback" not in err and "--debug" in err and "ZeroDivisionError" in err
    with pytest.raises(ZeroDivisionError):            # --debug shows the real exception
        cli("scan", gpt2_dir, "--text", text, "--boot", "0", "--debug")
