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

Departures from that model, each off by default (and then absent from the truth and the spec
record, so existing specs reproduce bit for bit):

- ``method_trait_corr``: M correlates with the named exogenous traits (endogenous traits get
  their correlation with M through the paths). M is drawn as ``w' exo + u`` with
  ``w = R^-1 c``, so its correlations with the exogenous traits are exactly ``c``; the error
  variances are ``1 - lam' Phi lam`` so every item still has variance 1.
- ``acquiescence``: a response style ``A`` (standard normal, independent of the traits and of M)
  adds ``acquiescence * A`` to every answer as the respondent gives it, before reverse-keying;
  after an analyst recodes a reverse-keyed item its loading on ``A`` is ``-acquiescence``.
  ``A`` is another shared method factor: it counts in the method share of item variance.
- ``category_probabilities``: the population share of each answer 1..k, in the construct's
  direction (thresholds ``norm.ppf`` of the cumulative shares); a reverse-keyed item, stored
  as ``k + 1 - x``, is skewed the other way as stored and the same way after recoding.
  Gives skewed items; the default is the symmetric rule above.

Named scenarios (:data:`SCENARIOS`, :func:`make_scenario`) put these to use for the study of
the assumptions behind each correction (tests/benchmarks/assumption_study.py): each states its
truth, computed from the generating model and not estimated (:class:`Scenario`).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, field
from typing import Any, Literal, NamedTuple, overload

import numpy as np
import pandas as pd
from scipy.stats import norm

ID_COLUMN = "respondent"
TEAM_COLUMN = "team"
METHOD_FACTOR = "method_factor"
STYLE_FACTOR = "acquiescence"  # the response-style factor, when SurveySpec.acquiescence != 0
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
    # Departures from the base model (module docstring); the defaults leave it unchanged.
    method_trait_corr: dict[str, float] = field(default_factory=dict)  # exogenous trait -> corr with M
    acquiescence: float = 0.0  # loading of every answer, as given (before reverse-keying), on A
    category_probabilities: Sequence[float] | None = None  # share of each answer 1..k; None: symmetric


# Fields added after the first release of the spec record: left out of spec_to_dict at their
# defaults, so the records (and committed truth files) of existing specs do not change.
_OPTIONAL_FIELDS = {"method_trait_corr": {}, "acquiescence": 0.0, "category_probabilities": None}


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
    return _category_probabilities(likert_thresholds(k))


def _category_probabilities(tau: np.ndarray) -> np.ndarray:
    cdf = norm.cdf(tau)
    return np.diff(np.concatenate([[0.0], cdf, [1.0]]))


def spec_thresholds(spec: SurveySpec) -> np.ndarray | None:
    """The cut points a spec's Likert items use (None for continuous items)."""
    k = spec.scale_points
    if not k:
        if spec.category_probabilities is not None:
            raise ValueError("category_probabilities needs scale_points")
        return None
    if spec.category_probabilities is None:
        return likert_thresholds(k)
    p = np.asarray(spec.category_probabilities, dtype=float)
    if p.shape != (k,) or not np.all(np.isfinite(p)) or np.any(p <= 0) or abs(p.sum() - 1) > 1e-9:
        raise ValueError(f"category_probabilities must be {k} positive shares summing to 1, "
                         f"got {list(spec.category_probabilities)}")
    return norm.ppf(np.cumsum(p)[:-1])


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
    lam: np.ndarray  # items x (traits + M [+ A]), construct direction
    theta: np.ndarray  # error variances
    tau: np.ndarray | None = None  # Likert thresholds
    method_cov: np.ndarray | None = None  # corr of each trait with M (None: orthogonal)
    method_weights: np.ndarray | None = None  # M = exo @ w + sqrt(1 - w'Rw) * u
    style: bool = False  # an acquiescence factor A is the last column of lam

    @property
    def factors(self) -> list[str]:
        return self.traits + [METHOD_FACTOR] + ([STYLE_FACTOR] if self.style else [])

    @property
    def phi_full(self) -> np.ndarray:
        p = len(self.traits)
        q = p + 1 + int(self.style)
        out = np.zeros((q, q))
        out[:p, :p] = self.phi
        if self.method_cov is not None:
            out[:p, p] = out[p, :p] = self.method_cov
        out[p:, p:] = np.eye(q - p)
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
    tau = spec_thresholds(spec)
    if not 0.0 <= spec.missing_rate < 1.0:
        raise ValueError(f"missing_rate must be in [0, 1), got {spec.missing_rate}")
    acq = spec.acquiescence
    if not (isinstance(acq, int | float) and math.isfinite(acq) and -1 < acq < 1):
        raise ValueError(f"acquiescence must be a loading in (-1, 1), got {acq}")
    style = acq != 0

    traits = [c.name for c in cons if c.role != "method"]
    items: list[str] = []
    item_construct: list[str] = []
    signs: list[float] = []
    rows: list[np.ndarray] = []
    theta: list[float] = []
    im = len(traits)  # column of M
    nf = len(traits) + 1 + int(style)
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
            err = 1.0 - lv * lv - mv * mv - acq * acq  # (- 0.0 leaves the value bit for bit)
            if err < 0:
                extra = f" and acquiescence {acq}" if style else ""
                raise ValueError(f"{name}: loading {lv} and method loading {mv}{extra} leave a negative "
                                 f"error variance ({err:.4f}); need loading² + method_loading² "
                                 f"{'+ acquiescence² ' if style else ''}<= 1")
            sign = -1.0 if pos in rev else 1.0
            row = np.zeros(nf)
            if c.role == "method":
                row[im] = lv
            else:
                row[traits.index(c.name)] = lv
                row[im] = mv
            if style:  # added to the answer as given: reversed with the item when recoded
                row[-1] = sign * acq
            items.append(name)
            item_construct.append(c.name)
            signs.append(sign)
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

    lam_m = np.array(rows).reshape(len(items), nf)
    theta_v = np.array(theta)
    method_cov = weights = None
    if spec.method_trait_corr:
        c_exo = np.zeros(len(exogenous))
        for t, v in spec.method_trait_corr.items():
            if t not in exogenous:
                raise ValueError(f"method_trait_corr '{t}': give M's correlation with exogenous traits "
                                 f"({', '.join(exogenous)}); endogenous traits get theirs through the paths")
            if not (math.isfinite(v) and -1 < v < 1):
                raise ValueError(f"method_trait_corr '{t}' = {v} is not in (-1, 1)")
            c_exo[exogenous.index(t)] = v
        weights = np.linalg.solve(r, c_exo)
        if float(c_exo @ weights) >= 1 - 1e-9:
            raise ValueError("method_trait_corr with exogenous_corr is not a valid correlation matrix "
                             "(not positive definite)")
        method_cov = np.zeros(p)
        method_cov[ex] = c_exo
        for t in endogenous:  # cov(eta, M) = beta' cov(predictors, M)
            pi = [idx[q] for q in spec.paths[t]]
            method_cov[idx[t]] = float(np.array(list(spec.paths[t].values())) @ method_cov[pi])
    model = _Model(spec=spec, traits=traits, exogenous=exogenous, endogenous=endogenous,
                   residual_var=residual, phi=phi, phi_between=phi_b, exo_corr=r,
                   exo_between=between_exo, icc=icc,
                   items=items, item_construct=item_construct, sign=np.array(signs),
                   lam=lam_m, theta=theta_v, tau=tau, method_cov=method_cov,
                   method_weights=weights, style=style)
    if method_cov is not None:
        # a loading on M now also carries trait variance: keep every item at variance 1
        model.theta = 1.0 - np.einsum("ij,jk,ik->i", lam_m, model.phi_full, lam_m)
        if np.any(model.theta < 0):
            bad_item = items[int(np.argmin(model.theta))]
            raise ValueError(f"{bad_item}: with M correlated with the traits its loadings leave a "
                             f"negative error variance ({model.theta.min():.4f})")
    return model


def _cholesky(m: np.ndarray, message: str) -> np.ndarray:
    try:
        return np.linalg.cholesky(m)
    except np.linalg.LinAlgError:
        raise ValueError(message) from None


# ---- population truth --------------------------------------------------------------------

def _continuous_cov(model: _Model) -> np.ndarray:
    """Item covariance (= correlation) in the construct direction."""
    return model.lam @ model.phi_full @ model.lam.T + np.diag(model.theta)


def _likert_cov(corr: np.ndarray, tau: np.ndarray) -> np.ndarray:
    """Covariance of Likert-coded items given the correlation of their continuous versions.

    Mehler's expansion of the bivariate normal: for a step function f with thresholds tau,
    cov(f(X), f(Y)) = sum_{n>=1} rho^n a_n^2 with a_n = sum_j phi(tau_j) h_{n-1}(tau_j) / sqrt(n),
    h the orthonormal (probabilists') Hermite polynomials.
    """
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
    np.fill_diagonal(out, _likert_variance(tau))
    return out


def _likert_variance(tau: np.ndarray) -> float:
    prob = _category_probabilities(tau)
    v = np.arange(1, len(tau) + 2)
    mean = float(prob @ v)
    return float(prob @ (v - mean) ** 2)


def _item_cov(model: _Model, discrete: bool) -> np.ndarray:
    c = _continuous_cov(model)
    if discrete:
        if model.spec.scale_points is None:
            raise ValueError("discrete=True needs scale_points")
        c = _likert_cov(c, model.tau)
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
    for name, default in _OPTIONAL_FIELDS.items():
        if d[name] == default:
            del d[name]
        elif name == "category_probabilities":
            d[name] = [float(v) for v in d[name]]
    return d


def implied_truth(spec: SurveySpec) -> dict:
    """The population truth of a spec (no simulation); JSON-serializable."""
    model = _build(spec)
    k = spec.scale_points
    cons = spec.constructs
    names = [c.name for c in cons]
    cont = _continuous_cov(model)
    tau = model.tau
    lik = _likert_cov(cont, tau) if k else None
    w = _weights(model)
    # E f'(X) for the Likert coding: by Stein's lemma cov(f(X), Z) = corr(X, Z) * slope.
    slope = float(norm.pdf(tau).sum()) if k else None

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
        if model.style:
            acq_l = [float(model.lam[i, -1]) for i in sel]
            entry["acquiescence_loadings"] = acq_l
            entry["item_acquiescence_share"] = [v * v for v in acq_l]
            entry["acquiescence_share_of_sum"] = sum(acq_l) ** 2 / var_sum
        if lik is not None:
            lv = float(lik[np.ix_(sel, sel)].sum())
            entry["likert"] = {
                "trait_share_of_sum": (slope * sum(trait_l)) ** 2 / lv,
                "method_share_of_sum": (slope * sum(meth_l)) ** 2 / lv,
                "alpha": (n_it / (n_it - 1) * (1 - n_it * _likert_variance(tau) / lv))
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
        sum_lik = _corr(w @ lik @ w.T)
        truth["likert"] = {
            "thresholds": [float(t) for t in tau],
            "category_probabilities": [float(p) for p in _category_probabilities(tau)],
            "item_variance": _likert_variance(tau),
            "rule": f"category centres equally spaced on [-{LIKERT_SPAN}, {LIKERT_SPAN}] SD of the "
                    "continuous item, thresholds midway between centres"
                    if spec.category_probabilities is None else
                    "thresholds at the normal quantiles of the given category shares, in the "
                    "construct's direction",
        }
        truth["sum_score_correlation"]["likert"] = _matrix_dict(sum_lik, names)
        truth["sum_score_paths"]["likert"] = _std_paths(sum_lik, names, spec.paths)
    if model.method_cov is not None:
        truth["method_factor"]["orthogonal_to_traits"] = False
        truth["method_factor"]["correlation_with_traits"] = {
            t: float(v) for t, v in zip(model.traits, model.method_cov, strict=True)}
        truth["model"] += ("; here M correlates with the traits (method_factor.correlation_with_traits) "
                           "and error variances are 1 - lam' Phi lam")
        truth["notes"].append("With M correlated with the traits, omega (sum of trait loadings)^2 / "
                              "var(sum) is no longer the squared correlation of the sum with its trait.")
    if model.style:
        truth["acquiescence"] = {
            "name": STYLE_FACTOR, "variance": 1.0, "loading_as_given": spec.acquiescence,
            "orthogonal_to_traits_and_method": True,
            "rule": "every answer as given gets acquiescence * A before reverse-keying; after recoding, "
                    "a reverse-keyed item loads -acquiescence on A"}
        truth["model"] += "; plus acquiescence * A on every answer as given (before reverse-keying)"
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
    M) and ``method_factor`` (and ``acquiescence`` when the spec has it), row-aligned with the data.
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
    if model.method_weights is not None:
        w = model.method_weights
        m = exo @ w + math.sqrt(1.0 - float(w @ model.exo_corr @ w)) * m
    columns = [traits, m]
    if model.style:
        a = rng.standard_normal(n)
        columns.append(a)
    factors = np.column_stack(columns)
    x = factors @ model.lam.T + rng.standard_normal((n, len(model.items))) * np.sqrt(model.theta)

    k = spec.scale_points
    rev = model.sign < 0
    if k:
        vals = np.searchsorted(model.tau, x, side="right") + 1
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
                           for c in spec.constructs} | {METHOD_FACTOR: m}
                          | ({STYLE_FACTOR: a} if model.style else {}))
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


# ---- named scenarios with known truth (the assumption study) -------------------------------

@dataclass
class Scenario:
    """A named survey population, what it tests, and its truth.

    ``true_paths`` are the standardized paths among the traits, solved exactly from the trait
    covariance the generating model implies (not estimated); ``method_share`` is the true share
    of substantive item variance due to shared method factors (M, and the response style A
    when there is one), the quantity the method checks estimate. ``assumptions_hold`` says
    whether the correction the report should lead with rests on assumptions that hold in this
    population; ``instrument_fails`` whether the design's method instrument (marker or method
    scale) fails to carry the shared method; ``expected`` gives, per assumption id of the
    report, the statuses its check should give here (``method_loadings/equal``: its statuses in
    the samples where the equal-loading method factor was used).
    """

    name: str
    title: str
    tests: str
    spec: SurveySpec
    true_paths: dict[tuple[str, str], float]
    method_share: float
    marker_method_share: float | None
    assumptions_hold: bool
    why: str
    instrument_fails: bool = False
    expected: dict[str, tuple[str, ...]] = field(default_factory=dict)

    def design(self) -> dict:
        return design_for(self.spec)

    def truth(self) -> dict:
        """JSON-ready record of the scenario's truth."""
        return {"name": self.name, "title": self.title, "tests": self.tests, "n": self.spec.n,
                "scale_points": self.spec.scale_points,
                "true_paths": {f"{o} on {p}": v for (o, p), v in self.true_paths.items()},
                "method_share": self.method_share, "marker_method_share": self.marker_method_share,
                "assumptions_hold": self.assumptions_hold, "why": self.why,
                "instrument_fails": self.instrument_fails,
                "expected": {k: list(v) for k, v in self.expected.items()}}


def true_standardized_paths(spec: SurveySpec) -> dict[tuple[str, str], float]:
    """Standardized path of each (outcome, predictor) among the traits, solved from the trait
    covariance the spec implies (with every outcome's declared predictors together)."""
    model = _build(spec)
    out = _std_paths(model.phi, model.traits, spec.paths)
    # rounded at 1e-12 so a true null reads 0, not the solver's 1e-17
    return {(y, x): round(float(v), 12) + 0.0 for y, preds in out.items() for x, v in preds.items()}


def true_method_shares(spec: SurveySpec) -> dict[str, float | None]:
    """Mean share of item variance due to the shared method factors (M and A: their squared
    loadings, both standardized), over the substantive items and over the marker's items."""
    model = _build(spec)
    im = len(model.traits)
    share = np.square(model.lam[:, im:]).sum(axis=1)
    roles = {c.name: c.role for c in spec.constructs}
    role = np.array([roles[c] for c in model.item_construct])
    subst = share[role == "substantive"]
    mark = share[role == "marker"]
    return {"substantive": float(subst.mean()) if subst.size else None,
            "marker": float(mark.mean()) if mark.size else None}


# The base survey of every scenario: support (4 items), engagement (4), intent to stay (3), a
# marker with a trait of its own (3); engagement on support .30, intent on engagement .45 and a
# true null path, intent on support. Trait loadings .70; method loading .35 (share .1225).
TRAIT_LOADING = 0.70
METHOD_LOADING = 0.35
SCENARIO_N = 600
SCENARIO_PATHS = {"eng": {"sup": 0.30}, "sty": {"eng": 0.45, "sup": 0.0}}
# Congeneric method loadings from .10 to .60 (mean square .160 on the substantive items).
CONGENERIC = {"sup": [0.10, 0.25, 0.45, 0.60], "eng": [0.60, 0.45, 0.25, 0.10],
              "sty": [0.10, 0.35, 0.60], "wth": [0.15, 0.35, 0.55]}
# Strongly skewed 5-point answers (a ceiling): skew -1.91, excess kurtosis 3.76 per item.
SKEWED_SHARES = (0.01, 0.03, 0.06, 0.25, 0.65)


def _base(method: dict[str, float | list[float]], *, marker: bool = True, method_scale: bool = False,
          reverse: dict[str, list[int]] | None = None, seed: int = 0, n: int = SCENARIO_N,
          **kw: Any) -> SurveySpec:
    rev = reverse or {}
    lam = TRAIT_LOADING
    cons = [ConstructSpec("sup", 4, lam, method.get("sup", 0.0), reverse=rev.get("sup", ())),
            ConstructSpec("eng", 4, lam, method.get("eng", 0.0), reverse=rev.get("eng", ())),
            ConstructSpec("sty", 3, lam, method.get("sty", 0.0), reverse=rev.get("sty", ()))]
    if marker:
        cons.append(ConstructSpec("wth", 3, lam, method.get("wth", 0.0), role="marker"))
    if method_scale:
        cons.append(ConstructSpec("imp", 4, lam, role="method"))
    return SurveySpec(constructs=cons, paths={k: dict(v) for k, v in SCENARIO_PATHS.items()}, n=n,
                      scale_points=kw.pop("scale_points", None), seed=seed, **kw)


def _equal(m: float, *, marker: float | None = None) -> dict[str, float | list[float]]:
    return {"sup": m, "eng": m, "sty": m, "wth": m if marker is None else marker}


class _Entry(NamedTuple):
    title: str
    tests: str
    make: Callable[[int, int], SurveySpec]  # (seed, n) -> spec
    assumptions_hold: bool
    why: str
    instrument_fails: bool
    expected: dict[str, tuple[str, ...]]
    n: int = SCENARIO_N


def _scenario_table() -> dict[str, _Entry]:
    m = METHOD_LOADING
    return {
        "clean": _Entry(
            "Clean survey, no method variance",
            "false alarms: the verdict should say none (or minor at most 5% of the time)",
            lambda seed, n: _base(_equal(0.0), seed=seed, n=n),
            True, "no method variance at all: every correction is correctly specified", False, {}),
        "baseline": _Entry(
            "The model's assumptions hold",
            "accuracy where everything the marker-identified method factor assumes is true",
            lambda seed, n: _base(_equal(m), seed=seed, n=n),
            True, "the marker carries the method, equal method loadings, M orthogonal to the traits",
            False, {}),
        "marker_without_method": _Entry(
            "A marker without the shared method",
            "a marker that finds nothing although the substantive items share method variance",
            lambda seed, n: _base(_equal(m, marker=0.0), seed=seed, n=n),
            False, "the marker's items carry none of the method the substantive items share",
            True, {"marker_carries_method": ("fails", "untestable")}),
        "congeneric": _Entry(
            "Congeneric method loadings (.10 to .60)",
            "method loadings that differ by item: the equal-loading factor understates them",
            lambda seed, n: _base(CONGENERIC, seed=seed, n=n),
            True, "holds for a free-loading method factor (the equal-loading one is misspecified)",
            False, {"method_loadings": ("holds",)}),
        "method_trait_corr": _Entry(
            "Method correlated .30 with a trait",
            "the untestable orthogonality of method and traits: M correlates .30 with support",
            lambda seed, n: _base(_equal(m), seed=seed, n=n, method_trait_corr={"sup": 0.30}),
            False, "M correlates with support (and through the paths with engagement and intent)",
            False, {"method_orthogonal": ("untestable", "doubtful", "fails")}),
        "skewed": _Entry(
            "Strongly skewed 5-point items",
            "normal-theory ML on discrete, skewed answers (skew -1.9, excess kurtosis 3.8)",
            lambda seed, n: _base(_equal(m), seed=seed, n=n, scale_points=5,
                                  category_probabilities=SKEWED_SHARES),
            False, "the items are 5-point and strongly skewed, not continuous and normal; the rest "
                   "of the model holds (robust standard errors should keep the coverage)",
            False, {"items_continuous": ("doubtful", "fails")}),
        "n150": _Entry(
            "Baseline with 150 respondents",
            "small-sample accuracy and coverage where the assumptions hold",
            lambda seed, n: _base(_equal(m), seed=seed, n=n),
            True, "as the baseline, at n = 150", False, {}, n=150),
        "measured_method": _Entry(
            "A measured method scale, no marker",
            "correction by a method scale (4 items, loading .70 on M) that measures the shared method",
            lambda seed, n: _base(_equal(m), marker=False, method_scale=True, seed=seed, n=n),
            True, "the method scale measures exactly the method the substantive items share", False, {}),
        "acquiescence": _Entry(
            "Acquiescence with reverse-keyed items",
            "a response style added to every answer before reverse-keying: after recoding, method "
            "loadings are +.35 on positively and -.35 on reverse-keyed items",
            lambda seed, n: _base(_equal(0.0), seed=seed, n=n, acquiescence=m,
                                  reverse={"sup": [2, 4], "eng": [2, 4], "sty": [3]}),
            False, "the method loadings' sign follows the keying: equal loadings fail (a free-loading factor "
                   "can follow the signs), and the marker (all positively keyed) carries the style with one "
                   "sign only",
            False, {"method_loadings/equal": ("doubtful", "fails")}),
    }


SCENARIOS: tuple[str, ...] = tuple(_scenario_table())


def make_scenario(name: str, seed: int = 0, n: int | None = None) -> Scenario:
    """The named scenario (see :data:`SCENARIOS`) for one sample: its spec and its truth."""
    table = _scenario_table()
    if name not in table:
        raise ValueError(f"unknown scenario {name!r}; use one of {', '.join(table)}")
    e = table[name]
    spec = e.make(seed, e.n if n is None else n)
    shares = true_method_shares(spec)
    return Scenario(name=name, title=e.title, tests=e.tests, spec=spec,
                    true_paths=true_standardized_paths(spec),
                    method_share=float(shares["substantive"] or 0.0),
                    marker_method_share=shares["marker"], assumptions_hold=e.assumptions_hold,
                    why=e.why, instrument_fails=e.instrument_fails, expected=dict(e.expected))
