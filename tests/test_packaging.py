"""The packaging: one import name, samesource, mapped onto the repository's folders.

pyproject.toml maps samesource onto measurement/ and samesource.service onto service/ and lists
every package; a folder missing from the list would be left out of a built wheel. No code of
the project imports the folder names themselves (`python -m pytest` run at the root would
find them as top-level packages and load a second copy of each module).
"""

from __future__ import annotations

import ast
import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
MAPPED = {"measurement": "samesource", "service": "samesource.service"}


def _pyproject() -> dict:
    return tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))


def test_every_package_folder_is_listed():
    tool = _pyproject()["tool"]["setuptools"]
    assert tool["package-dir"] == {v: k for k, v in MAPPED.items()}
    found = set()
    for folder, name in MAPPED.items():
        for init in (ROOT / folder).rglob("__init__.py"):
            found.add(".".join((name, *init.parent.relative_to(ROOT / folder).parts)))
    assert set(tool["packages"]) == found


def test_entry_point_is_under_samesource():
    assert _pyproject()["project"]["scripts"]["samesource"].startswith("samesource.")


def _imports(path: Path) -> list[tuple[int, str]]:
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    names = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names += [(node.lineno, a.name) for a in node.names]
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            names.append((node.lineno, node.module))
    return names


def test_no_code_imports_the_folder_names():
    stale = []
    for folder in ("measurement", "service", "tests", "sample_surveys"):
        for path in sorted((ROOT / folder).rglob("*.py")):
            for line, name in _imports(path):
                if name.split(".")[0] in MAPPED:
                    stale.append(f"{path.relative_to(ROOT)}:{line}: {name}")
    assert not stale, "import samesource.<...> instead: " + "; ".join(stale)
