"""Helpers of the hostile-input suite: tiny checkpoints saved to disk, subprocess runners, a state snapshot.

A module of its own (not ``conftest``) so that the tests import it by a name no other test folder uses.

Everything is built from configs (``tests/tiny.py``), saved with ``save_pretrained`` next to the MiniLM tokenizer,
and loaded back the way a user's checkpoint would be. Nothing is downloaded.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import torch

import tiny

ROOT = Path(__file__).resolve().parents[2]

# texts invented for this suite
FERRY = ("The ferry to the north island leaves at seven, stops at the lighthouse pier, and turns back at noon "
         "when the wind is calm.")
HARBOUR = "Gulls circle the harbour while the keeper paints the blue railings and counts the moored boats."


def save_checkpoint(model, folder: Path, tokenizer=None) -> Path:
    """``save_pretrained`` the model and a tokenizer into ``folder`` (as a user's checkpoint would be)."""
    folder.mkdir(parents=True, exist_ok=True)
    model.save_pretrained(folder)
    (tokenizer or tiny.tokenizer()).save_pretrained(folder)
    return folder


def small_table_gpt2(n_positions: int = 40, **kw):
    """A GPT-2 (learned absolute positions) whose position table has only ``n_positions`` rows."""
    import transformers as tf

    torch.manual_seed(kw.pop("seed", 0))
    cfg = tf.GPT2Config(n_layer=2, n_head=4, n_embd=32, n_positions=n_positions, vocab_size=tiny.VOCAB,
                        bos_token_id=101, eos_token_id=102, pad_token_id=0, **kw)
    return tf.GPT2LMHeadModel(cfg).eval()


def assert_clean_error(code: int, err: str, *words: str) -> None:
    """A CLI failure: non-zero exit, one ``attnpos: error:`` paragraph naming ``words``, no traceback."""
    assert code != 0
    assert "Traceback" not in err
    at = err.find("attnpos: error:")
    assert at >= 0 and err.count("attnpos: error:") == 1, err
    paragraph = err[at:].rstrip("\n")
    assert "\n" not in paragraph and "\x1b" not in paragraph, paragraph     # one paragraph, no terminal codes
    low = paragraph.lower()
    for w in words:
        assert w.lower() in low, (w, paragraph)


def _env(env_extra: dict | None) -> dict:
    env = dict(os.environ)
    env.update({"HF_HUB_OFFLINE": "1", "TRANSFORMERS_OFFLINE": "1", "TOKENIZERS_PARALLELISM": "false",
                "OMP_NUM_THREADS": "1",
                "PYTHONPATH": os.pathsep.join([str(ROOT), str(ROOT / "tests"), env.get("PYTHONPATH", "")])})
    env.update(env_extra or {})
    return env


def start_subprocess(args: list[str], cwd: Path, env_extra: dict | None = None) -> subprocess.Popen:
    """Start ``python <args>`` in a fresh interpreter, offline (collect it with ``.communicate()``)."""
    return subprocess.Popen([sys.executable, *args], cwd=cwd, env=_env(env_extra), stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)


def run_subprocess(args: list[str], cwd: Path, env_extra: dict | None = None, timeout: int = 120):
    """``python <args>`` in a fresh interpreter, offline; returns the CompletedProcess."""
    return subprocess.run([sys.executable, *args], cwd=cwd, env=_env(env_extra), capture_output=True, text=True,
                          timeout=timeout)


def model_state(model) -> dict:
    """Everything a run could leave changed: configs, registries, hooks, modules, parameters, mode."""
    from transformers import AttentionInterface
    from transformers.masking_utils import AttentionMaskInterface
    import torch.nn.modules.module as mm

    from attnpos.capture import _ACTIVE, _all_configs

    return {
        "configs": [(id(c), dict(c.__dict__)) for c in _all_configs(model)],
        "attn_impl": model.config._attn_implementation,
        "registry": dict(AttentionInterface._global_mapping),
        "mask_registry": dict(AttentionMaskInterface._global_mapping),
        "global_hooks": (dict(mm._global_forward_hooks), dict(mm._global_forward_pre_hooks)),
        "modules": [(n, id(m), type(m).__name__, m.training, dict(m._forward_hooks), dict(m._forward_pre_hooks),
                     dict(m._forward_hooks_with_kwargs), dict(m._forward_pre_hooks_with_kwargs))
                    for n, m in model.named_modules()],
        "params": {n: (id(p), p.detach().clone()) for n, p in model.state_dict(keep_vars=True).items()},
        "active_runs": len(_ACTIVE),
    }


def assert_same_state(before: dict, after: dict) -> None:
    for key in ("configs", "attn_impl", "registry", "mask_registry", "global_hooks", "modules", "active_runs"):
        assert before[key] == after[key], key
    assert before["params"].keys() == after["params"].keys()
    for n, (pid, val) in before["params"].items():
        pid2, val2 = after["params"][n]
        assert pid == pid2 and torch.equal(val, val2), n
