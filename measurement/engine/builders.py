"""Builders: every model the product fits, made from the study design.

This is the one place that writes model specifications (:class:`~samesource.engine.modelspec.ModelSpec`);
the engine in :mod:`samesource.engine.fitting` fits whatever it is given. Latent variables carry
the construct names; observed variables the item names.

Identification convention: factor variances fixed at 1 and all loadings free, so loadings
are on the standardized-factor scale and latent covariances are correlations.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import replace

from samesource.engine.modelspec import ModelSpec, Param
from samesource.input.design import MAIN, Construct, Design


def _factor(name: str, items: Sequence[str]) -> list[Param]:
    ps = [Param("load", name, it) for it in items]
    ps.append(Param("cov", name, name, free=False, value=1.0))
    return ps


def _errors(items: Sequence[str]) -> list[Param]:
    return [Param("cov", it, it) for it in items]


def _correlate(names: Sequence[str]) -> list[Param]:
    return [Param("cov", a, b) for i, a in enumerate(names) for b in names[i + 1:]]


def single_factor_model(construct: Construct) -> ModelSpec:
    """One construct's items on one factor: the basis of McDonald's omega."""
    items = construct.items
    return ModelSpec(
        name=f"single_factor:{construct.name}",
        observed=tuple(items),
        latent=(construct.name,),
        params=tuple(_factor(construct.name, items) + _errors(items)),
        description=f"one factor for the items of '{construct.name}'",
    )


def measurement_model(design: Design, constructs: Sequence[Construct] | None = None) -> ModelSpec:
    """Confirmatory factor model: each construct a factor, factors freely correlated."""
    cons = list(constructs) if constructs is not None else list(design.constructs.values())
    return _congeneric(cons, "measurement_model")


def _congeneric(cons: Sequence[Construct], name: str) -> ModelSpec:
    items = [it for c in cons for it in c.items]
    params: list[Param] = []
    for c in cons:
        params += _factor(c.name, c.items)
    params += _errors(items)
    params += _correlate([c.name for c in cons])
    return ModelSpec(
        name=name,
        observed=tuple(items),
        latent=tuple(c.name for c in cons),
        params=tuple(params),
        description="every construct a factor of its own items, factors freely correlated",
    )


def tau_equivalent_model(constructs: Sequence[Construct]) -> ModelSpec:
    """Essentially tau-equivalent measurement model (Lord & Novick 1968): within each construct
    every loading fixed at 1, factor variances and covariances free, error variances free.
    Nested in the congeneric :func:`substantive_measurement_model`."""
    cons = list(constructs)
    items = [it for c in cons for it in c.items]
    params: list[Param] = []
    for c in cons:
        params += [Param("load", c.name, it, free=False, value=1.0) for it in c.items]
        params.append(Param("cov", c.name, c.name, value=0.5))
    params += _errors(items) + _correlate([c.name for c in cons])
    return ModelSpec(name="tau_equivalent:" + "+".join(c.name for c in cons), observed=tuple(items),
                     latent=tuple(c.name for c in cons), params=tuple(params),
                     description="equal loadings within each construct, factors freely correlated")


def substantive_measurement_model(constructs: Sequence[Construct]) -> ModelSpec:
    """The congeneric measurement model of the given constructs alone (named apart from the
    design's full measurement model)."""
    return _congeneric(list(constructs), "congeneric:" + "+".join(c.name for c in constructs))


def one_factor_model(items: Sequence[str], name: str = "common") -> ModelSpec:
    """Every item on a single factor: the confirmatory form of Harman's test."""
    return ModelSpec(
        name="one_factor",
        observed=tuple(items),
        latent=(name,),
        params=tuple(_factor(name, items) + _errors(items)),
        description="all items on one common factor",
    )


# --- Common-method models --------------------------------------------------------------

METHOD = "method_factor"  # name of the latent method factor in every method model


def same_source_items(cons) -> list[str]:
    """The items of the constructs (among ``cons``) answered in the main file: the ones a
    shared method of its respondents reaches."""
    return [it for c in cons if c.source == MAIN for it in c.items]


def _trait_params(cons: Sequence[Construct], orthogonal_to: Sequence[str] = ()) -> list[Param]:
    """Trait factors with their loadings and unit variances; pairs are correlated except
    pairs that involve a construct in ``orthogonal_to`` (the marker in marker models)."""
    params: list[Param] = []
    for c in cons:
        params += _factor(c.name, c.items)
    names = [c.name for c in cons]
    for i, a in enumerate(names):
        for b in names[i + 1:]:
            if a in orthogonal_to or b in orthogonal_to:
                continue
            params.append(Param("cov", a, b))
    return params


def method_factor_model(design: Design, *, use_marker: bool, equal_loadings: bool) -> ModelSpec:
    """A latent method factor on every item, orthogonal to the traits (Podsakoff et al. 2003).

    ``use_marker``: the factor also loads on the marker's items and the marker's trait is
    orthogonal to the substantive traits, so the marker identifies the method factor
    ("marker-identified method factor"). Without a marker this is the plain latent method
    factor, which Richardson, Simmering & Sturman (2009) found unreliable.

    ``equal_loadings``: every method loading fixed at 1 with the factor's variance free (one
    parameter: the method variance); otherwise free loadings with the variance fixed at 1.

    The factor loads on the main file's items only: a second source's items (another rater,
    a later wave, records) share no method with them, so their constructs enter as traits and
    the sources' methods are orthogonal (measurement/input/sources.py).
    """
    cons = list(design.substantive)
    marker = design.marker if use_marker else None
    if use_marker and marker is None:
        raise ValueError("the design has no marker construct")
    if marker is not None:
        cons.append(marker)
    items = [it for c in cons for it in c.items]
    shared = same_source_items(cons)
    params = _trait_params(cons, orthogonal_to=[marker.name] if marker else [])
    params += _errors(items)
    if equal_loadings:
        params += [Param("load", METHOD, it, free=False, value=1.0) for it in shared]
        params.append(Param("cov", METHOD, METHOD, value=0.1))
    else:
        params += [Param("load", METHOD, it, value=0.3) for it in shared]
        params.append(Param("cov", METHOD, METHOD, free=False, value=1.0))
    kind = "marker-identified" if marker else "plain latent"
    loads = "equal" if equal_loadings else "free"
    return ModelSpec(
        name=f"method_factor:{'marker' if marker else 'plain'}:{loads}",
        observed=tuple(items),
        latent=tuple(c.name for c in cons) + (METHOD,),
        params=tuple(params),
        description=f"{kind} method factor with {loads} loadings on every item, orthogonal to the traits",
    )


def measured_method_model(design: Design) -> ModelSpec:
    """The measured method construct's factor loads on every substantive item, orthogonal to
    the traits (directly measured latent method factor; Podsakoff et al. 2003)."""
    method = design.method
    if method is None:
        raise ValueError("the design has no method construct")
    cons = list(design.substantive)
    subst_items = [it for c in cons for it in c.items]
    params = _trait_params(cons) + _factor(method.name, method.items)
    params += _errors(subst_items + list(method.items))
    params += [Param("load", method.name, it, value=0.1) for it in same_source_items(cons)]
    return ModelSpec(
        name="measured_method",
        observed=tuple(subst_items + list(method.items)),
        latent=tuple(c.name for c in cons) + (method.name,),
        params=tuple(params),
        description=f"the measured method construct '{method.name}' loads on every substantive item, "
                    "orthogonal to the traits",
    )


def cfa_marker_models(design: Design, marker_loadings: dict[str, float],
                      marker_errors: dict[str, float],
                      fixed_correlations: dict[tuple[str, str], float] | None = None,
                      *, which: str) -> ModelSpec:
    """The CFA marker technique's model sequence (Williams, Hartman & Cavazotte 2010).

    The marker factor's loadings and error variances are fixed at their values in the
    measurement model; the marker is orthogonal to the substantive factors. ``which``:

    - ``"baseline"``: no method loadings (their "Baseline Model").
    - ``"equal"``: the marker factor loads on every substantive item, one common loading
      (their "Method-C").
    - ``"free"``: the same with free loadings ("Method-U").
    - ``"equal_held"`` / ``"free_held"``: "equal" / "free" with the substantive factor
      correlations fixed at ``fixed_correlations`` (the baseline values; "Method-R").
    """
    marker = design.marker
    if marker is None:
        raise ValueError("the design has no marker construct")
    cons = list(design.substantive)
    subst_items = [it for c in cons for it in c.items]
    params: list[Param] = []
    for c in cons:
        params += _factor(c.name, c.items)
    names = [c.name for c in cons]
    held = which.endswith("_held")
    for i, a in enumerate(names):
        for b in names[i + 1:]:
            if held:
                params.append(Param("cov", a, b, free=False, value=fixed_correlations[(a, b)]))
            else:
                params.append(Param("cov", a, b))
    params += [Param("load", marker.name, it, free=False, value=marker_loadings[it]) for it in marker.items]
    params.append(Param("cov", marker.name, marker.name, free=False, value=1.0))
    params += [Param("cov", it, it, free=False, value=marker_errors[it]) for it in marker.items]
    params += _errors(subst_items)
    base = which.removesuffix("_held")
    if base == "equal":
        params += [Param("load", marker.name, it, label="marker_method", value=0.1) for it in subst_items]
    elif base == "free":
        params += [Param("load", marker.name, it, value=0.1) for it in subst_items]
    elif base != "baseline":
        raise ValueError(f"unknown model {which!r}")
    return ModelSpec(
        name=f"cfa_marker:{which}",
        observed=tuple(subst_items + list(marker.items)),
        latent=tuple(names) + (marker.name,),
        params=tuple(params),
        description={
            "baseline": "marker kept apart: fixed marker measurement, no method loadings",
            "equal": "marker loads on every substantive item with one common loading",
            "free": "marker loads on every substantive item with free loadings",
        }[base] + (", substantive correlations held at the baseline values" if held else ""),
    )


# --- Structural models: the key paths ----------------------------------------------------

def path_constructs(design: Design) -> list[str]:
    """Substantive constructs that appear in a path, in design order."""
    named = {p.outcome for p in design.paths} | {x for p in design.paths for x in p.predictors}
    return [c.name for c in design.substantive if c.name in named]


def with_paths(spec: ModelSpec, design: Design, *, name: str | None = None,
               description: str | None = None) -> ModelSpec:
    """Turn a model whose trait factors are freely correlated into the declared path model.

    Each outcome's correlations with other traits are replaced by its regressions on its
    predictors, and its fixed unit variance by a free residual variance; its first loading is
    then fixed at 1 to set its scale (standardized estimates do not depend on that choice).
    Exogenous traits keep unit variances and their correlations.
    """
    outcomes = {p.outcome for p in design.paths}
    traits = {c.name for c in design.substantive}
    first_item: dict[str, str] = {}
    for p in spec.params:
        if p.op == "load" and p.lhs in outcomes and p.lhs not in first_item:
            first_item[p.lhs] = p.rhs
    params: list[Param] = []
    for p in spec.params:
        if p.op == "cov" and p.lhs != p.rhs and {p.lhs, p.rhs} <= traits and (
                p.lhs in outcomes or p.rhs in outcomes):
            continue
        if p.op == "cov" and p.lhs == p.rhs and p.lhs in outcomes:
            params.append(Param("cov", p.lhs, p.lhs, value=0.5))
            continue
        if p.op == "load" and p.lhs in outcomes and first_item.get(p.lhs) == p.rhs and p.free:
            params.append(Param("load", p.lhs, p.rhs, free=False, value=1.0))
            continue
        params.append(p)
    for path in design.paths:
        params += [Param("reg", path.outcome, x, value=0.0) for x in path.predictors]
    params += _linked_residuals(design, outcomes & set(spec.latent))
    return spec.with_params(params, name=name or f"{spec.name}+paths",
                            description=description or f"{spec.description}; with the declared paths")


def _linked_residuals(design: Design, outcomes: set[str]) -> list[Param]:
    """Residual covariances between outcomes that share more than their predictors explain:
    an outcome and its measurement by another source (``same_as``: two views of one thing),
    and two outcomes rated in the same second source (that rater's own method, at the level
    of constructs; the main file's method has its factor). Without sources: none."""
    pairs: list[tuple[str, str]] = []
    names = [n for n in design.constructs if n in outcomes]
    for i, a in enumerate(names):
        for b in names[i + 1:]:
            ca, cb = design.constructs[a], design.constructs[b]
            if ca.same_as == b or cb.same_as == a or (ca.source == cb.source != MAIN):
                pairs.append((a, b))
    return [Param("cov", a, b, value=0.0) for a, b in pairs]


def latent_path_model(design: Design) -> ModelSpec:
    """Full SEM: the path constructs' measurement model with the declared paths."""
    cons = [design.constructs[n] for n in path_constructs(design)]
    return with_paths(measurement_model(design, cons), design, name="latent",
                      description="full structural model: each construct a factor of its items, the declared "
                                  "paths among them")


def score_name(construct: str) -> str:
    return f"{construct}__score"


def single_indicator_model(design: Design, error_variances: dict[str, float], *, name: str,
                           equations: list | None = None) -> ModelSpec:
    """Each construct measured by its scale score with a fixed error variance
    (errors-in-variables; Bollen 1989, ch. 5): latent = score's true part.

    ``error_variances`` maps construct -> (1 - reliability) * var(score). ``equations``
    (default: all declared paths) limits the model to some equations.
    """
    paths = equations if equations is not None else list(design.paths)
    names = [n for n in path_constructs(design)
             if any(n == p.outcome or n in p.predictors for p in paths)]
    outcomes = {p.outcome for p in paths}
    params: list[Param] = []
    for n in names:
        params.append(Param("load", n, score_name(n), free=False, value=1.0))
        params.append(Param("cov", score_name(n), score_name(n), free=False, value=float(error_variances[n])))
        params.append(Param("cov", n, n, value=0.5))
    exo = [n for n in names if n not in outcomes]
    params += _correlate(exo)
    for p in paths:
        params += [Param("reg", p.outcome, x, value=0.0) for x in p.predictors]
    params += _linked_residuals(design, outcomes)
    return ModelSpec(name=name, observed=tuple(score_name(n) for n in names), latent=tuple(names),
                     params=tuple(params),
                     description="scale scores as single indicators with error variances fixed from reliability")


def method_path_model(design: Design, method_spec: ModelSpec) -> ModelSpec:
    """A method-factor model (marker-identified, plain or measured) with the declared paths."""
    return with_paths(method_spec, design, name=f"{method_spec.name}+paths")


def population_model(design: Design, *, method: bool) -> ModelSpec:
    """The correction check's generating model (measurement/corrections/correction_check.py): every
    construct of the design with the declared paths; with ``method``, one method factor with
    equal loadings on the main file's substantive and marker items (the marker's trait
    orthogonal to the substantive traits), on which a method construct's items load freely
    (they measure it). Without ``method``: every construct a factor, no shared method."""
    if not method:
        return with_paths(measurement_model(design), design, name="population:no_method",
                          description="every construct a factor of its items, the declared paths, no shared method")
    marker = design.marker
    cons = list(design.substantive) + ([marker] if marker else [])
    items = [it for c in cons for it in c.items]
    params = _trait_params(cons, orthogonal_to=[marker.name] if marker else [])
    params += _errors(items)
    params += [Param("load", METHOD, it, free=False, value=1.0) for it in same_source_items(cons)]
    params.append(Param("cov", METHOD, METHOD, value=0.1))
    observed = list(items)
    if design.method is not None:
        observed += list(design.method.items)
        params += [Param("load", METHOD, it, value=0.3) for it in design.method.items]
        params += _errors(design.method.items)
    spec = ModelSpec(name="population:method", observed=tuple(observed),
                     latent=tuple(c.name for c in cons) + (METHOD,), params=tuple(params),
                     description="every construct a factor of its items, one shared method with equal loadings "
                                 "on the main file's items")
    return with_paths(spec, design, name="population:method")


def assumed_method_model(design: Design, item_variances: dict[str, float], share: float) -> ModelSpec:
    """The latent path model with a method factor whose loadings are FIXED so that ``share``
    of every item's variance is method (loading sqrt(share * var(item)), factor variance 1,
    orthogonal to the traits): the sensitivity curve's model."""
    base = latent_path_model(design)
    main = set(same_source_items(design.constructs.values()))
    items = [it for it in base.observed if it in main]
    params = list(base.params)
    params += [Param("load", METHOD, it, free=False, value=float((share * item_variances[it]) ** 0.5))
               for it in items]
    params.append(Param("cov", METHOD, METHOD, free=False, value=1.0))
    return ModelSpec(name=f"assumed_method:{share:.3f}", observed=base.observed,
                     latent=base.latent + (METHOD,), params=tuple(params),
                     description=f"latent path model with {share:.0%} of every item's variance fixed as method")


def without_method_factor(spec: ModelSpec) -> ModelSpec:
    """The same model without its method factor. For an equal-loading model (loadings fixed
    at 1, variance free) this is the boundary of its parameter space, method variance 0."""
    return replace(spec, name=spec.name + ":without", description="no method factor",
                   latent=tuple(v for v in spec.latent if v != METHOD),
                   params=tuple(p for p in spec.params if METHOD not in (p.lhs, p.rhs)))


def only_method_variance_negative(fit) -> bool:
    """True when the method variance is negative and every other variance positive: the
    Heywood case sampling error gives when the true method variance is zero."""
    variances = [(p.lhs, float(v)) for p, v in zip(fit.spec.params, fit.values, strict=True)
                 if p.op == "cov" and p.lhs == p.rhs]
    method = [v for name, v in variances if name == METHOD]
    return bool(method and all(v < 0 for v in method) and all(v > 0 for name, v in variances if name != METHOD))
