"""Assembling report.json: thresholds, cautions, warnings, and strict JSON values.

Every float in the report is a finite JSON number; a value that could not be computed is
null, and a warning says where (the contract promises no NaN or Infinity).
"""

from __future__ import annotations

import json
import math
from typing import Any

import numpy as np

from samesource.options import AnalysisOptions
from samesource.output.cautions import cautions
from samesource.statistics.reliability import (
    AVE_THRESHOLD,
    LOADING_THRESHOLD,
    RELIABILITY_THRESHOLD,
)
from samesource.statistics.validity import HTMT_LIBERAL, HTMT_STRICT

SCHEMA = "samesource.report/1"

THRESHOLDS = {
    "alpha": {"value": RELIABILITY_THRESHOLD, "direction": ">=",
              "source": "common practice (often cited to Nunnally 1978)"},
    "omega": {"value": RELIABILITY_THRESHOLD, "direction": ">=",
              "source": "common practice (often cited to Nunnally 1978)"},
    "composite_reliability": {"value": RELIABILITY_THRESHOLD, "direction": ">=",
                              "source": "common practice"},
    "loading": {"value": LOADING_THRESHOLD, "direction": ">=", "source": "common practice"},
    "ave": {"value": AVE_THRESHOLD, "direction": ">=", "source": "Fornell & Larcker (1981)"},
    "htmt_strict": {"value": HTMT_STRICT, "direction": "<",
                    "source": "Henseler, Ringle & Sarstedt (2015)"},
    "htmt_liberal": {"value": HTMT_LIBERAL, "direction": "<",
                     "source": "Henseler, Ringle & Sarstedt (2015)"},
    "cfi": {"value": 0.95, "direction": ">=", "source": "Hu & Bentler (1999)"},
    "tli": {"value": 0.95, "direction": ">=", "source": "Hu & Bentler (1999)"},
    "rmsea": {"value": 0.06, "direction": "<=", "source": "Hu & Bentler (1999)"},
    "srmr": {"value": 0.08, "direction": "<=", "source": "Hu & Bentler (1999)"},
}


def finalize_report(report: dict, *, warnings: list[dict], options: AnalysisOptions) -> dict:
    report["thresholds"] = THRESHOLDS
    report["cautions"] = cautions(options.min_group_size)
    report["warnings"] = list(warnings)
    clean = to_jsonable(report, path="", undefined=(undefined := []))
    if undefined:
        shown = ", ".join(undefined[:8]) + (f" and {len(undefined) - 8} more" if len(undefined) > 8 else "")
        clean["warnings"].append({
            "code": "undefined_values",
            "message": f"{len(undefined)} value(s) could not be computed (not a finite number) and are "
                       f"shown as null: {shown}.",
        })
    return clean


def finite_or_none(v: Any) -> float | None:
    """A number as a float, or None where it is missing or not finite (said at the source,
    rather than left for :func:`to_jsonable` to flag as undefined)."""
    try:
        v = float(v)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def to_jsonable(obj: Any, *, path: str = "", undefined: list[str] | None = None) -> Any:
    """Plain JSON types only; non-finite floats become None and their paths are collected."""
    if isinstance(obj, dict):
        return {str(k): to_jsonable(v, path=f"{path}.{k}" if path else str(k), undefined=undefined)
                for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [to_jsonable(v, path=f"{path}[{i}]", undefined=undefined) for i, v in enumerate(obj)]
    if isinstance(obj, np.ndarray):
        return to_jsonable(obj.tolist(), path=path, undefined=undefined)
    if isinstance(obj, bool | np.bool_):
        return bool(obj)
    if isinstance(obj, int | np.integer):
        return int(obj)
    if isinstance(obj, float | np.floating):
        v = float(obj)
        if math.isfinite(v):
            return v
        if undefined is not None:
            undefined.append(path)
        return None
    if obj is None or isinstance(obj, str):
        return obj
    raise TypeError(f"report value at {path} is not JSON-serializable: {type(obj).__name__}")


def dumps(report: dict) -> str:
    """report.json text; refuses NaN and Infinity."""
    return json.dumps(report, indent=2, allow_nan=False, ensure_ascii=False)
