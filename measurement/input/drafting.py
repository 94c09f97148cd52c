"""A draft design from a loaded table: names, answers and SPSS labels (docs/design-file.md).

:func:`draft_from_table` groups item columns by their names (:func:`design.draft_design`),
then reads the answers: answer texts of a recognised scale become ``answer_labels``, values
standing apart become ``missing_codes``, the rest gives ``response_scale``; it proposes the
id column (a value per row) and the team column, and marks items that run against the rest
of their group as likely reverse-keyed. Every rule is a rule of thumb (common practice): the
draft is for the analyst to check, and :class:`Draft` says what it left out and why.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from samesource.input.design import (
    answer_key,
    draft_design,
    item_stem,
    looks_like_group,
    looks_like_id,
)
from samesource.input.loading import LoadedTable, text_answers
from samesource.input.prepare import _read_column, numeric_columns, standing_apart

# English answer scales, lowest first (numbered 1, 2, ...). Alternatives for one step are
# separated by "|".
_SCALES: tuple[tuple[str, ...], ...] = (
    ("strongly disagree", "disagree", "agree", "strongly agree"),
    ("strongly disagree", "disagree", "neither agree nor disagree|neutral|neither|"
     "neither disagree nor agree|undecided", "agree", "strongly agree"),
    ("strongly disagree", "disagree", "somewhat disagree|slightly disagree|mildly disagree",
     "somewhat agree|slightly agree|mildly agree", "agree", "strongly agree"),
    ("strongly disagree", "disagree", "somewhat disagree|slightly disagree|mildly disagree",
     "neither agree nor disagree|neutral|neither|neither disagree nor agree|undecided",
     "somewhat agree|slightly agree|mildly agree", "agree", "strongly agree"),
    ("never", "rarely|seldom", "sometimes|occasionally", "often|frequently",
     "always|very often|almost always"),
    ("never", "almost never", "sometimes", "fairly often", "very often"),
    ("not at all", "a little|slightly", "moderately|somewhat", "quite a bit|very", "extremely"),
)
# Texts meaning no answer: mapped to null (read as missing).
_NO_ANSWER = frozenset({"don't know", "do not know", "dont know", "dk", "not applicable",
                        "prefer not to say", "prefer not to answer", "no answer", "refused",
                        "no opinion", "can't say", "cannot say", "not sure", "missing"})


@dataclass
class Draft:
    """A draft design and what the analyst should know about it."""

    design: dict
    left_out: list[dict] = field(default_factory=list)  # {"column", "reason"}
    notes: list[str] = field(default_factory=list)


def recognise_scale(texts: list[str]) -> dict[str, float | None] | None:
    """``answer_labels`` for answer texts forming one of the English scales we know (matched
    by :func:`answer_key`), texts meaning no answer mapped to None; None when they do not."""
    keys = {answer_key(t): t for t in texts}
    answers = {k for k in keys if k not in _NO_ANSWER}
    if not answers:
        return None
    for scale in _SCALES:
        steps = [set(s.split("|")) for s in scale]
        if answers <= set().union(*steps):
            out: dict[str, float | None] = {}
            for k, t in keys.items():
                out[t] = None if k in _NO_ANSWER else float(next(i for i, s in enumerate(steps, 1) if k in s))
            return out
    return None


def _spss_scale(table: LoadedTable, items: list[str]) -> tuple[dict, list[float], tuple[float, float] | None]:
    """From SPSS value labels of the items: answer labels, codes labelled as no answer, and
    the range of the other labelled values."""
    labels: dict[str, float] = {}
    codes: set[float] = set()
    values: list[float] = []
    for it in items:
        for v, text in (table.value_labels.get(it) or {}).items():
            try:
                number = float(v)
            except (TypeError, ValueError):
                continue
            if answer_key(str(text)) in _NO_ANSWER:
                codes.add(number)
            else:
                labels.setdefault(str(text), number)
                values.append(number)
    return labels, sorted(codes), ((min(values), max(values)) if values else None)


def _label_prefix(label: str) -> str | None:
    for sep in (" - ", ": ", " – ", " — "):
        if sep in label:
            return label.split(sep, 1)[0].strip() or None
    return None


def draft_from_table(table: LoadedTable) -> Draft:
    """A draft design for ``table`` (see the module docstring and docs/design-file.md)."""
    frame = table.frame
    cols = [str(c) for c in frame.columns]
    notes: list[str] = []
    texts = text_answers(table)
    labels: dict[str, float | None] = {}
    mapped: list[str] = []
    unmapped: dict[str, dict] = {}
    all_texts = [t for info in texts.values() for t in info["texts"]]
    recognised = recognise_scale(all_texts) if all_texts and not any(i["more"] for i in texts.values()) else None
    if recognised:
        labels = recognised
        mapped = list(texts)
        notes.append("answer_labels: the item answers are texts of a scale recognised as "
                     + " < ".join(t for t, v in sorted(((t, v) for t, v in labels.items() if v is not None),
                                                       key=lambda x: x[1])) + "; check the numbers")
    else:
        unmapped = texts
    keys = {answer_key(k): v for k, v in labels.items()}
    numeric = set(numeric_columns(table)) | set(mapped)
    left_out: list[dict] = []
    draft = draft_design(cols, numeric=[c for c in cols if c in numeric], left_out=left_out)
    for d in left_out:
        if d["column"] in unmapped:
            info = unmapped[d["column"]]
            d["reason"] = (f"its answers are texts not of a scale recognised (such as {info['text']!r} in "
                           f"{table.row_label} {info['row']}); map them with answer_labels")

    # Items by construct, as numbers (answer texts mapped).
    values: dict[str, np.ndarray] = {}
    for c in draft["constructs"].values():
        for it in c["items"]:
            values[it] = _read_column(frame[it], keys)[0]
    items = list(values)

    # SPSS variable labels: split a name stem whose labels say otherwise (v1..v9 with labels
    # "Workload - ...", "Support - ...").
    if table.variable_labels:
        _split_by_labels(draft, table.variable_labels, notes)

    # Scale and missing codes.
    spss_labels, spss_codes, spss_range = _spss_scale(table, items)
    if spss_labels and not labels:
        labels = {k: v for k, v in spss_labels.items()}
        notes.append("answer_labels: from the SPSS value labels (the cells hold the numbers already)")
    matrix = np.column_stack([values[i] for i in items]) if items else np.empty((0, 0))
    codes = list(spss_codes)
    if items:
        rest = matrix[~np.isin(matrix, codes)] if codes else matrix.ravel()
        apart, core = standing_apart(rest)
        codes = sorted(set(codes) | set(apart))
        if spss_range is not None:
            lo, hi = spss_range
            notes.append(f"response_scale: {lo:g} to {hi:g}, the SPSS value labels' answers")
        elif recognised:
            numbers = [v for v in labels.values() if v is not None]
            lo, hi = min(numbers), max(numbers)
        elif core is not None:
            lo, hi = core
            notes.append(f"response_scale: {lo:g} to {hi:g}, the lowest and highest answers given; widen it "
                         "if the scale has answers no one chose")
        if core is not None or spss_range is not None or recognised:
            draft["response_scale"] = {"min": _plain(lo), "max": _plain(hi)}
        if codes:
            draft["missing_codes"] = [_plain(c) for c in codes]
            notes.append("missing_codes: " + ", ".join(f"{c:g}" for c in codes) + " stand apart from the "
                         "other answers (or are labelled as no answer); check that they mean no answer")
        matrix = np.where(np.isin(matrix, codes), np.nan, matrix)
    if labels:
        draft["answer_labels"] = {k: (None if v is None else _plain(v)) for k, v in labels.items()}

    # Reverse-keyed items: the sign of the first principal component.
    for name, c in draft["constructs"].items():
        idx = [items.index(i) for i in c["items"]]
        rev = _against_the_rest(matrix[:, idx]) if len(idx) >= 3 else []
        flagged = [c["items"][k] for k in rev]
        if flagged:
            c["reverse"] = list(dict.fromkeys(list(c.get("reverse", [])) + flagged))
            notes.append(f"reverse ({name}): {', '.join(flagged)} correlate negatively with the rest of "
                         "the group; drafted as reverse-keyed: check their wording")

    _id_and_group(table, draft, set(items), left_out, notes)
    used = set(items) | {draft.get("id_column"), draft.get("group_column")}
    left_out = [d for d in left_out if d["column"] not in used]
    return Draft(design=draft, left_out=left_out, notes=notes)


def _plain(v: float) -> float | int:
    return int(v) if float(v).is_integer() else float(v)


def _against_the_rest(block: np.ndarray) -> list[int]:
    """Columns whose loading on the first principal component of the pairwise correlations
    has the sign opposite to most items' (the first item's sign breaks a tie)."""
    df = pd.DataFrame(block)
    corr = df.corr(min_periods=10).to_numpy()
    if np.isnan(corr).any():
        return []
    w, v = np.linalg.eigh(corr)
    first = v[:, -1]
    pos = int((first > 0).sum())
    neg = int((first < 0).sum())
    sign = 1.0 if pos > neg or (pos == neg and first[0] > 0) else -1.0
    return [k for k, x in enumerate(first) if x * sign < 0 and abs(x) > 1e-6]


def _split_by_labels(draft: dict, var_labels: dict[str, str], notes: list[str]) -> None:
    out: dict[str, dict] = {}
    for name, c in draft["constructs"].items():
        prefixes = [_label_prefix(var_labels.get(i, "")) for i in c["items"]]
        distinct = list(dict.fromkeys(p for p in prefixes if p))
        if len(distinct) > 1 and all(prefixes):
            for p in distinct:
                its = [i for i, q in zip(c["items"], prefixes, strict=True) if q == p]
                if len(its) >= 2:
                    key = p.lower().replace(" ", "_")
                    out[key] = {"items": its, **({"reverse": [r for r in c.get("reverse", []) if r in its]}
                                                 if c.get("reverse") else {})}
            notes.append(f"constructs: the items named {name}... were split by their SPSS variable labels "
                         f"({', '.join(distinct)})")
        else:
            out[name] = c
    draft["constructs"] = out


def _id_and_group(table: LoadedTable, draft: dict, items: set[str], left_out: list[dict],
                  notes: list[str]) -> None:
    frame = table.frame
    n = len(frame)
    others = [str(c) for c in frame.columns if str(c) not in items]

    def labels(col: str) -> pd.Series:
        return frame[col].map(lambda v: None if v is None or (isinstance(v, float) and v != v)
                              else (str(int(v)) if isinstance(v, float) and v.is_integer() else str(v).strip()))

    if "id_column" not in draft:
        for col in others:
            s = labels(col)
            if s.notna().all() and s.nunique() == n and n > 1 and (
                    looks_like_id(col) or s.map(lambda t: t.isdigit()).all()):
                draft["id_column"] = col
                notes.append(f"id_column: '{col}' holds a different value in every {table.row_label}")
                break
    if "group_column" not in draft:
        for col in others:
            if col == draft.get("id_column"):
                continue
            s = labels(col).dropna()
            k = s.nunique()
            if 2 <= k <= n / 3 and looks_like_group(col):
                draft["group_column"] = col
                notes.append(f"group_column: '{col}' has {k} values, about {len(s) / k:.0f} "
                             f"{table.row_label}s each")
                break
        else:
            for col in others:
                s = labels(col).dropna()
                k = s.nunique()
                if col != draft.get("id_column") and 2 <= k and len(s) / max(k, 1) >= 3 and \
                        item_stem(col) is None and not s.map(lambda t: t.replace(".", "").isdigit()).all():
                    notes.append(f"'{col}' repeats {k} values over many {table.row_label}s; if it names "
                                 "teams, set it as group_column")
                    break
