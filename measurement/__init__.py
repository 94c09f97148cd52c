"""samesource: reliability, validity and common-method checks for same-source survey scales,
with each key path re-estimated with the shared method's bias corrected or bounded.

    import samesource
    report = samesource.analyze(df, "design.json", missing="fiml")
    report.summary(); report.to_frame("paths"); report.save("samesource-report")

The public names are loaded when first used (``import samesource`` stays quick, and
``import samesource.engine.fitting`` does not load the whole pipeline). The command line and
the HTTP service call :func:`samesource.analyze` like any other caller.
"""

from __future__ import annotations

import importlib
from typing import Any

__version__ = "0.1.0"

# public name -> module that defines it
_PUBLIC = {
    "analyze": "samesource.facade",
    "Report": "samesource.output.report",
    "Design": "samesource.input.design",
    "load_design": "samesource.input.design",
    "parse_design": "samesource.input.design",
    "AnalysisOptions": "samesource.options",
    "InputError": "samesource.errors",
    "DataError": "samesource.errors",
    "DesignError": "samesource.errors",
    "LocalExecutor": "samesource.executor",
    "SerialExecutor": "samesource.executor",
    # one function per published statistic: answers in, a tidy DataFrame out
    "alpha": "samesource.tidy",
    "item_stats": "samesource.tidy",
    "omega": "samesource.tidy",
    "htmt": "samesource.tidy",
    "harman": "samesource.tidy",
    "marker_adjusted": "samesource.tidy",
    "vif": "samesource.tidy",
}

__all__ = ["__version__", *_PUBLIC]


def __getattr__(name: str) -> Any:
    module = _PUBLIC.get(name)
    if module is None:
        raise AttributeError(f"module 'samesource' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value  # found once, then an ordinary attribute
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_PUBLIC))

