"""Simulated survey items from a latent model whose truth is known exactly.

Used for the bundled sample survey and by tests that check estimators against known values.

The model
---------
- Every construct with role ``"substantive"`` or ``"marker"`` has its own trait, standardized
  (variance 1). Traits that are no path's outcome are exogenous; their correlations are
  ``exogenous_corr`` (0 when not given). An endogenous trait is
  ``eta = sum(beta_p * trait_p) + zeta`` with the residual variance of ``zeta`` chosen so
  ``var(eta) = 1``: the coefficients are standardized path coefficients.
- One common method factor ``M`` (variance 1), orthogonal to every trait. A construct with role
  ``"method"`` (a measured method scale) measures ``M`` itself: its ``loading`` is the loading on
  ``M``, its true score is ``M`` and its ``method_loading`` must stay 0.
- Continuous item (in the construct's direction): ``x = loading * trait + method_loading * M + e``
  with ``var(e) = 1 - loading**2 - method_loading**2``, so every item has variance 1.
- Likert items (``scale_points = k``): the continuous item is cut at fixed thresholds. Category
  centres are equally spaced on [-1.8, 1.8] standard deviations and the thresholds lie midway
  between neighbouring centres, which gives a symmetric, bell-shaped answer distribution (for
  k = 7: 6.7%, 11.7%, 19.8%, 23.6%, 19.8%, 11.7%, 6.7%). Every item has the same thresholds.
- Reverse-keyed items are stored as ``k + 1 - x`` (continuous items: ``-x``); loadings in the
  truth always describe the item after an analyst recodes it.
- Teams: each exogenous trait is ``sqrt(icc) * U_team + W_person``. The team effects correlate
  like the traits (``exogenous_corr``); the person-level parts take the rest of the covariance,
  so the total correlations are exactly ``exogenous_corr``. Endogenous traits are built from the
  total exogenous traits with person-level residuals, so the between-team and the
  within-team parts follow the same (unstandardized) path coefficients; their standardized
  values at each level and the implied ICC of every trait are in the truth. Team sizes are
  Poisson around ``n / n_teams`` (over-dispersed by a gamma multiplier when
  ``team_size_dispersion > 0``), at least 2 each, adjusted to sum to ``n``.
- Missing cells are MCAR, independently per item cell, drawn after everything else (so the
  same seed gives the same answers with and without missing values).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field
from typing import Any, Literal, overload

import numpy as np
import pandas as pd
from scipy.stats import norm

ID_COLUMN = "respondent"
TEAM_COLUMN = "team"
METHOD_FACTOR = "method_factor"
ROLES = ("substantive", "marker", "method")
LIKERT_SPAN = 1.8  # outermost category centres, in standard deviations of the continuous item
_HERMITE_TERMS = 400  # Mehler-series terms for Likert item covariances (|r| <= .97 converges)


@dataclass
class ConstructSpec:
    """One scale: ``n_items`` items loading on the construct's trait and on the method factor."""

    name: str
    n_items: int
    loading: float | list[float]  # standardized trait loadings (role "method": loadings on M)
    method_loading: float | list[float] = 0.0  # loading on the common method factor M
    reverse: Sequence[int] = ()  # 1-based item positions stored reverse-keyed
    role: str = "substantive"
    prefix: str | None = None  # item name prefix (default: name[:3])

    def item_names(self) -> list[str]:
        p = self.prefix if self.prefix is not None else self.name[:3]
        return [f"{p}{i}" for i in range(1, self.n_items + 1)]

    def loadings(self) -> list[float]:
        return _per_item(self.loading, self.n_items, f"{self.name}.loading")

    def method_loadings(self) -> list[float]:
        return _per_item(self.method_loading, self.n_items, f"{self.name}.method_loading")


@dataclass
class SurveySpec:
    """A whole questionnaire: constructs, structural paths, sample and response format."""

    constructs: list[ConstructSpec]
    paths: dict[str, dict[str, float]] = field(default_factory=dict)  # outcome -> {pred: beta}
    exogenous_corr: dict[tuple[str, str], float] = field(default_factory=dict)
    n: int = 1000
    scale_points: int | None = 5  # None = continuous items, else 1..k by fixed thresholds
    missing_rate: float = 0.0  # MCAR share of item cells
    missing_code: float | None = None  # write missing cells as this code instead of blank
    n_teams: int = 0  # 0 = no team column
    team_icc: dict[str, float] = field(default_factory=dict)  # exogenous traits only
    team_size_dispersion: float = 0.0  # coefficient of variation of the expected team size
    seed: int = 0


def _per_item(value: float | Sequence[float], k: int, where: str) -> list[float]:
    if isinstance(value, int | float):
        out = [float(value)] * k
    else:
        out = [float(v) for v in value]
        if len(out) != k:
            raise ValueError(f"{where}: {len(out)} values for {k} items")
    if not all(math.isfinite(v) for v in out):
        raise ValueError(f"{where}: loadings must be finite numbers")
    return out


def likert_thresholds(k: int) -> np.ndarray:
    """Cut points on the standardized continuous item for a 1..k response scale.

    Category centres are equally spaced on [-LIKERT_SPAN, LIKERT_SPAN]; thresholds lie midway.
    """
    if k < 2:
        raise ValueError(f"scale_points must be at least 2, got {k}")
    j = np.arange(1, k)
    # Rounded so the recorded cut points read cleanly (-0.3, not -0.30000000000000004).
    return np.round(-LIKERT_SPAN + LIKERT_SPAN * (2 * j - 1) / (k - 1), 12)


def likert_category_probabilities(k: int) -> np.ndarray:
    """Population share of each answer 1..k (the same for every item: items are N(0, 1))."""
    cdf = norm.cdf(likert_thresholds(k))
    return np.diff(np.concatenate([[0.0], cdf, [1.0]]))


@dataclass
class _Model:
    """A validated spec with everything the population truth and the sampler need."""

    spec: SurveySpec
    traits: list[str]  # constructs with a trait of their own, in spec order
    exogenous: list[str]
    endogenous: list[str]  # topological order: predictors before outcomes
    residual_var: dict[str, float]
    phi: np.ndarray  # covariance (= correlation) of the traits
    phi_between: np.ndarray  # between-team part of the trait covariance
    exo_corr: np.ndarray
    exo_between: np.ndarray  # between-team covariance of the exogenous traits
    icc: np.ndarray  # specified ICC per exogenous trait
    items: list[str]
    item_construct: list[str]
    sign: np.ndarray  # -1 for reverse-keyed items
    lam: np.ndarray  # items x (traits + M), construct direction
    theta: np.ndarray  # error variances

    @property
    def factors(self) -> list[str]:
        return self.traits + [METHOD_FACTOR]

    @property
    def phi_full(self) -> np.ndarray:
        p = len(self.traits)
        out = np.zeros((p + 1, p + 1))
        out[:p, :p] = self.phi
        out[p, p] = 1.0
        return out


def _build(spec: SurveySpec) -> _Model:
    cons = list(spec.constructs)
    if not cons:
        raise ValueError("a survey needs at least one construct")
    names = [c.name for c in cons]
    if len(set(names)) != len(names):
        raise ValueError("construct names must be unique")
    if METHOD_FACTOR in names:
        raise ValueError(f"'{METHOD_FACTOR}' is reserved for the method factor")
    if not isinstance(spec.n, int) or spec.n < 2:
        raise ValueError(f"n must be an integer of at least 2, got {spec.n}")
    if spec.scale_points is not None:
        likert_thresholds(spec.scale_points)
    if not 0.0 <= spec.missing_rate < 1.0:
        raise ValueError(f"missing_rate must be in [0, 1), got {spec.missing_rate}")

    traits = [c.name for c in cons if c.role != "method"]
    items: list[str] = []
    item_construct: list[str] = []
    signs: list[float] = []
    rows: list[np.ndarray] = []
    theta: list[float] = []
    nf = len(traits) + 1
    for c in cons:
        if c.role not in ROLES:
            raise ValueError(f"{c.name}: unknown role {c.role!r}; use one of {', '.join(ROLES)}")
        if c.n_items < 1:
            raise ValueError(f"{c.name}: needs at least one item")
        lam, mload = c.loadings(), c.method_loadings()
        if c.role == "method" and any(m != 0 for m in mload):
            raise ValueError(f"{c.name}: a method scale measures M itself; give its loadings on M "
                             "as 'loading' and leave method_loading at 0")
        rev = list(c.reverse)
        bad = [r for r in rev if not (isinstance(r, int | np.integer) and 1 <= r <= c.n_items)]
        if bad or len(set(rev)) != len(rev):
            raise ValueError(f"{c.name}: reverse positions must be distinct integers in 1..{c.n_items}")
        for pos, (name, lv, mv) in enumerate(zip(c.item_names(), lam, mload, strict=True), 1):
            err = 1.0 - lv * lv - mv * mv
            if err < 0:
                raise ValueError(f"{name}: loading {lv} and method loading {mv} leave a negative "
                                 f"error variance ({err:.4f}); need loading² + method_loading² <= 1")
            row = np.zeros(nf)
            if c.role == "method":
                row[-1] = lv
            else:
                row[traits.index(c.name)] = lv
                row[-1] = mv
            items.append(name)
            item_construct.append(c.name)
            signs.append(-1.0 if pos in rev else 1.0)
            rows.append(row)
            theta.append(err)
    if len(set(items)) != len(items):
        dup = sorted({i for i in items if items.count(i) > 1})[0]
        raise ValueError(f"item name '{dup}' is used twice; give the constructs distinct prefixes")
    if (spec.n_teams and TEAM_COLUMN in items) or ID_COLUMN in items:
        raise ValueError(f"item names must differ from '{ID_COLUMN}' and '{TEAM_COLUMN}'")

    # Paths: validate, order predictors before outcomes.
    for out, preds in spec.paths.items():
        if out not in traits:
            raise ValueError(f"path outcome '{out}' is not a construct with its own trait")
        if not preds:
            raise ValueError(f"path outcome '{out}' has no predictors")
        for p, b in preds.items():
            if p not in traits:
                raise ValueError(f"predictor '{p}' of '{out}' is not a construct with its own trait")
            if p == out:
                raise ValueError(f"'{out}' cannot predict itself")
            if not math.isfinite(b):
                raise ValueError(f"path {out} <- {p} must be a finite number")
    exogenous = [t for t in traits if t not in spec.paths]
    endogenous: list[str] = []
    pending = [t for t in traits if t in spec.paths]
    while pending:
        ready = [t for t in pending if all(p in exogenous or p in endogenous for p in spec.paths[t])]
        if not ready:
            raise ValueError("the paths form a cycle among " + ", ".join(pending))
        endogenous.append(ready[0])
        pending.remove(ready[0])

    idx = {t: i for i, t in enumerate(traits)}
    ex = [idx[t] for t in exogenous]
    r = np.eye(len(exogenous))
    seen: set[frozenset[str]] = set()
    for (a, b), v in spec.exogenous_corr.items():
        if a not in exogenous or b not in exogenous or a == b:
            raise ValueError(f"exogenous_corr ({a}, {b}): both must be distinct exogenous traits "
                             f"({', '.join(exogenous)})")
        if frozenset((a, b)) in seen:
            raise ValueError(f"exogenous_corr gives ({a}, {b}) twice")
        seen.add(frozenset((a, b)))
        if not -1 < v < 1:
            raise ValueError(f"exogenous_corr ({a}, {b}) = {v} is not in (-1, 1)")
        i, j = exogenous.index(a), exogenous.index(b)
        r[i, j] = r[j, i] = v
    _cholesky(r, "exogenous_corr is not a valid correlation matrix (not positive definite)")

    if spec.n_teams < 0 or (spec.n_teams and spec.n < 2 * spec.n_teams):
        raise ValueError(f"n_teams={spec.n_teams}: every team needs at least 2 of the n={spec.n}")
    if spec.team_size_dispersion < 0:
        raise ValueError("team_size_dispersion must be >= 0")
    icc = np.zeros(len(exogenous))
    for t, v in spec.team_icc.items():
        if t not in exogenous:
            raise ValueError(f"team_icc '{t}': set ICCs on exogenous traits ({', '.join(exogenous)}); "
                             "endogenous traits inherit theirs through the paths")
        if not 0 <= v < 1:
            raise ValueError(f"team_icc '{t}' = {v} is not in [0, 1)")
        if v > 0 and not spec.n_teams:
            raise ValueError("team_icc needs n_teams > 0")
        icc[exogenous.index(t)] = v
    d = np.sqrt(icc)
    between_exo = r * np.outer(d, d)
    np.fill_diagonal(between_exo, icc)  # exact, not sqrt(icc)**2
    _cholesky(r - between_exo, "with these ICCs the person-level covariance of the exogenous traits "
              "is not positive definite; use closer ICCs or weaker correlations")

    p = len(traits)
    phi = np.zeros((p, p))
    phi_b = np.zeros((p, p))
    phi[np.ix_(ex, ex)] = r
    phi_b[np.ix_(ex, ex)] = between_exo
    done = list(ex)
    residual: dict[str, float] = {}
    for t in endogenous:
        j = idx[t]
        pi = [idx[q] for q in spec.paths[t]]
        beta = np.array(list(spec.paths[t].values()))
        explained = float(beta @ phi[np.ix_(pi, pi)] @ beta)
        if explained > 1 + 1e-12:
            raise ValueError(f"the paths into '{t}' explain {explained:.3f} of its variance (> 1)")
        residual[t] = max(0.0, 1.0 - explained)
        for m in (phi, phi_b):
            m[j, done] = m[done, j] = beta @ m[np.ix_(pi, done)]
        phi[j, j] = 1.0
        phi_b[j, j] = float(beta @ phi_b[np.ix_(pi, pi)] @ beta)
        done.append(j)

    return _Model(spec=spec, traits=traits, exogenous=exogenous, endogenous=endogenous,
                  residual_var=residual, phi=phi, phi_between=phi_b, exo_corr=r,
                  exo_between=between_exo, icc=icc,
                  items=items, item_construct=item_construct, sign=np.array(signs),
                  lam=np.array(rows).reshape(len(items), nf), theta=np.array(theta))


def _cholesky(m: np.ndarray, message: str) -> np.ndarray:
    try:
        return np.linalg.cholesky(m)
    except np.linalg.LinAlgError:
        raise ValueError(message) from None


# ---- population truth --------------------------------------------------------------------

def _continuous_cov(model: _Model) -> np.ndarray:
    """Item covariance (= correlation) in the construct direction."""
    return model.lam @ model.phi_full @ model.lam.T + np.diag(model.theta)


def _likert_cov(corr: np.ndarray, k: int) -> np.ndarray:
    """Covariance of Likert-coded items given the correlation of their continuous versions.

    Mehler's expansion of the bivariate normal: for a step function f with thresholds tau,
    cov(f(X), f(Y)) = sum_{n>=1} rho^n a_n^2 with a_n = sum_j phi(tau_j) h_{n-1}(tau_j) / sqrt(n),
    h the orthonormal (probabilists') Hermite polynomials.
    """
    tau = likert_thresholds(k)
    dens = norm.pdf(tau)
    h_prev, h = np.zeros_like(tau), np.ones_like(tau)
    a2 = np.empty(_HERMITE_TERMS)
    for n in range(1, _HERMITE_TERMS + 1):
        a2[n - 1] = float(dens @ h) ** 2 / n
        h_prev, h = h, (tau * h - math.sqrt(n - 1) * h_prev) / math.sqrt(n)
    out = np.zeros_like(corr)
    power = np.ones_like(corr)
    for n in range(_HERMITE_TERMS):
        power = power * corr
        out += power * a2[n]
    np.fill_diagonal(out, _likert_variance(k))
    return out


def _likert_variance(k: int) -> float:
    prob = likert_category_probabilities(k)
    v = np.arange(1, k + 1)
    mean = float(prob @ v)
    return float(prob @ (v - mean) ** 2)


def _item_cov(model: _Model, discrete: bool) -> np.ndarray:
    c = _continuous_cov(model)
    if discrete:
        if model.spec.scale_points is None:
            raise ValueError("discrete=True needs scale_points")
        c = _likert_cov(c, model.spec.scale_points)
    return c


def population_item_correlation(spec: SurveySpec, *, discrete: bool = False,
                                as_stored: bool = True) -> pd.DataFrame:
    """Implied population correlation of the items.

    ``discrete=False``: the continuous items; ``discrete=True``: the Likert-coded items (exact
    for the fixed thresholds, via Mehler's expansion). ``as_stored=True`` gives reverse-keyed
    items as stored (negative correlations with their scale); False, after recoding.
    """
    model = _build(spec)
    c = _item_cov(model, discrete)
    sd = np.sqrt(np.diag(c))
    r = c / np.outer(sd, sd)
    if as_stored:
        r = r * np.outer(model.sign, model.sign)
    return pd.DataFrame(r, index=model.items, columns=model.items)


def _weights(model: _Model) -> np.ndarray:
    names = [c.name for c in model.spec.constructs]
    w = np.zeros((len(names), len(model.items)))
    for i, c in enumerate(model.item_construct):
        w[names.index(c), i] = 1.0
    return w


def _std_paths(cov: np.ndarray, names: list[str], paths: dict[str, dict[str, float]]) -> dict:
    """Standardized regression coefficients implied by a covariance matrix (None if degenerate)."""
    out: dict[str, dict[str, float | None]] = {}
    for y, preds in paths.items():
        pi = [names.index(p) for p in preds]
        j = names.index(y)
        sd = np.sqrt(np.diag(cov))
        # Undefined when a level has no variance in a predictor or its predictors are
        # collinear (e.g. between teams, when only one exogenous trait varies by team).
        if sd[j] <= 1e-12 or np.any(sd[pi] <= 1e-12) or np.linalg.eigvalsh(
                _corr(cov[np.ix_(pi, pi)])).min() < 1e-9:
            out[y] = {p: None for p in preds}
            continue
        b = np.linalg.solve(cov[np.ix_(pi, pi)], cov[pi, j])
        out[y] = {p: float(b[i] * sd[pi[i]] / sd[j]) for i, p in enumerate(preds)}
    return out


def _matrix_dict(m: np.ndarray, names: list[str]) -> dict[str, dict[str, float | None]]:
    return {a: {b: float(m[i, j]) if math.isfinite(m[i, j]) else None
                for j, b in enumerate(names)} for i, a in enumerate(names)}


def _corr(c: np.ndarray) -> np.ndarray:
    """Correlations from a covariance matrix; NaN where a variable has no variance."""
    sd = np.sqrt(np.clip(np.diag(c), 0.0, None))
    with np.errstate(invalid="ignore", divide="ignore"):
        r = c / np.outer(sd, sd)
    ok = sd > 1e-12
    r[~(ok[:, None] & ok[None, :])] = np.nan
    return r


def spec_to_dict(spec: SurveySpec) -> dict:
    """A JSON-serializable record of the spec (exogenous_corr keys as "a|b")."""
    d = asdict(spec)
    d["exogenous_corr"] = {f"{a}|{b}": float(v) for (a, b), v in spec.exogenous_corr.items()}
    for c in d["constructs"]:
        c["reverse"] = list(c["reverse"])
    return d


def implied_truth(spec: SurveySpec) -> dict:
    """The population truth of a spec (no simulation); JSON-serializable."""
    model = _build(spec)
    k = spec.scale_points
    cons = spec.constructs
    names = [c.name for c in cons]
    cont = _continuous_cov(model)
    lik = _likert_cov(cont, k) if k else None
    w = _weights(model)
    # E f'(X) for the Likert coding: by Stein's lemma cov(f(X), Z) = corr(X, Z) * slope.
    slope = float(norm.pdf(likert_thresholds(k)).sum()) if k else None

    constructs: dict[str, Any] = {}
    for ci, c in enumerate(cons):
        sel = np.flatnonzero(w[ci])
        lam, mload = c.loadings(), c.method_loadings()
        if c.role == "method":  # its trait is M
            trait_l, meth_l = lam, lam
        else:
            trait_l, meth_l = lam, mload
        var_sum = float(cont[np.ix_(sel, sel)].sum())
        n_it = len(sel)
        entry: dict[str, Any] = {
            "role": c.role,
            "items": c.item_names(),
            "loadings": lam,
            "method_loadings": mload,
            "reverse": [c.item_names()[r - 1] for r in c.reverse],
            "error_variances": [float(model.theta[i]) for i in sel],
            "item_method_share": [float(v * v) for v in meth_l],
            "true_score": METHOD_FACTOR if c.role == "method" else c.name,
            "omega": sum(trait_l) ** 2 / var_sum,
            "method_share_of_sum": sum(meth_l) ** 2 / var_sum,
            "alpha": (n_it / (n_it - 1) * (1 - n_it / var_sum)) if n_it > 1 else None,
            "ave": float(np.mean(np.square(trait_l))),
        }
        if c.role != "method":
            entry["omega_with_method"] = (sum(trait_l) ** 2 + sum(meth_l) ** 2) / var_sum
        if lik is not None:
            lv = float(lik[np.ix_(sel, sel)].sum())
            entry["likert"] = {
                "trait_share_of_sum": (slope * sum(trait_l)) ** 2 / lv,
                "method_share_of_sum": (slope * sum(meth_l)) ** 2 / lv,
                "alpha": (n_it / (n_it - 1) * (1 - n_it * _likert_variance(k) / lv))
                if n_it > 1 else None,
            }
        constructs[c.name] = entry

    # True scores: traits, and M for a method scale.
    ts_index = [model.factors.index(c.name if c.role != "method" else METHOD_FACTOR) for c in cons]
    ts = model.phi_full[np.ix_(ts_index, ts_index)]
    np.fill_diagonal(ts, 1.0)
    sum_cont = _corr(w @ cont @ w.T)
    truth: dict[str, Any] = {
        "model": ("continuous item = loading * trait + method_loading * M + error; traits and M "
                  "standardized, M orthogonal to every trait; a method scale's trait is M"),
        "n": spec.n,
        "seed": spec.seed,
        "scale_points": k,
        "constructs": constructs,
        "paths": {y: dict(p) for y, p in spec.paths.items()},
        "residual_variances": dict(model.residual_var),
        "r_squared": {t: 1.0 - v for t, v in model.residual_var.items()},
        "exogenous": list(model.exogenous),
        "exogenous_corr": {f"{a}|{b}": float(model.exo_corr[i, j])
                           for i, a in enumerate(model.exogenous)
                           for j, b in enumerate(model.exogenous) if i < j},
        "true_score_correlation": _matrix_dict(ts, names),
        "sum_score_correlation": {"continuous": _matrix_dict(sum_cont, names)},
        "sum_score_paths": {"continuous": _std_paths(sum_cont, names, spec.paths)},
        "method_factor": {"name": METHOD_FACTOR, "variance": 1.0, "orthogonal_to_traits": True},
        "missing": {"rate": spec.missing_rate, "code": spec.missing_code, "mechanism": "MCAR"},
        "notes": [
            "omega, method_share_of_sum and alpha are population values for the unit-weighted sum "
            "of the continuous items (reverse-keyed items recoded): omega = (sum of trait "
            "loadings)^2 / var(sum) = squared correlation of the sum with the trait; "
            "method_share_of_sum = (sum of method loadings)^2 / var(sum).",
            "Likert coding loses information: the 'likert' entries give the same shares for the "
            "sum of the coded items (squared correlation with the trait and with M, exact for the "
            "fixed thresholds); they are a little lower than the continuous values.",
            "item_method_share is the share of each item's variance due to M (method_loading^2; "
            "for a method scale, loading^2).",
            "sum_score_paths are the population values of standardized OLS paths on scale sums: "
            "what an analysis that ignores unreliability and method variance estimates.",
        ],
    }
    if k:
        tau = likert_thresholds(k)
        sum_lik = _corr(w @ lik @ w.T)
        truth["likert"] = {
            "thresholds": [float(t) for t in tau],
            "category_probabilities": [float(p) for p in likert_category_probabilities(k)],
            "item_variance": _likert_variance(k),
            "rule": f"category centres equally spaced on [-{LIKERT_SPAN}, {LIKERT_SPAN}] SD of the "
                    "continuous item, thresholds midway between centres",
        }
        truth["sum_score_correlation"]["likert"] = _matrix_dict(sum_lik, names)
        truth["sum_score_paths"]["likert"] = _std_paths(sum_lik, names, spec.paths)
    if spec.n_teams:
        pb = model.phi_between
        pw = model.phi - pb
        truth["teams"] = {
            "n_teams": spec.n_teams,
            "team_icc": dict(spec.team_icc),
            "implied_icc": {t: float(pb[i, i]) for i, t in enumerate(model.traits)},
            # null for a trait without team-level variance
            "between_correlation": _matrix_dict(_corr(pb), model.traits),
            "within_correlation": _matrix_dict(_corr(pw), model.traits),
            "between_standardized_paths": _std_paths(pb, model.traits, spec.paths),
            "within_standardized_paths": _std_paths(pw, model.traits, spec.paths),
            "note": "team effects on exogenous traits only; endogenous traits get theirs through "
                    "the paths, so unstandardized paths are the same between and within teams "
                    "(standardized paths are null where a level's predictors are collinear or "
                    "constant). "
                    "Scale scores have lower ICCs than traits: item error and M vary within teams.",
        }
    truth["spec"] = spec_to_dict(spec)
    return truth


# ---- sampling -----------------------------------------------------------------------------

def _team_sizes(rng: np.random.Generator, n: int, j: int, dispersion: float) -> np.ndarray:
    mean = n / j
    if dispersion > 0:
        shape = 1.0 / dispersion**2
        expected = rng.gamma(shape, mean / shape, size=j)
    else:
        expected = np.full(j, mean)
    sizes = np.maximum(rng.poisson(expected), 2)
    diff = n - int(sizes.sum())
    # Spread the difference in proportion to team size, keeping every team at 2 or more.
    while diff != 0:
        if diff > 0:
            sizes += rng.multinomial(diff, sizes / sizes.sum())
            diff = 0
        else:
            can = np.flatnonzero(sizes > 2)
            take = min(-diff, can.size)
            pick = rng.choice(can, size=take, replace=False, p=sizes[can] / sizes[can].sum())
            sizes[pick] -= 1
            diff += take
    return sizes


@overload
def simulate_survey(spec: SurveySpec, *,
                    return_latent: Literal[False] = False) -> tuple[pd.DataFrame, dict]: ...


@overload
def simulate_survey(spec: SurveySpec, *,
                    return_latent: Literal[True]) -> tuple[pd.DataFrame, dict, pd.DataFrame]: ...


def simulate_survey(spec: SurveySpec, *, return_latent: bool = False
                    ) -> tuple[pd.DataFrame, dict] | tuple[pd.DataFrame, dict, pd.DataFrame]:
    """Simulate one survey: (data, truth[, latent scores]).

    Data columns: ``respondent`` (R00001...), ``team`` when ``n_teams > 0`` (T001...), then the
    items in construct order. ``latent`` holds each construct's true score (a method scale's is
    M) and ``method_factor``, row-aligned with the data.
    """
    model = _build(spec)
    truth = implied_truth(spec)
    rng = np.random.default_rng(spec.seed)
    n, p = spec.n, len(model.exogenous)
    idx = {t: i for i, t in enumerate(model.traits)}

    team_of = None
    if spec.n_teams:
        sizes = _team_sizes(rng, n, spec.n_teams, spec.team_size_dispersion)
        team_of = rng.permutation(np.repeat(np.arange(spec.n_teams), sizes))
        between = (rng.standard_normal((spec.n_teams, p)) @ np.linalg.cholesky(model.exo_corr).T
                   * np.sqrt(model.icc))
        within = np.linalg.cholesky(model.exo_corr - model.exo_between)
        exo = between[team_of] + rng.standard_normal((n, p)) @ within.T
    else:
        exo = rng.standard_normal((n, p)) @ np.linalg.cholesky(model.exo_corr).T

    traits = np.zeros((n, len(model.traits)))
    for i, t in enumerate(model.exogenous):
        traits[:, idx[t]] = exo[:, i]
    for t in model.endogenous:
        eta = sum(b * traits[:, idx[q]] for q, b in spec.paths[t].items())
        traits[:, idx[t]] = eta + math.sqrt(model.residual_var[t]) * rng.standard_normal(n)
    m = rng.standard_normal(n)
    factors = np.column_stack([traits, m])
    x = factors @ model.lam.T + rng.standard_normal((n, len(model.items))) * np.sqrt(model.theta)

    k = spec.scale_points
    rev = model.sign < 0
    if k:
        vals = np.searchsorted(likert_thresholds(k), x, side="right") + 1
        vals[:, rev] = k + 1 - vals[:, rev]
    else:
        vals = x * model.sign

    missing = (rng.random(vals.shape) < spec.missing_rate) if spec.missing_rate > 0 else None

    width = max(5, len(str(n)))
    data: dict[str, Any] = {ID_COLUMN: [f"R{i:0{width}d}" for i in range(1, n + 1)]}
    if team_of is not None:
        tw = max(3, len(str(spec.n_teams)))
        labels = np.array([f"T{i:0{tw}d}" for i in range(1, spec.n_teams + 1)])
        data[TEAM_COLUMN] = labels[team_of].tolist()
    code = spec.missing_code
    for i, item in enumerate(model.items):
        col = vals[:, i]
        if missing is None:
            data[item] = col
        elif code is None:
            data[item] = (pd.arrays.IntegerArray(col.astype(np.int64), missing[:, i].copy()) if k
                          else np.where(missing[:, i], np.nan, col))
        else:
            integral = bool(k) and float(code).is_integer()
            filled = np.where(missing[:, i], code, col)
            data[item] = filled.astype(np.int64) if integral else filled.astype(float)
    df = pd.DataFrame(data)

    n_cells = n * len(model.items)
    n_missing = int(missing.sum()) if missing is not None else 0
    truth["sample"] = {
        "rows": n,
        "item_cells": n_cells,
        "missing_cells": n_missing,
        "missing_share": n_missing / n_cells,
    }
    if team_of is not None:
        counts = np.bincount(team_of, minlength=spec.n_teams)
        truth["sample"]["team_sizes"] = {str(lab): int(c) for lab, c in zip(labels, counts,
                                                                            strict=True)}
    if not return_latent:
        return df, truth
    latent = pd.DataFrame({c.name: m if c.role == "method" else traits[:, idx[c.name]]
                           for c in spec.constructs} | {METHOD_FACTOR: m})
    return df, truth, latent


def design_for(spec: SurveySpec, *, scale: bool = True) -> dict:
    """The study design (our JSON format) that matches a simulated survey: constructs with
    their items, roles and reverse-keyed items, the spec's paths, and the response scale."""
    constructs = {}
    for c in spec.constructs:
        names = c.item_names()
        entry: dict[str, Any] = {"items": names}
        if c.reverse:
            entry["reverse"] = [names[i - 1] for i in c.reverse]
        if c.role != "substantive":
            entry["role"] = c.role
        constructs[c.name] = entry
    design: dict[str, Any] = {
        "constructs": constructs,
        "paths": [{"outcome": o, "predictors": list(p)} for o, p in spec.paths.items()],
        "id_column": ID_COLUMN,
    }
    if scale and spec.scale_points:
        design["response_scale"] = {"min": 1, "max": spec.scale_points}
    if spec.missing_code is not None:
        design["missing_codes"] = [spec.missing_code]
    if spec.n_teams:
        design["group_column"] = TEAM_COLUMN
    return design
