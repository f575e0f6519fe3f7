"""Fixtures of the hostile-input suite (the helpers they use live in ``hostile_kit``)."""

from __future__ import annotations

from pathlib import Path

import pytest
import torch

import tiny
from hostile_kit import save_checkpoint, small_table_gpt2


@pytest.fixture(autouse=True)
def _one_thread():
    """Tiny models run fastest on one thread, above all on a shared, busy machine (thread hand-offs dominate)."""
    import contextlib

    try:
        from threadpoolctl import threadpool_limits
        blas = threadpool_limits(1)
    except ImportError:  # pragma: no cover - threadpoolctl comes with scikit-learn
        blas = contextlib.nullcontext()
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        with blas:
            yield
    finally:
        torch.set_num_threads(before)


@pytest.fixture(scope="session")
def ckpt_root(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("checkpoints")


@pytest.fixture(scope="session")
def gpt2_dir(ckpt_root) -> Path:
    """A tiny GPT-2 checkpoint (learned-absolute table of 40 positions) with the MiniLM tokenizer."""
    return save_checkpoint(small_table_gpt2(40), ckpt_root / "gpt2-small-table")


@pytest.fixture(scope="session")
def llama_dir(ckpt_root) -> Path:
    return save_checkpoint(tiny.build("llama"), ckpt_root / "llama")


@pytest.fixture
def cli(capsys):
    """Run ``attnpos.cli.main`` in-process; returns (exit code, stdout, stderr)."""
    from attnpos.cli import main

    def run(*args):
        code = main([str(a) for a in args])
        out = capsys.readouterr()
        return code, out.out, out.err

    return run
