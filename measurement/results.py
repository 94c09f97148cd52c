"""What the stages of an analysis return: immutable results, merged only by the assembly.

Each stage (pipeline.STAGES) reads what it needs (the design, the rows to analyse, the
options, the results of earlier stages it depends on, the one :class:`FitCache`) and returns
one frozen result; no stage writes into another's result, into a shared warnings list or into
report.json. :func:`samesource.pipeline.assemble` is the one place that merges them into
report.json's content. Mappings inside a result are read-only and lists are tuples
(:func:`freeze`); :func:`thaw` gives a plain, fresh copy for the JSON.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Mapping, MutableMapping
from dataclasses import dataclass
from types import MappingProxyType
from typing import Any


def freeze(v: Any) -> Any:
    """A read-only view of a JSON-like value: dicts become mappings that refuse writes, lists
    and tuples become tuples (recursively); everything else is left as it is."""
    if isinstance(v, Mapping):
        return MappingProxyType({k: freeze(x) for k, x in v.items()})
    if isinstance(v, list | tuple):
        return tuple(freeze(x) for x in v)
    return v


def thaw(v: Any) -> Any:
    """A plain, fresh copy of a frozen value: mappings become dicts and tuples lists, as
    report.json has them."""
    if isinstance(v, Mapping):
        return {k: thaw(x) for k, x in v.items()}
    if isinstance(v, list | tuple):
        return [thaw(x) for x in v]
    return v


@dataclass(frozen=True)
class Notice:
    """One entry of report["warnings"], said by the stage that found it."""

    code: str
    message: str

    def to_dict(self) -> dict[str, str]:
        return {"code": self.code, "message": self.message}


def notices(entries: Iterable[Mapping[str, Any] | Notice]) -> tuple[Notice, ...]:
    """Notices from report.json-style warnings ({"code", "message"}) or notices."""
    return tuple(e if isinstance(e, Notice) else Notice(str(e["code"]), str(e["message"]))
                 for e in entries)


class FitCache(MutableMapping):
    """The fitted models of one analysis by model name (``ModelSpec.name``).

    One cache is made per analysis and handed explicitly to every stage that fits a model:
    a stage stores what it fits, and a later stage that needs the same model reads it instead
    of fitting it again (the method checks read the measurement model; the paths' full-sample
    fits are the bootstrap's warm starts). It holds fits only, never results; its content is
    ``Report.fits``."""

    def __init__(self) -> None:
        self._fits: dict[str, Any] = {}

    def __getitem__(self, name: str) -> Any:
        return self._fits[name]

    def __setitem__(self, name: str, fit: Any) -> None:
        self._fits[name] = fit

    def __delitem__(self, name: str) -> None:
        del self._fits[name]

    def __iter__(self) -> Iterator[str]:
        return iter(self._fits)

    def __len__(self) -> int:
        return len(self._fits)

    def __repr__(self) -> str:
        return f"FitCache({', '.join(self._fits)})"


# ------------------------------------------------------------------------------- reliability

@dataclass(frozen=True)
class ItemReliability:
    """One item of a scale, from the answers alone (its loading comes from the measurement model)."""

    item_rest_r: float | None
    alpha_if_deleted: float | None
    mean: float | None
    sd: float | None


@dataclass(frozen=True)
class ScaleReliability:
    """One scale's reliability from its own items: alpha (Feldt interval), omega."""

    role: str
    items: tuple[str, ...]
    reverse: tuple[str, ...]
    n: int
    alpha: float | None
    alpha_ci: tuple[float, float] | None
    omega: float | None
    item_stats: Mapping[str, ItemReliability]


@dataclass(frozen=True)
class ReliabilityResult:
    """The reliability stage: every scale, in design order."""

    scales: Mapping[str, ScaleReliability]
    notices: tuple[Notice, ...]


# ------------------------------------------------------------------------- measurement model

@dataclass(frozen=True)
class ScaleValidity:
    """What the measurement model says of one scale: standardized loadings, CR, AVE."""

    loadings: Mapping[str, float | None]
    composite_reliability: float | None
    ave: float | None


@dataclass(frozen=True)
class MeasurementResult:
    """The measurement-model stage: report["measurement_model"] (``section``) and each
    scale's loadings, CR and AVE, which the assembly puts into report["constructs"]."""

    section: Mapping[str, Any]
    scales: Mapping[str, ScaleValidity]
    notices: tuple[Notice, ...]


def constructs_section(reliability: ReliabilityResult,
                       measurement: MeasurementResult) -> dict[str, dict[str, Any]]:
    """report["constructs"]: each scale's reliability with the measurement model's loadings,
    composite reliability and AVE merged in (the keys in report.json's order)."""
    out: dict[str, dict[str, Any]] = {}
    for name, s in reliability.scales.items():
        v = measurement.scales.get(name)
        out[name] = {
            "role": s.role,
            "items": list(s.items),
            "reverse": list(s.reverse),
            "n": s.n,
            "alpha": s.alpha,
            "alpha_ci": list(s.alpha_ci) if s.alpha_ci is not None else None,
            "omega": s.omega,
            "composite_reliability": v.composite_reliability if v else None,
            "ave": v.ave if v else None,
            "item_stats": {
                it: {"loading": v.loadings.get(it) if v else None, "item_rest_r": st.item_rest_r,
                     "alpha_if_deleted": st.alpha_if_deleted, "mean": st.mean, "sd": st.sd}
                for it, st in s.item_stats.items()
            },
        }
    return out


# ------------------------------------------------------------------ the later stages' sections

@dataclass(frozen=True)
class SectionResult:
    """A stage whose output is one section of report.json as it stands (``section``,
    read-only; None when the design has nothing for it), with its notices: teams, the
    correction check, the planning advice."""

    section: Any
    notices: tuple[Notice, ...] = ()


@dataclass(frozen=True)
class MethodVarianceResult:
    """The method-variance stage: report["method_variance"] with its verdict, and the
    assumption checks it could already make (``Assumption`` objects, in report order)."""

    section: Mapping[str, Any]
    assumptions: tuple[Any, ...]


@dataclass(frozen=True)
class PathsResult:
    """The paths stage: report["paths"] (one read-only entry per key path), its notices, and
    the assumption check it adds (``estimate_stable``; None without key paths)."""

    paths: tuple[Mapping[str, Any], ...]
    notices: tuple[Notice, ...]
    stability: Any = None


__all__ = ["FitCache", "Notice", "notices", "freeze", "thaw", "ItemReliability", "ScaleReliability",
           "ReliabilityResult", "ScaleValidity", "MeasurementResult", "constructs_section",
           "SectionResult", "MethodVarianceResult", "PathsResult"]
