"""The commands say what they load and show progress while they work; bad arguments are refused before a model
loads. (Speed itself is measured, not asserted: see the commands in the README and DEVELOPERS.md.)

No external check here: the command line's own behaviour.
"""

from __future__ import annotations

import subprocess
import sys

import pytest

import attnpos
from attnpos.cli import main as cli_main
from attnpos.core import progress


def test_progress_is_off_in_a_pipe_and_forced_by_the_environment(monkeypatch):
    monkeypatch.delenv(progress.ENV, raising=False)
    assert progress.wanted() is False              # pytest's captured stderr is no terminal
    monkeypatch.setenv(progress.ENV, "1")
    assert progress.wanted() is True and progress.wanted(False) is False
    monkeypatch.setenv(progress.ENV, "0")
    assert progress.wanted() is False and progress.wanted(True) is True


def test_length_names_what_it_loads_and_shows_progress(monkeypatch, capsys):
    monkeypatch.setenv(progress.ENV, "1")
    code = cli_main(["length", "ref:rope", "--to", "160", "--sequences", "2", "--boot", "0"])
    err = capsys.readouterr().err
    assert code == 0
    assert err.splitlines()[0].startswith("attnpos length: loading ref:rope")
    assert "recording ref:rope" in err and "/2 [" in err            # the bar over the 2 sequences


def test_probe_shows_progress(monkeypatch, capsys, tmp_path):
    monkeypatch.setenv(progress.ENV, "1")
    texts = sorted(attnpos.texts.SAMPLE_DIR.glob("*.txt"))[:2]
    small = []
    for k, p in enumerate(texts):
        small.append(tmp_path / f"t{k}.txt")
        small[-1].write_text(p.read_text(encoding="utf-8")[:300], encoding="utf-8")
    code = cli_main(["probe", "ref:rope", "--no-bands", "--folds", "2"] + [a for p in small for a in ("--text", str(p))])
    err = capsys.readouterr().err
    assert code == 0
    assert err.splitlines()[0].startswith("attnpos probe: loading ref:rope")
    assert "ridge probes" in err and "untrained copy" in err


@pytest.mark.parametrize("argv, words", [
    (["ablate", "ref:rope", "--heads", "L9.H0"], "has 4 layers"),
    (["ablate", "ref:rope", "--heads", "L0.H9"], "4 heads per layer"),
    (["length", "ref:rope", "--to", "3"], "at least 4"),
    (["scan", "ref:nothing"], "no reference model"),
])
def test_bad_arguments_are_refused_before_torch_loads(argv, words):
    code = ("import sys; from attnpos.cli import main; code = main(sys.argv[1:]); "
            "assert 'torch' not in sys.modules, 'torch was imported'; sys.exit(code)")
    done = subprocess.run([sys.executable, "-c", code] + argv, capture_output=True, text=True, timeout=60)
    assert done.returncode == 2, done.stderr
    assert words in done.stderr and "loading" not in done.stderr
