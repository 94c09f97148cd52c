"""The study design: which items form which construct, their roles, and the key paths.

Our own JSON format (see docs/design-file.md). :func:`parse_design` validates a design
object and returns a :class:`Design`; every error names the offending field and value.
:func:`check_columns` validates it against a data file's columns, and
:func:`draft_design` infers a draft from column-name stems.
"""

from __future__ import annotations

import dataclasses
import json
import math
import pathlib
import re
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

from samesource.errors import DesignError

ROLES = ("substantive", "marker", "method")
MIN_ITEMS = 2
MIN_ITEMS_OMEGA = 3
MAIN = "main"  # what the report calls the main data file among the sources
SOURCE_KINDS = ("other_rater", "later_wave", "records")


@dataclass(frozen=True)
class Construct:
    name: str
    items: tuple[str, ...]
    reverse: tuple[str, ...] = ()
    role: str = "substantive"
    answer_labels: dict[str, float | None] | None = None  # this construct's own, if any
    source: str = MAIN             # the file its items come from (a name in Design.sources)
    same_as: str | None = None     # the construct of another source that it measures again


@dataclass(frozen=True)
class Source:
    """A second data file (manager ratings, a later wave, records) joined to the main file's
    rows on ids. Its own missing codes, answer range and answer texts may differ."""

    name: str
    id_column: str
    kind: str = "other_rater"      # one of SOURCE_KINDS
    scale_min: float | None = None
    scale_max: float | None = None
    missing_codes: tuple[float, ...] = ()
    answer_labels: dict[str, float | None] = field(default_factory=dict)


@dataclass(frozen=True)
class Path:
    """One equation: ``outcome`` regressed on all its ``predictors``."""

    outcome: str
    predictors: tuple[str, ...]


@dataclass(frozen=True)
class Design:
    """A validated study design (docs/design-file.md): the constructs with their items,
    reverse keys and roles, the key paths, the answer range, missing codes, id and group
    columns, answer texts and second sources. Made by :func:`parse_design` or :func:`load_design`."""

    constructs: dict[str, Construct]
    paths: tuple[Path, ...] = ()
    scale_min: float | None = None
    scale_max: float | None = None
    missing_codes: tuple[float, ...] = ()
    id_column: str | None = None
    group_column: str | None = None
    answer_labels: dict[str, float | None] = field(default_factory=dict)
    sources: dict[str, Source] = field(default_factory=dict)
    raw: dict = field(default_factory=dict, compare=False, repr=False)

    def by_role(self, role: str) -> list[Construct]:
        """The constructs of one role ("substantive", "marker", "method"), in design order."""
        return [c for c in self.constructs.values() if c.role == role]

    @property
    def substantive(self) -> list[Construct]:
        """The substantive constructs, in design order."""
        return self.by_role("substantive")

    @property
    def marker(self) -> Construct | None:
        """The marker construct (theoretically unrelated to the others), or None."""
        m = self.by_role("marker")
        return m[0] if m else None

    @property
    def method(self) -> Construct | None:
        """The measured method construct, or None."""
        m = self.by_role("method")
        return m[0] if m else None

    @property
    def items(self) -> list[str]:
        """Every item of every construct, in design order."""
        return [i for c in self.constructs.values() for i in c.items]

    def labels_for(self, item: str) -> dict[str, float | None]:
        """The answer texts of ``item`` mapped to numbers (None: a missing answer), keyed by
        :func:`answer_key`: its construct's own labels, else the design's."""
        for c in self.constructs.values():
            if item in c.items and c.answer_labels is not None:
                return {answer_key(k): v for k, v in c.answer_labels.items()}
        return {answer_key(k): v for k, v in self.answer_labels.items()}

    def source_of(self, construct: str) -> str:
        """The source a construct's items come from: MAIN or a name in ``sources``."""
        return self.constructs[construct].source

    def main_part(self) -> Design:
        """The design of the main file alone: its constructs, the paths among them, no
        sources. Without sources this is the design itself."""
        if not self.sources:
            return self
        cons = {k: c for k, c in self.constructs.items() if c.source == MAIN}
        paths = tuple(p for p in self.paths
                      if p.outcome in cons and all(x in cons for x in p.predictors))
        return dataclasses.replace(self, constructs=cons, paths=paths, sources={})

    def source_part(self, name: str) -> Design:
        """The design a source's file is read with: its constructs (as main-file constructs),
        its id column, missing codes, answer range and answer texts."""
        src = self.sources[name]
        cons = {k: dataclasses.replace(c, source=MAIN, same_as=None)
                for k, c in self.constructs.items() if c.source == name}
        return Design(constructs=cons, paths=(), scale_min=src.scale_min, scale_max=src.scale_max,
                      missing_codes=src.missing_codes, id_column=src.id_column,
                      answer_labels=src.answer_labels or dict(self.answer_labels))

    def construct_of(self, item: str) -> str:
        """The name of the construct an item belongs to."""
        for c in self.constructs.values():
            if item in c.items:
                return c.name
        raise KeyError(item)

    def pair_key(self, a: str, b: str) -> str:
        """The contract's "A|B" key: the two names in design order."""
        order = list(self.constructs)
        a, b = sorted((a, b), key=order.index)
        return f"{a}|{b}"

    def to_dict(self) -> dict:
        """The design as JSON (as report.json's "design" shows it)."""
        out: dict[str, Any] = {"constructs": {}}
        for c in self.constructs.values():
            entry: dict[str, Any] = {"items": list(c.items)}
            if c.reverse:
                entry["reverse"] = list(c.reverse)
            if c.role != "substantive":
                entry["role"] = c.role
            if c.answer_labels is not None:
                entry["answer_labels"] = dict(c.answer_labels)
            if c.source != MAIN:
                entry["source"] = c.source
            if c.same_as:
                entry["same_as"] = c.same_as
            out["constructs"][c.name] = entry
        out["paths"] = [{"outcome": p.outcome, "predictors": list(p.predictors)} for p in self.paths]
        if self.scale_min is not None:
            out["response_scale"] = {"min": self.scale_min, "max": self.scale_max}
        if self.missing_codes:
            out["missing_codes"] = list(self.missing_codes)
        if self.id_column:
            out["id_column"] = self.id_column
        if self.group_column:
            out["group_column"] = self.group_column
        if self.answer_labels:
            out["answer_labels"] = dict(self.answer_labels)
        if self.sources:
            out["sources"] = {}
            for src in self.sources.values():
                entry = {"id_column": src.id_column, "kind": src.kind}
                if src.scale_min is not None:
                    entry["response_scale"] = {"min": src.scale_min, "max": src.scale_max}
                if src.missing_codes:
                    entry["missing_codes"] = list(src.missing_codes)
                if src.answer_labels:
                    entry["answer_labels"] = dict(src.answer_labels)
                out["sources"][src.name] = entry
        return out


_TOP_FIELDS = {"constructs", "paths", "response_scale", "missing_codes", "id_column", "group_column",
               "answer_labels", "sources"}
_CONSTRUCT_FIELDS = {"items", "reverse", "role", "answer_labels", "source", "same_as"}
_SOURCE_FIELDS = {"id_column", "kind", "response_scale", "missing_codes", "answer_labels"}


def answer_key(text: str) -> str:
    """How answer texts are matched: without regard to case, surrounding spaces, runs of
    spaces inside, or the kind of apostrophe ("Don’t know" = "don't know")."""
    return " ".join(text.replace("\u2019", "'").replace("\u2018", "'").split()).casefold()


def did_you_mean(name: str, choices: Iterable[str]) -> str:
    """" (did you mean 'X'?)" for the nearest of ``choices``, or "": a name differing only in
    case comes first, then the closest spelling."""
    import difflib

    options = [c for c in choices if isinstance(c, str)]
    if not isinstance(name, str):
        return ""
    same = [c for c in options if c.casefold() == name.casefold() and c != name]
    if same:
        return f" (did you mean '{same[0]}'?)"
    m = difflib.get_close_matches(name, options, n=1, cutoff=0.6)
    if not m:
        folded = {c.casefold(): c for c in options}
        m = [folded[x] for x in difflib.get_close_matches(name.casefold(), list(folded), n=1,
                                                            cutoff=0.6)]
    return f" (did you mean '{m[0]}'?)" if m else ""


def _is_number(v: Any) -> bool:
    """A finite JSON number that fits a float (an integer like 1e400 written out does not)."""
    if isinstance(v, bool) or not isinstance(v, int | float):
        return False
    try:
        return math.isfinite(float(v))
    except OverflowError:
        return False


def _shown(value: Any) -> str:
    """A value as JSON for a message, cut to 60 characters."""
    try:
        text = json.dumps(value)
    except (TypeError, ValueError, RecursionError):  # not JSON, or an integer too long to print
        text = f"a {type(value).__name__}"
    return text if len(text) <= 60 else text[:57] + "..."


def _is_text(v: Any) -> bool:
    """A non-empty string that is valid Unicode: a lone UTF-16 surrogate ("\\ud800" in JSON)
    is no character, and could be neither stored nor written into the report."""
    if not isinstance(v, str) or not v.strip():
        return False
    try:
        v.encode("utf-8")
    except UnicodeEncodeError:
        return False
    return True


def _str_list(value: Any, where: str) -> tuple[str, ...]:
    if not isinstance(value, list):
        raise DesignError(f"must be a list of column names, got {_shown(value)}", field=where)
    out = []
    for i, v in enumerate(value):
        if not _is_text(v):
            raise DesignError(f"must be a column name (a non-empty string of characters), got {_shown(v)}",
                              field=f"{where}[{i}]")
        out.append(v)
    dup = {v for v in out if out.count(v) > 1}
    if dup:
        raise DesignError(f"lists '{sorted(dup)[0]}' more than once", field=where)
    return tuple(out)


def parse_design(obj: Any) -> Design:
    """Validate a design object (parsed JSON) and return a :class:`Design`."""
    if not isinstance(obj, Mapping):
        raise DesignError("the design must be a JSON object with 'constructs' and 'paths'", field="(top)")
    unknown = sorted(set(obj) - _TOP_FIELDS)
    if unknown:
        raise DesignError(f"unknown field '{unknown[0]}'{did_you_mean(unknown[0], _TOP_FIELDS)}; "
                          f"allowed: {', '.join(sorted(_TOP_FIELDS))}", field=unknown[0])
    cons = obj.get("constructs")
    if not isinstance(cons, Mapping) or not cons:
        raise DesignError("must be an object naming at least one construct and its items", field="constructs")

    constructs: dict[str, Construct] = {}
    owner: dict[str, str] = {}
    for name, spec in cons.items():
        where = f"constructs.{name}"
        if not _is_text(name) or "|" in name:
            raise DesignError(f"a construct name must be a non-empty string of characters without '|', "
                              f"got {_shown(name)}", field=where)
        if not isinstance(spec, Mapping):
            raise DesignError("must be an object with 'items'", field=where)
        _refuse_unknown(spec, _CONSTRUCT_FIELDS, where)
        if "items" not in spec:
            raise DesignError("is missing; list the construct's item columns", field=f"{where}.items")
        items = _str_list(spec["items"], f"{where}.items")
        if len(items) < MIN_ITEMS:
            raise DesignError(f"construct '{name}' has {len(items)} item(s); every construct needs at least "
                              f"{MIN_ITEMS}", field=f"{where}.items")
        reverse = _str_list(spec.get("reverse", []), f"{where}.reverse")
        for r in reverse:
            if r not in items:
                raise DesignError(f"reverse item '{r}' is not one of construct '{name}' items"
                                  f"{did_you_mean(r, items)}", field=f"{where}.reverse")
        role = spec.get("role", "substantive")
        if isinstance(role, str) and role not in ROLES and role.strip().lower() in ROLES:
            role = role.strip().lower()  # "Marker" means "marker"
        if role not in ROLES:
            raise DesignError(f"unknown role {_shown(role)}{did_you_mean(role, ROLES)}; use one of "
                              f"{', '.join(ROLES)}", field=f"{where}.role")
        own_labels = (_parse_labels(spec["answer_labels"], f"{where}.answer_labels")
                      if spec.get("answer_labels") is not None else None)
        links = {}
        for key in ("source", "same_as"):
            v = spec.get(key)
            if v is not None and not _is_text(v):
                raise DesignError(f"must be a name (a non-empty string), got {_shown(v)}", field=f"{where}.{key}")
            links[key] = v
        for it in items:
            if it in owner:
                raise DesignError(f"item '{it}' is in construct '{owner[it]}' and in '{name}'; an item belongs to one "
                                  "construct", field=f"{where}.items")
            owner[it] = name
        constructs[name] = Construct(name=name, items=items, reverse=reverse, role=role,
                                     answer_labels=own_labels, source=links["source"] or MAIN,
                                     same_as=links["same_as"])

    clash = sorted(set(constructs) & set(owner))
    if clash:
        raise DesignError(f"'{clash[0]}' is both a construct name and an item; rename the construct",
                          field=f"constructs.{clash[0]}")

    for role in ("marker", "method"):
        named = [c.name for c in constructs.values() if c.role == role]
        if len(named) > 1:
            raise DesignError(f"more than one construct has role '{role}' ({', '.join(named)}); give one",
                              field=f"constructs.{named[1]}.role")
    if not any(c.role == "substantive" for c in constructs.values()):
        raise DesignError("needs at least one substantive construct", field="constructs")

    paths = _parse_paths(obj.get("paths", []), constructs)

    scale_min, scale_max = _parse_scale(obj.get("response_scale"), "response_scale")
    codes = _parse_codes(obj.get("missing_codes", []), "missing_codes")

    cols = {}
    for key in ("id_column", "group_column"):
        v = obj.get(key)
        if v is not None and not _is_text(v):
            raise DesignError(f"must be a column name, got {_shown(v)}", field=key)
        if v is not None and v in owner:
            raise DesignError(f"'{v}' is also an item of construct '{owner[v]}'", field=key)
        cols[key] = v
    if cols["id_column"] and cols["id_column"] == cols["group_column"]:
        raise DesignError("must differ from id_column", field="group_column")

    labels = (_parse_labels(obj["answer_labels"], "answer_labels")
              if obj.get("answer_labels") is not None else {})
    sources = _parse_sources(obj.get("sources"), constructs, owner, cols["id_column"])
    return Design(constructs=constructs, paths=paths, scale_min=scale_min, scale_max=scale_max,
                  missing_codes=codes, id_column=cols["id_column"],
                  group_column=cols["group_column"], answer_labels=labels, sources=sources,
                  raw=dict(obj))


def _refuse_unknown(spec: Mapping, allowed: set[str], where: str) -> None:
    bad = sorted(set(spec) - allowed)
    if bad:
        raise DesignError(f"unknown field '{bad[0]}'{did_you_mean(bad[0], allowed)}; "
                          f"allowed: {', '.join(sorted(allowed))}", field=f"{where}.{bad[0]}")


def _parse_scale(rs: Any, where: str) -> tuple[float | None, float | None]:
    if rs is None:
        return None, None
    if not isinstance(rs, Mapping) or set(rs) - {"min", "max"} or not {"min", "max"} <= set(rs):
        raise DesignError("must be an object {\"min\": number, \"max\": number}", field=where)
    if not (_is_number(rs["min"]) and _is_number(rs["max"])):
        raise DesignError(f"min and max must be finite numbers, got {_shown(rs)}", field=where)
    if rs["min"] >= rs["max"]:
        raise DesignError(f"min ({rs['min']}) must be below max ({rs['max']})", field=where)
    return float(rs["min"]), float(rs["max"])


def _parse_codes(codes: Any, where: str) -> tuple[float, ...]:
    if not isinstance(codes, list) or not all(_is_number(c) for c in codes):
        raise DesignError(f"must be a list of finite numbers, got {_shown(codes)}", field=where)
    return tuple(float(c) for c in codes)


def _parse_sources(value: Any, constructs: dict[str, Construct], owner: Mapping[str, str],
                   id_column: str | None) -> dict[str, Source]:
    """``sources`` and the constructs' ``source`` and ``same_as`` fields (docs/design-file.md,
    "Second sources")."""
    named = {c.source for c in constructs.values() if c.source != MAIN}
    if value is None:
        if named:
            first = next(c for c in constructs.values() if c.source != MAIN)
            raise DesignError(f"names the source '{first.source}', but the design has no 'sources'; add "
                              f"\"sources\": {{\"{first.source}\": {{\"id_column\": COLUMN}}}}",
                              field=f"constructs.{first.name}.source")
        _check_same_as(constructs)
        return {}
    if not isinstance(value, Mapping) or not value:
        raise DesignError("must be an object naming each second source and its id column, such as "
                          "{\"manager\": {\"id_column\": \"employee\"}}", field="sources")
    out: dict[str, Source] = {}
    for name, spec in value.items():
        where = f"sources.{name}"
        if not _is_text(name) or name == MAIN:
            raise DesignError(f"a source name must be a non-empty string other than '{MAIN}' (the main "
                              f"file's name in the report), got {_shown(name)}", field=where)
        if not isinstance(spec, Mapping):
            raise DesignError("must be an object with 'id_column'", field=where)
        _refuse_unknown(spec, _SOURCE_FIELDS, where)
        idc = spec.get("id_column")
        if not _is_text(idc):
            raise DesignError("is missing: name the column of this source's file that holds the ids "
                              "its rows are joined on", field=f"{where}.id_column")
        if idc in owner:
            raise DesignError(f"'{idc}' is also an item of construct '{owner[idc]}'", field=f"{where}.id_column")
        kind = spec.get("kind", "other_rater")
        if kind not in SOURCE_KINDS:
            raise DesignError(f"unknown kind {_shown(kind)}{did_you_mean(kind, SOURCE_KINDS)}; use one of "
                              f"{', '.join(SOURCE_KINDS)}", field=f"{where}.kind")
        lo, hi = _parse_scale(spec.get("response_scale"), f"{where}.response_scale")
        codes = _parse_codes(spec.get("missing_codes", []), f"{where}.missing_codes")
        labels = (_parse_labels(spec["answer_labels"], f"{where}.answer_labels")
                  if spec.get("answer_labels") is not None else {})
        out[name] = Source(name=name, id_column=idc, kind=kind, scale_min=lo, scale_max=hi,
                           missing_codes=codes, answer_labels=labels)
    for c in constructs.values():
        if c.source != MAIN and c.source not in out:
            raise DesignError(f"unknown source {_shown(c.source)}{did_you_mean(c.source, out)}; the design's "
                              f"sources are {', '.join(out)}", field=f"constructs.{c.name}.source")
        if c.source != MAIN and c.role != "substantive":
            raise DesignError(f"a {c.role} construct must come from the main file: it describes how the "
                              "main file's respondents answer", field=f"constructs.{c.name}.source")
    unused = [n for n in out if n not in named]
    if unused:
        raise DesignError(f"no construct comes from source '{unused[0]}': give a construct "
                          f"\"source\": \"{unused[0]}\", or drop the source", field=f"sources.{unused[0]}")
    if not id_column:
        raise DesignError("the design has sources, so it needs the main file's id column: the ids "
                          "that the sources' rows are joined on", field="id_column")
    if not any(c.source == MAIN and c.role == "substantive" for c in constructs.values()):
        raise DesignError("needs at least one substantive construct from the main file", field="constructs")
    _check_same_as(constructs)
    return out


def _check_same_as(constructs: dict[str, Construct]) -> None:
    for c in constructs.values():
        if c.same_as is None:
            continue
        where = f"constructs.{c.name}.same_as"
        if c.same_as not in constructs:
            raise DesignError(f"unknown construct {_shown(c.same_as)}{did_you_mean(c.same_as, constructs)}",
                              field=where)
        other = constructs[c.same_as]
        if other.source == c.source:
            raise DesignError(f"'{c.same_as}' comes from the same source as '{c.name}'; same_as links a "
                              "construct to the same thing measured from another source or wave", field=where)
        if c.role != "substantive" or other.role != "substantive":
            raise DesignError("links substantive constructs only", field=where)
        if other.same_as is not None:
            raise DesignError(f"'{c.same_as}' has a same_as of its own; name the first measurement in "
                              "every same_as", field=where)


def _parse_labels(value: Any, where: str) -> dict[str, float | None]:
    """``{"Strongly agree": 5, ..., "Don't know": null}``: answer texts to numbers (null for
    a text that means no answer). Two texts that match alike must not differ."""
    if not isinstance(value, Mapping) or not value:
        raise DesignError(f"must be an object mapping answer texts to numbers, such as "
                          f"{{\"Strongly disagree\": 1, \"Strongly agree\": 5}}, got {_shown(value)}",
                          field=where)
    out: dict[str, float | None] = {}
    seen: dict[str, str] = {}
    for text, number in value.items():
        if not _is_text(text):
            raise DesignError(f"an answer text must be a non-empty string, got {_shown(text)}",
                              field=where)
        if number is not None and not _is_number(number):
            raise DesignError(f"must be a number (or null for an answer that means no answer), "
                              f"got {_shown(number)}", field=f"{where}.{text}")
        key = answer_key(text)
        if key in seen and value[seen[key]] != number:
            raise DesignError(f"'{seen[key]}' and '{text}' are the same answer (matched without "
                              "regard to case and spaces) but map to different numbers",
                              field=f"{where}.{text}")
        seen[key] = text
        out[text] = None if number is None else float(number)
    return out


def _parse_paths(value: Any, constructs: Mapping[str, Construct]) -> tuple[Path, ...]:
    if not isinstance(value, list):
        raise DesignError("must be a list of {\"outcome\": ..., \"predictors\": [...]}", field="paths")
    paths: list[Path] = []
    seen: set[str] = set()
    for i, p in enumerate(value):
        where = f"paths[{i}]"
        extra = sorted(set(p) - {"outcome", "predictors"}) if isinstance(p, Mapping) else []
        if not isinstance(p, Mapping) or extra or "outcome" not in p or "predictors" not in p:
            hint = did_you_mean(extra[0], ("outcome", "predictors")) if extra else ""
            raise DesignError("must be an object {\"outcome\": NAME, \"predictors\": [NAME, ...]}"
                              + (f"; unknown field '{extra[0]}'{hint}" if extra else ""), field=where)
        out = p["outcome"]
        if not isinstance(out, str):
            raise DesignError(f"must be a construct name (a string), got {_shown(out)}",
                              field=f"{where}.outcome")
        if out not in constructs:
            raise DesignError(f"unknown construct {_shown(out)} as outcome{did_you_mean(out, constructs)}",
                              field=f"{where}.outcome")
        preds = _str_list(p["predictors"], f"{where}.predictors")
        if not preds:
            raise DesignError("needs at least one predictor", field=f"{where}.predictors")
        for j, pr in enumerate(preds):
            if pr not in constructs:
                raise DesignError(f"unknown construct {_shown(pr)} as predictor{did_you_mean(pr, constructs)}",
                                  field=f"{where}.predictors[{j}]")
            if pr == out:
                raise DesignError(f"construct '{out}' cannot predict itself", field=f"{where}.predictors[{j}]")
        for name, w in [(out, f"{where}.outcome")] + [(pr, f"{where}.predictors") for pr in preds]:
            if constructs[name].role != "substantive":
                raise DesignError(f"'{name}' has role '{constructs[name].role}'; paths join substantive constructs only",
                                  field=w)
        if out in seen:
            raise DesignError(f"outcome '{out}' appears in two paths; list all its predictors in one", field=f"{where}.outcome")
        seen.add(out)
        paths.append(Path(outcome=out, predictors=preds))
    _check_acyclic(paths)
    return tuple(paths)


def _check_acyclic(paths: list[Path]) -> None:
    graph = {p.outcome: set(p.predictors) for p in paths}
    state: dict[str, int] = {}

    def visit(node: str, trail: list[str]) -> None:
        state[node] = 1
        for nxt in sorted(graph.get(node, ())):
            if state.get(nxt) == 1:
                cycle = trail[trail.index(nxt):] + [nxt] if nxt in trail else [node, nxt]
                raise DesignError("the paths form a cycle (" + " <- ".join(cycle) + "); a construct cannot "
                                  "predict, directly or through others, a construct it depends on", field="paths")
            if state.get(nxt) is None:
                visit(nxt, trail + [nxt])
        state[node] = 2

    for n in sorted(graph):
        if state.get(n) is None:
            visit(n, [n])


def check_columns(design: Design, columns: Iterable[str], *, file: str | None = None,
                  other_sheets: Mapping[str, Iterable[str]] | None = None) -> None:
    """Every column the design names must be in the data. ``other_sheets`` (a workbook's
    other sheets and their columns) lets the message name the sheet that has the column."""
    cols = set(columns)

    wanted = set(design.items)
    # the other sheets, those holding more of the design's items first
    ranked = sorted(((sheet, set(names)) for sheet, names in (other_sheets or {}).items()),
                    key=lambda kv: -len(kv[1] & wanted))

    def elsewhere(name: str) -> str:
        for sheet, names in ranked:
            if name in names:
                return f"; it is a column of sheet '{sheet}': choose that sheet (--sheet, or the option sheet)"
        return ""

    for c in design.constructs.values():
        if c.source != MAIN:  # checked against its source's file (sources.check_source_columns)
            continue
        for i, it in enumerate(c.items):
            if it not in cols:
                hint = elsewhere(it) or did_you_mean(it, cols)
                raise DesignError(f"item '{it}' is not a column of the data{hint}",
                                  field=f"constructs.{c.name}.items[{i}]", file=file)
    for key in ("id_column", "group_column"):
        v = getattr(design, key)
        if v and v not in cols:
            raise DesignError(f"'{v}' is not a column of the data{elsewhere(v) or did_you_mean(v, cols)}",
                              field=key, file=file)


def load_design(path: str | pathlib.Path) -> Design:
    """Read and validate a design file."""
    p = pathlib.Path(path)
    try:
        text = p.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise DesignError("design file not found", file=str(path)) from None
    except (OSError, UnicodeDecodeError) as e:
        raise DesignError(f"cannot read the design file ({e.__class__.__name__})", file=str(path)) from None
    try:
        obj = json.loads(text)
    except json.JSONDecodeError as e:
        raise DesignError(f"not valid JSON: {e.msg} at line {e.lineno}, column {e.colno}", file=str(path)) from None
    except RecursionError:
        raise DesignError("not usable JSON: its lists or objects are nested too deeply; a design "
                          "needs only a few levels (see docs/design-file.md)", file=str(path)) from None
    except ValueError:  # Python's limit on the digits of an integer
        raise DesignError("not usable JSON: it holds a number with too many digits to read; "
                          "write numbers such as the response scale with a few digits", file=str(path)) from None
    try:
        return parse_design(obj)
    except DesignError as e:
        e.file = str(path)
        raise


# Item names, as survey platforms and analysts write them (docs/design-file.md, "Drafting").
# A question number and an item number: Q3_1, Q3.1, q3-1, Q12r1 (r for "row").
_NUMBERED = re.compile(r"^(?P<stem>[A-Za-z]+\d+)(?:[_.\-]|[rR](?=\d))(?P<num>\d+)$")
# The open-text box beside a choice: Q3_1_TEXT, Q3_4_other.
_TEXT_BOX = re.compile(r"^[A-Za-z]+\d+(?:[_.\-]\d+)*[_.\-](?:text|other|specify)$", re.IGNORECASE)
# A letter stem and a number: sup1, clim_1, eng.2; a trailing r or _r marks a reverse item.
_STEM = re.compile(r"^(?P<stem>[A-Za-z][A-Za-z_.\- ]*?)[_.\- ]?(?P<num>\d+)(?P<rev>_?[rR])?$")
_ID_NAMES = {"id", "respondent", "respondent_id", "resp_id", "participant", "participant_id", "responseid",
             "response_id", "case", "caseid", "case_id", "record", "respid"}
_GROUP_NAMES = {"team", "team_id", "group", "group_id", "unit", "department", "dept", "work_unit", "ward",
                "site", "branch", "office", "clinic", "location", "unit_id", "ward_id", "site_id"}
_GROUP_WORDS = ("team", "group", "unit", "ward", "dept", "department", "site", "branch", "office",
                "clinic", "location", "store", "division")


def item_stem(name: str) -> tuple[str, bool] | None:
    """The construct stem an item-like column name drafts to, and whether the name marks it
    reverse-keyed; None for a name that is no item (an open-text box, a bare question number
    such as Q7, a name without a number)."""
    n = name.strip()
    if _TEXT_BOX.match(n):
        return None
    m = _NUMBERED.match(n)
    if m:
        return m.group("stem").lower(), False
    m = _STEM.match(n)
    if not m:
        return None
    stem = m.group("stem").rstrip("_.- ").lower()
    if stem == "q":  # Q1, Q2, ...: question numbers, each its own question
        return None
    return stem, bool(m.group("rev"))


def left_out_reason(name: str) -> str:
    """Why a column is not drafted as an item, from its name alone."""
    n = name.strip()
    if _TEXT_BOX.match(n):
        return "an open-text box beside a question (its name ends in _TEXT or _other)"
    if re.fullmatch(r"[qQ]\d+", n):
        return "a single question (a question number without an item number)"
    return "its name is not a stem and a number (such as sup1, clim_2, Q3_1, Q3r1, Q3.1)"


def draft_design(columns: Iterable[str], numeric: Iterable[str] | None = None,
                 left_out: list[dict] | None = None) -> dict:
    """Infer a draft design from column names (``sup1..sup5`` -> construct ``sup``,
    ``Q3_1..Q3_4`` -> construct ``q3``).

    ``numeric`` (optional) restricts items to columns known to hold numbers. Items whose
    name ends in ``r`` or ``_r`` (``sup4r``) are drafted as reverse-keyed. The draft has no
    paths: the analyst adds them. ``left_out``, when given, receives ``{"column", "reason"}``
    for every column the draft does not use. :func:`samesource.input.drafting.draft_from_table`
    adds what the answers tell (scale, missing codes, id and team columns, reverse items).
    """
    cols = list(columns)
    num = set(numeric) if numeric is not None else set(cols)
    groups: dict[str, list[str]] = {}
    reverse: dict[str, list[str]] = {}
    id_col = group_col = None
    skipped: list[dict] = []
    for c in cols:
        low = c.strip().lower()
        if id_col is None and low in _ID_NAMES:
            id_col = c
            continue
        if group_col is None and low in _GROUP_NAMES:
            group_col = c
            continue
        stem = item_stem(c)
        if stem is None:
            skipped.append({"column": c, "reason": left_out_reason(c)})
            continue
        if c not in num:
            skipped.append({"column": c, "reason": "its answers are not numbers"})
            continue
        groups.setdefault(stem[0], []).append(c)
        if stem[1]:
            reverse.setdefault(stem[0], []).append(c)
    constructs = {}
    for stem, items in groups.items():
        if len(items) >= MIN_ITEMS:
            entry: dict[str, Any] = {"items": items}
            if reverse.get(stem):
                entry["reverse"] = reverse[stem]
            constructs[stem] = entry
        else:
            skipped.append({"column": items[0], "reason": f"the only item with the stem '{stem}' "
                            f"(a construct needs at least {MIN_ITEMS})"})
    draft: dict[str, Any] = {"constructs": constructs, "paths": []}
    if id_col:
        draft["id_column"] = id_col
    if group_col:
        draft["group_column"] = group_col
    if left_out is not None:
        order = {c: i for i, c in enumerate(cols)}
        left_out.extend(sorted(skipped, key=lambda d: order.get(d["column"], 0)))
    return draft


def looks_like_group(name: str) -> bool:
    """A column name that suggests teams or units (team, ward, site, ...)."""
    low = name.strip().lower()
    return low in _GROUP_NAMES or any(w in re.split(r"[^a-z]+", low) for w in _GROUP_WORDS)


def looks_like_id(name: str) -> bool:
    """A column name that suggests a respondent id (id, ResponseId, resp_id, ...)."""
    low = name.strip().lower()
    return (low in _ID_NAMES or bool(re.search(r"(?:^|[_ .\-])id$", low))
            or bool(re.fullmatch(r"(?:response|respondent|resp|case|record|participant)[_ ]?(?:id|no|number)", low)))
