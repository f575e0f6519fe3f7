"""The package's import surface: public names load on first use; reading results never starts torch.

No external check here: import behaviour of the package itself.
"""

import subprocess
import sys

import attnpos


def _run(code: str) -> None:
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr


def test_reading_results_does_not_start_torch():
    # a notebook that opens a saved scan, its findings, views or report needs no model and no torch
    _run("import sys, attnpos, attnpos.results.scan, attnpos.findings, attnpos.views, attnpos.report, attnpos.compare\n"
         "assert 'torch' not in sys.modules, 'torch was imported'\n"
         "assert attnpos.Scan is attnpos.results.scan.Scan")


def test_public_names_resolve_whatever_was_imported_first():
    _run("import attnpos.pipeline, attnpos.capture, attnpos\n"
         "assert attnpos.scan is attnpos.pipeline.scan and callable(attnpos.scan)\n"
         "assert attnpos.record is attnpos.capture.record")
    for name in attnpos.__all__:
        assert getattr(attnpos, name) is not None
    assert "Split" in dir(attnpos)


def test_unknown_name_is_an_attribute_error():
    try:
        attnpos.no_such_thing
    except AttributeError as exc:
        assert "no_such_thing" in str(exc)
    else:
        raise AssertionError("expected AttributeError")


def test_cli_help_and_comparing_saved_scans_do_not_start_torch(tmp_path):
    from attnpos.views.synthetic import synthetic_scan

    a, b = tmp_path / "a.json", tmp_path / "b.json"
    synthetic_scan(seed=0).save(a)
    synthetic_scan(seed=1).save(b)
    _run("import sys, contextlib, io\n"
         "from attnpos.cli import main\n"
         "with contextlib.redirect_stdout(io.StringIO()):\n"
         "    try:\n"
         "        main(['--help'])\n"
         "    except SystemExit:\n"
         "        pass\n"
         f"    assert main(['compare', {str(a)!r}, {str(b)!r}]) == 0\n"
         "assert 'torch' not in sys.modules, 'torch was imported'")
