"""The API reference covers every public name, and every public name is documented."""

from __future__ import annotations

import importlib.util
import pathlib

import ntkcalc

ROOT = pathlib.Path(__file__).resolve().parents[1]


def _builder():
    spec = importlib.util.spec_from_file_location("build_api", ROOT / "docs" / "build_api.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_every_public_name_has_a_docstring():
    missing = [n for n in _builder().public_names()
               if callable(getattr(ntkcalc, n)) and not (getattr(ntkcalc, n).__doc__ or "").strip()]
    assert not missing, f"public names without a docstring: {missing}"


def test_api_reference_is_up_to_date():
    text = (ROOT / "docs" / "api.md").read_text()
    for name in _builder().public_names():
        assert f"`{name}" in text, f"{name} is not in docs/api.md"
    assert text == _builder().render(), "docs/api.md is stale: run `python docs/build_api.py`"


def test_docs_pages_exist():
    for page in ("quickstart", "concepts", "math", "scale", "cautions", "performance", "api"):
        assert (ROOT / "docs" / f"{page}.md").stat().st_size > 500, page


def test_package_imports_without_docstrings():
    # `python -OO` strips docstrings; nothing may format or read them at import time.
    import subprocess
    import sys

    done = subprocess.run([sys.executable, "-OO", "-c", "import ntkcalc, ntkcalc.bench"],
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
