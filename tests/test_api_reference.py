"""docs/api.md is what docs/make_api.py writes from today's docstrings, and names every public
object of samesource, each with a docstring."""

from __future__ import annotations

import importlib.util
from pathlib import Path

import samesource

ROOT = Path(__file__).resolve().parents[1]


def _generator():
    spec = importlib.util.spec_from_file_location("make_api", ROOT / "docs" / "make_api.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_api_page_is_up_to_date():
    gen = _generator()
    text = gen.render()
    on_disk = (ROOT / "docs" / "api.md").read_text(encoding="utf-8")
    assert on_disk == text, "docs/api.md is out of date: run .venv/bin/python docs/make_api.py"


def test_every_public_name_is_there_with_a_docstring():
    gen = _generator()
    text = gen.render()
    for name in samesource.__all__:
        if not name.startswith("__"):
            assert f"## `samesource.{name}`" in text, name
    assert gen.MISSING not in text, "a public name or method has no docstring"
