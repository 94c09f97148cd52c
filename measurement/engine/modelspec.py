"""A structural equation model described as data: what the fitting engine fits.

Every parameter is explicit (no hidden defaults in the engine): builders in
:mod:`samesource.engine.builders` declare each loading, regression, variance and covariance.
The engine (:mod:`samesource.engine.fitting`) turns a spec into RAM matrices (McArdle &
McDonald 1984): ``Sigma = F (I - A)^-1 S (I - A)^-T F'``.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Literal

Op = Literal["load", "reg", "cov"]


@dataclass(frozen=True)
class Param:
    """One parameter of a model.

    - ``op="load"``: latent ``lhs`` -> observed ``rhs`` (a factor loading; A[rhs, lhs]).
    - ``op="reg"``: predictor ``rhs`` -> outcome ``lhs`` (a regression; A[lhs, rhs]).
    - ``op="cov"``: covariance of ``lhs`` and ``rhs``; a variance when they are equal (S).

    ``free=False`` fixes it at ``value``; for a free parameter ``value`` is an optional
    start. Free parameters that share a ``label`` are one parameter (an equality).
    """

    op: Op
    lhs: str
    rhs: str
    free: bool = True
    value: float | None = None
    label: str | None = None

    @property
    def key(self) -> tuple[str, str, str]:
        return (self.op, self.lhs, self.rhs)


@dataclass(frozen=True)
class ModelSpec:
    """A model: observed variables (in covariance-matrix order), latents and parameters."""

    name: str
    observed: tuple[str, ...]
    latent: tuple[str, ...]
    params: tuple[Param, ...]
    description: str = ""
    meta: dict = field(default_factory=dict, compare=False)

    def __post_init__(self) -> None:
        names = set(self.observed) | set(self.latent)
        if len(names) != len(self.observed) + len(self.latent):
            raise ValueError(f"{self.name}: a name is both observed and latent, or repeated")
        seen = set()
        for p in self.params:
            for v in (p.lhs, p.rhs):
                if v not in names:
                    raise ValueError(f"{self.name}: parameter {p.key} names unknown variable '{v}'")
            if p.op == "load" and (p.lhs not in self.latent or p.rhs not in self.observed):
                raise ValueError(f"{self.name}: a loading goes from a latent to an observed variable: {p.key}")
            k = p.key if p.op != "cov" else ("cov",) + tuple(sorted((p.lhs, p.rhs)))
            if k in seen:
                raise ValueError(f"{self.name}: parameter {p.key} declared twice")
            seen.add(k)
            if not p.free and p.value is None:
                raise ValueError(f"{self.name}: fixed parameter {p.key} needs a value")

    def find(self, op: Op, lhs: str, rhs: str) -> Param | None:
        for p in self.params:
            if p.op == op and p.lhs == lhs and p.rhs == rhs:
                return p
            if op == "cov" and p.op == "cov" and p.lhs == rhs and p.rhs == lhs:
                return p
        return None

    def with_params(self, params: list[Param] | tuple[Param, ...], *, name: str | None = None,
                    description: str | None = None) -> ModelSpec:
        return replace(self, params=tuple(params), name=name or self.name,
                       description=self.description if description is None else description)
