"""Key paths across sources: which are free of same-rater bias, and how close each correction
of a same-source path came to its cross-source counterpart.

Measuring predictor and outcome from different sources (another rater, records) is the
stronger remedy for common-method bias; measuring them at different times removes the part
that comes from answering both in one sitting, not a stable answering style (Podsakoff,
MacKenzie, Lee & Podsakoff 2003, "Procedural remedies"). A path's estimates come from models
in which the main file's method factor loads on the main file's items only, so a predictor
and an outcome from different sources share no method (measurement/engine/builders.py).

A same-source path has a cross-source counterpart when a construct of another source
measures its outcome (or predictor) again (``same_as`` in the design) and the design
declares that path too. The counterpart's preferred estimate is the benchmark; each
correction of the same-source path is set beside it. The two measure the construct through
different eyes, so a difference is method bias plus whatever the two views really differ
in: the benchmark is evidence, not the truth.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

from samesource.input.design import MAIN, Design

KIND_WORDS = {
    "other_rater": "another rater",
    "later_wave": "a later survey wave of the same people",
    "records": "records",
}


@dataclass(frozen=True)
class PathSources:
    outcome: str                 # the outcome's source (MAIN or a source name)
    predictor: str
    kind: str                    # "same_source" | "cross_source"
    free_of_same_rater_bias: bool
    separated_in_time: bool
    note: str

    def to_dict(self) -> dict:
        return asdict(self)


def path_sources(design: Design, outcome: str, predictor: str) -> PathSources:
    so, sx = design.source_of(outcome), design.source_of(predictor)
    if so == sx:
        where = "the main file" if so == MAIN else f"source '{so}'"
        return PathSources(so, sx, "same_source", False, False,
                           f"Predictor and outcome both come from {where}: the same people answered both, so "
                           "a shared answering style can inflate or hide the link; the corrections estimate "
                           "and remove what they can.")
    other = so if so != MAIN else sx
    kind = design.sources[other].kind
    if kind == "later_wave":
        return PathSources(so, sx, "cross_source", False, True,
                           f"The outcome and predictor come from different waves ('{other}' is "
                           f"{KIND_WORDS[kind]}): the bias of answering both in one sitting (mood, the "
                           "context of the questions) is gone, but a stable answering style of the same "
                           "people can still link them.")
    return PathSources(so, sx, "cross_source", True, kind == "records",
                       f"Free of same-rater bias: the predictor comes from {_name(sx, design)} and the outcome "
                       f"from {_name(so, design)}, so no shared answering style of one rater can create or "
                       "hide this link. Unreliability is still corrected as usual, and the estimate is still "
                       "an association, not a causal effect.")


def _name(source: str, design: Design) -> str:
    if source == MAIN:
        return "the main file"
    return f"{KIND_WORDS[design.sources[source].kind]} ('{source}')"


def annotate_sources(design: Design, paths: list[dict]) -> list[dict]:
    """Adds ``sources`` to every path entry and ``cross_source_check`` to each same-source
    path that has a cross-source counterpart (and ``same_source_counterpart`` to that one)."""
    canon = {c.name: c.same_as or c.name for c in design.constructs.values()}
    by_key = {(p["outcome"], p["predictor"]): p for p in paths}
    for p in paths:
        ps = path_sources(design, p["outcome"], p["predictor"])
        p["sources"] = ps.to_dict()
        if ps.kind == "cross_source":
            _cross_source_wording(p, ps)
    for p in paths:
        if p["sources"]["kind"] != "same_source":
            continue
        want = (canon[p["outcome"]], canon[p["predictor"]])
        match = [q for (o, x), q in by_key.items()
                 if q["sources"]["kind"] == "cross_source" and (canon[o], canon[x]) == want]
        if not match:
            continue
        q = match[0]
        p["cross_source_check"] = compare_with_counterpart(p, q)
        q["same_source_counterpart"] = {"outcome": p["outcome"], "predictor": p["predictor"]}
    return paths


def compare_with_counterpart(same: dict, cross: dict) -> dict:
    """Each estimate of the same-source path against the counterpart's preferred estimate."""
    bench_method = cross.get("preferred")
    bench = (cross.get("estimates") or {}).get(bench_method) or {}
    b, ci = bench.get("estimate"), bench.get("ci")
    rows = {}
    for m, e in (same.get("estimates") or {}).items():
        if not e or e.get("estimate") is None:
            continue
        v = e["estimate"]
        rows[m] = {"estimate": v, "ci": e.get("ci"),
                   "difference": None if b is None else v - b,
                   "within_benchmark_ci": None if not ci else bool(ci[0] <= v <= ci[1])}
    closest = min((m for m in rows if rows[m]["difference"] is not None),
                  key=lambda m: abs(rows[m]["difference"]), default=None)
    same_preds, cross_preds = same.get("predictors") or [], cross.get("predictors") or []
    note = ("The cross-source path measures the same constructs through another source, so the gap between "
            "a correction and it is method bias plus any real difference between the two views: evidence "
            "on how well each correction works here, not the truth.")
    if len(same_preds) != len(cross_preds):
        note += (" The two equations have different numbers of predictors, so their coefficients are "
                 "not strictly comparable.")
    return {
        "counterpart": {"outcome": cross["outcome"], "predictor": cross["predictor"],
                        "sources": cross["sources"]},
        "benchmark": {"method": bench_method, "estimate": b, "ci": ci},
        "by_estimate": rows,
        "closest": closest,
        "preferred_difference": (rows.get(same.get("preferred")) or {}).get("difference"),
        "note": note,
    }


def _cross_source_wording(p: dict, ps: PathSources) -> None:
    """The bounds' and trust's words assume one rater behind both ends; say what holds here."""
    if p.get("cannot_pin_down") and ps.free_of_same_rater_bias:
        b = p.get("bounds") or {}
        p["cannot_pin_down"] = (
            f"Allowing for an answering style in the main file's answers (which here can only hide part of the "
            f"link, not create it: the other end comes from another source), the association lies anywhere from "
            f"{b.get('low', 0):.2f} to {b.get('high', 0):.2f}. A measured method scale or a marker that shares "
            "the main file's answering style would narrow it.")
    trust = p.get("trust")
    if isinstance(trust, dict):
        reasons = [r for r in trust.get("reasons", [])
                   if r != "the headline number corrects unreliability but not shared method"
                   or not ps.free_of_same_rater_bias]
        reasons.insert(0, ps.note)
        trust["reasons"] = reasons


__all__ = ["annotate_sources", "path_sources", "compare_with_counterpart", "PathSources"]
