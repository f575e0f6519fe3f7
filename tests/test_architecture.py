"""The package's shape: one vocabulary, data flowing one way, the command line on top.

* Only ``attnpos/cli/`` imports argparse or the command line; no module imports another module's private name.
* ``attnpos/core`` sits at the bottom: it imports no other attnpos module (but errors and files) and no torch.
* A role or a scheme registered in the core (and nothing else) reaches the README tables, the palette and the JSON.
* Every head key ``attnpos scan`` prints is accepted by ``attnpos ablate --heads``, for every stack.
* Bad arguments are refused before torch or a model is loaded.
* Every example in a docstring runs (doctest).

No external check here: the package's own structure.
"""

from __future__ import annotations

import ast
import doctest
import importlib
import json
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import attnpos
from attnpos.core import keys, roles, schemes

import tiny

ROOT = Path(attnpos.__file__).resolve().parent
README = ROOT.parent / "README.md"


def _modules():
    for path in sorted(ROOT.rglob("*.py")):
        rel = path.relative_to(ROOT.parent).with_suffix("")
        parts = list(rel.parts)
        if parts[-1] == "__init__":
            parts = parts[:-1]
        yield path, ".".join(parts)


def _imports(path: Path, modname: str):
    """(imported module, imported name or None, line) for every import in a file, relative imports resolved."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    package = modname if path.name == "__init__.py" else modname.rsplit(".", 1)[0]
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for a in node.names:
                yield a.name, None, node.lineno
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - (node.level - 1)]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            for a in node.names:
                yield mod, a.name, node.lineno


def test_only_the_command_line_imports_argparse_or_the_cli():
    bad = []
    for path, mod in _modules():
        if mod.startswith("attnpos.cli"):
            continue
        for imported, name, line in _imports(path, mod):
            if imported == "argparse" or imported.startswith("attnpos.cli") or (imported == "attnpos" and name == "cli"):
                bad.append(f"{mod}:{line} imports {imported}{'.' + name if name else ''}")
    assert not bad, bad


def _is_module(name: str) -> bool:
    try:
        return importlib.util.find_spec(name) is not None
    except (ImportError, ValueError):
        return False


def test_no_module_imports_another_modules_private_name():
    bad = []
    for path, mod in _modules():
        package = mod if path.name == "__init__.py" else mod.rsplit(".", 1)[0]
        for imported, name, line in _imports(path, mod):
            if not imported.startswith("attnpos"):
                continue
            # a private module may be imported only from inside its own package
            parts = imported.split(".")
            for k, part in enumerate(parts):
                if part.startswith("_") and not part.startswith("__"):
                    owner = ".".join(parts[:k])
                    if not package.startswith(owner) or package == "attnpos" and owner != "attnpos":
                        bad.append(f"{mod}:{line} imports the private module {imported}")
            if name and name.startswith("_") and not name.startswith("__"):
                full = f"{imported}.{name}"
                if _is_module(full):
                    if not package.startswith(imported):
                        bad.append(f"{mod}:{line} imports the private module {full}")
                else:
                    bad.append(f"{mod}:{line} imports the private name {name} of {imported}")
    assert not bad, bad


def test_the_core_is_at_the_bottom():
    allowed = {"attnpos.errors", "attnpos.files"}
    for path, mod in _modules():
        if not mod.startswith("attnpos.core"):
            continue
        tree = ast.parse(path.read_text(encoding="utf-8"))
        top_level = [n for n in tree.body if isinstance(n, (ast.Import, ast.ImportFrom))]
        for imported, name, line in _imports(path, mod):
            if imported.startswith("attnpos") and not imported.startswith("attnpos.core"):
                assert imported in allowed, f"{mod}:{line} imports {imported}"
        for node in top_level:
            names = [a.name for a in node.names] if isinstance(node, ast.Import) else [node.module or ""]
            assert not any(n.split(".")[0] in ("torch", "transformers", "pandas") for n in names), \
                f"{mod}:{node.lineno} imports {names} at import time"


# ------------------------------------------------------------------------------------------------ registering

_SELF = roles.RoleSpec(
    name="self-attending", rule="mass.self ≥ 0.4", about="looks at its own token",
    check=lambda row, ctx: "mass.self ≥ 0.4" if (row.get("mass_self") or 0) >= 0.4 else None,
    colour="#332288", short="self", code="Sf", strength="mass_self", rank=15)


def test_a_role_registered_in_the_core_reaches_the_readme_palette_and_json():
    from attnpos.views import common as _common
    from attnpos.views.synthetic import synthetic_scan

    with roles.registered(_SELF):
        assert f"| `self-attending` | {_SELF.rule} |" in roles.readme_table()
        assert any(p["role"] == "self-attending" and p["code"] == "Sf" for p in _common.role_palette())
        assert "self-attending" in _common.roles_now()
        # a head whose own-token mass is high now gets the role, and it survives the JSON round trip
        row = {"mass_self": 0.7, "mass_previous": 0.1}
        role, tags, evidence = roles.assign(row)
        assert role == "self-attending" and evidence == "mass.self ≥ 0.4"
        scan = synthetic_scan(2, 2, seed=4)
        scan.heads.loc[0, "role"] = role
        again = attnpos.Scan.from_json(json.loads(json.dumps(scan.to_json())))
        assert again.heads.loc[0, "role"] == "self-attending"
        from attnpos.views import static

        assert "self-attending" in static.legend_html()
    assert "self-attending" not in roles.names()


def test_a_scheme_registered_in_the_core_is_detected_and_reported():
    spec = schemes.SchemeSpec(name="planted-scheme", about="a flag in the config", uses_position_ids=False,
                              has_table=False, relative=True, rank=5,
                              detect=lambda model: getattr(model.config, "planted_flag", False) is True)
    model = tiny.build("llama")
    model.config.planted_flag = True
    with schemes.registered(spec):
        s = attnpos.from_model(model, tiny.tokenizer())
        assert s.schemes == ["planted-scheme"] * s.n_layers and not s.uses_position_ids
        assert "| `planted-scheme` | a flag in the config |" in schemes.readme_table()
        scan = attnpos.scan(s, ["The ferry left at nine and came back at noon, as always."], n_boot=0,
                            shift=False, induction=False)
        assert scan.to_json()["model"]["scheme"] == "planted-scheme"
    assert attnpos.from_model(model, tiny.tokenizer()).schemes == ["rope"] * 2


def test_readme_scheme_table_is_generated_from_the_specs():
    text = README.read_text(encoding="utf-8")
    block = text[text.index("<!-- schemes:start -->") + len("<!-- schemes:start -->"):text.index("<!-- schemes:end -->")]
    assert block.strip() == schemes.readme_table()


# ------------------------------------------------------------------------------------------------ one key grammar

@pytest.mark.parametrize("arch", ["llama", "t5"])
def test_every_key_scan_prints_is_accepted_by_ablate(arch, capsys):
    from attnpos.ablation import parse_heads

    s = tiny.subject(arch)
    scan = attnpos.scan(s, ["The ferry left at nine and came back at noon, as it does every day of the week."],
                        n_boot=0, shift=False, induction=False)
    printed = scan.text()
    shown = re.findall(r"^(\S+) +\S+ ", printed, flags=re.M)
    listed = [k for k in shown if re.match(r"^(\w+:)?L\d+\.H\d+$", k)]
    assert listed == scan.head_keys() and len(listed) == len(scan.heads)
    chosen = parse_heads(s, ",".join(listed))
    assert [keys.head_key(*c) for c in chosen] == listed
    # the short stack names an older table printed still parse
    if arch == "t5":
        assert parse_heads(s, "dec:L1.H0,enc:L0.H2") == [("decoder", 1, 0), ("encoder", 0, 2)]


# ------------------------------------------------------------------------------------------------ bad arguments first

BAD = [
    (["ablate", "ref:rope", "--heads", "L0.X1"], "not a head"),
    (["scan", "/no/such/model"], "No model folder"),
    (["scan", "ref:no-such"], "no reference model"),
    (["scan", "nobody-here/no-such-model"], "not in the local hub cache"),
    (["scan", "/no/such/model.gguf"], "No GGUF file"),
    (["scan", "--text", "/no/such/text.txt"], "No file or folder"),
    (["scan", "--json", "/no/such/folder/out.json"], "does not exist"),
    (["scan", "--json", "same.json", "--html", "same.json"], "same file"),
    (["scan", "--scheme", "wobbly"], "Unknown scheme"),
    (["probe", "ref:none", "--json", "/no/such/folder/p.json"], "does not exist"),
    (["length", "ref:rope", "--to", "512", "--json", "/no/such/folder/l.json"], "does not exist"),
    (["compare", "ref:rope", "/no/such/model"], "No model folder"),
]


@pytest.mark.parametrize("argv,message", BAD, ids=[" ".join(a[:2]) + f" #{i}" for i, (a, _) in enumerate(BAD)])
def test_bad_arguments_are_refused_before_torch_loads(argv, message, tmp_path):
    tiny.refused_before_torch(argv, message, tmp_path)


def test_a_number_out_of_range_is_a_usage_error_before_anything_loads(tmp_path):
    code = ("import sys\nfrom attnpos.cli import main\n"
            "try:\n    main(['length', 'ref:rope', '--to', '0'])\nexcept SystemExit as e:\n    assert e.code == 2\n"
            "assert 'torch' not in sys.modules\n")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60, cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert "at least 4" in done.stderr


# ------------------------------------------------------------------------------------------------ examples run

def _doctest_modules():
    skip = {"attnpos.cli.__main__"}
    return [m for path, m in _modules() if m not in skip and ">>> " in path.read_text(encoding="utf-8")]


@pytest.mark.parametrize("modname", _doctest_modules())
def test_docstring_examples_run(modname):
    mod = importlib.import_module(modname)
    finder = doctest.DocTestFinder(exclude_empty=True)
    tests = [t for t in finder.find(mod, modname) if t.examples]
    runner = doctest.DocTestRunner(optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    for t in tests:
        runner.run(t)
    res = runner.summarize(verbose=False)
    assert res.failed == 0, f"{res.failed} of {res.attempted} examples failed in {modname}"
    np.random.seed(0)
