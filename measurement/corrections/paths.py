"""Every key path re-estimated under each correction, side by side.

Each estimate is the standardized coefficient of a predictor in its outcome's equation
with all the outcome's declared predictors. One :class:`PathEstimator` computes every
estimate from the items' rows, so the same code serves the full sample (with analytic
standard errors) and each bootstrap replicate (warm-started refits, no standard errors).

The rows are read a block at a time (:class:`~samesource.input.rows.ItemRows`), never held
as one n x p array: the models take the items' moments (complete rows) or their per-pattern
sums (FIML), the scale scores' moments are accumulated per block, and the robust SEs read
the items' or the scores' blocks again (:class:`ScoreRows` forms a block's scores from its
items' block).
"""

from __future__ import annotations

import dataclasses
import math
import warnings
from collections.abc import Callable, Iterator, Sequence
from typing import Any

import numpy as np
from scipy import stats

from samesource.engine.builders import (
    latent_path_model,
    measured_method_model,
    method_factor_model,
    method_path_model,
    only_method_variance_negative,
    path_constructs,
    score_name,
    single_factor_model,
    single_indicator_model,
    without_method_factor,
)
from samesource.engine.chunked_moments import MomentSums, PatternSums, chunked_moments, pattern_sums
from samesource.engine.fiml import PatternData
from samesource.engine.fitting import FitResult, Moments, fit_model, refit
from samesource.engine.robust_se import PairMoments, as_rows, pair_moments, robust_se
from samesource.input.design import MAIN, Design, Path
from samesource.input.rows import BLOCK_ROWS, ItemRows
from samesource.method_checks.marker import choose_r_m, r_m_source
from samesource.statistics.reliability import alpha_from_cov, omega_total

Key = tuple[str, str, str]  # (method, outcome, predictor)


def standardized_coefficients(corr: np.ndarray, outcome: int, predictors: list[int]) -> np.ndarray:
    """Standardized regression coefficients from a correlation matrix: beta = R_xx^-1 r_xy."""
    rxx = corr[np.ix_(predictors, predictors)]
    rxy = corr[predictors, outcome]
    return np.linalg.solve(rxx, rxy)


def disattenuate(corr: np.ndarray, reliability: np.ndarray) -> np.ndarray:
    """Spearman (1904): r_ij / sqrt(rel_i rel_j) off the diagonal, 1 on it."""
    d = np.sqrt(np.asarray(reliability, dtype=float))
    out = corr / np.outer(d, d)
    np.fill_diagonal(out, 1.0)
    return out


def marker_adjust(corr: np.ndarray, r_m: float, same: np.ndarray | None = None) -> np.ndarray:
    """Lindell & Whitney (2001): (r - r_M) / (1 - r_M) off the diagonal; with ``same`` (a
    boolean matrix), only where it is True: pairs from different sources share no method."""
    out = (corr - r_m) / (1.0 - r_m)
    if same is not None:
        out = np.where(same, out, corr)
    np.fill_diagonal(out, 1.0)
    return out


def _pd(m: np.ndarray) -> bool:
    return bool(np.all(np.linalg.eigvalsh(m) > 1e-10))


@dataclasses.dataclass
class Estimate:
    estimate: float | None
    se: float | None = None
    note: str = ""
    status: str = "ok"
    se_robust: float | None = None   # sandwich SE (full sample only; None where no rows back the model)


class PathEstimator:
    """Computes every path estimate from an item matrix (columns = ``self.items``).

    Picklable, so bootstrap replicates can run in other processes; it carries the
    full-sample fits as warm starts.
    """

    def __init__(self, design: Design, *, use_method_factor: str | None, method_loadings: str,
                 use_measured: bool, r_m_rule: str = "smallest", time_limit: float = 60.0,
                 n_starts: int = 4, seed: int = 0):
        self.design = design
        self.paths: list[Path] = list(design.paths)
        self.path_names = path_constructs(design)
        subst = [c.name for c in design.substantive]
        self.score_names = subst + ([design.marker.name] if design.marker else [])
        keep = set(self.path_names) | ({design.marker.name} if design.marker else set()) | (
            {design.method.name} if design.method else set())
        self.reduced = dataclasses.replace(
            design, constructs={k: v for k, v in design.constructs.items() if k in keep})
        self.items = list(design.items)
        self.col = {it: i for i, it in enumerate(self.items)}
        self.use_method_factor = use_method_factor  # "marker" | "plain" | None
        self.method_loadings = method_loadings
        self.use_measured = use_measured
        self.r_m_rule = r_m_rule
        self.time_limit, self.n_starts, self.seed = time_limit, n_starts, seed
        self.warm: dict[str, FitResult] = {}
        self.r_m_index: int | None = None  # which marker correlation gave the full sample's r_M
        self.notes: list[str] = []
        self.keys: list[Key] = [(m, p.outcome, x) for m in METHODS for p in self.paths for x in p.predictors]

    # -- building blocks ------------------------------------------------------------------
    def _fit(self, spec, data, compute_se: bool) -> FitResult:
        prev = self.warm.get(spec.name)
        if compute_se or prev is None:  # the full sample: several starts, standard errors
            return fit_model(spec, data, time_limit=self.time_limit, n_starts=self.n_starts, seed=self.seed,
                             compute_se=compute_se, start=prev)
        if prev.status != "ok":
            return prev  # not used on the full sample, so not in the replicates either
        # A replicate is refitted once from the full-sample solution, within a budget scaled
        # to that fit; one that does not come back proper counts as failed (fragile free
        # method loadings, say) rather than being chased through more starts.
        return refit(prev, data, **self._budget(prev))

    def _budget(self, prev: FitResult) -> dict:
        # The budget is counted in scoring steps, so a replicate's result does not depend on
        # how busy the machine is (seconds did: a seeded bootstrap differed between a quiet
        # and a loaded run); the time limit stays, far looser, only as a guard against hangs.
        return {"max_iter": max(50, 3 * prev.iterations),
                "time_limit": min(self.time_limit, max(5.0, 30 * prev.elapsed))}

    def _item_data(self, rows: ItemRows, moments: Moments | None = None
                   ) -> tuple[Moments | PatternData, np.ndarray]:
        """Model input for the items, and the item covariance for closed-form statistics
        (``moments``: the items' moments on these complete rows, formed once elsewhere).
        One pass over the rows otherwise: their per-pattern sums, which are the moments when
        every row is complete and FIML's input when not (the covariance is then
        ``np.ma.cov``'s: available-case means, pairwise-complete cross-products)."""
        if moments is not None:
            return Moments(names=tuple(self.items), cov=moments.cov, n=moments.n), moments.cov
        patterns = pattern_sums(X for _, X in rows.blocks(self.items))
        if len(patterns) == 1 and patterns[0].observed.all():
            s = patterns[0].sums
            cov = s.cross / s.n
            return Moments(names=tuple(self.items), cov=cov, n=s.n), cov
        return (PatternData(names=tuple(self.items), patterns=tuple(patterns)),
                available_case_cov(patterns, len(self.items)))

    def _scores(self, rows: ItemRows) -> tuple[np.ndarray, int, ItemRows | None]:
        """The scale scores' covariance (divisor n) and count over the rows where every score
        is defined, and those scores as rows (formed a block at a time from the items)."""
        scores = ScoreRows(rows, [score_name(c) for c in self.score_names],
                           [self.design.constructs[c].items for c in self.score_names])
        total = MomentSums.of(np.empty((0, len(self.score_names))))
        for _, S in scores.blocks():
            total = total.merged(MomentSums.of(S))
        scores.count = total.n
        return total.cross / total.n, total.n, scores

    # -- the estimates ------------------------------------------------------------------------
    def estimate(self, rows: ItemRows | np.ndarray, *, compute_se: bool = True,
                 moments: Moments | None = None) -> tuple[dict[Key, Estimate], dict]:
        """Every correction's estimate of every key path (CORRECTIONS, in order) from the items'
        ``rows`` (ItemRows holding ``self.items``, or an array with those columns), and what
        the report needs beside them (the fits, alpha, omega, r_M). ``moments``: the items'
        moments on these rows when they are complete, if formed already (the full sample's,
        from the missing-data plan), so they are not formed again."""
        run = self._prepare(rows, compute_se, moments)
        for correction in CORRECTIONS:
            correction.estimate(self, run)
        return run.out, run.extra

    def _prepare(self, rows: ItemRows | np.ndarray, compute_se: bool, moments: Moments | None = None) -> _Run:
        """What every correction reads: the item and score moments and each scale's alpha and omega."""
        if isinstance(rows, np.ndarray):
            rows = as_rows(rows, self.items)
        fits: dict[str, FitResult] = {}
        data, icov = self._item_data(rows, moments)
        scov, n_s, srows = self._scores(rows)
        sd = np.sqrt(np.diag(scov))

        # reliabilities: alpha from the item covariance, omega from each one-factor model
        alpha, omega = {}, {}
        for c in self.path_names:
            idx = [self.col[i] for i in self.design.constructs[c].items]
            sub = icov[np.ix_(idx, idx)]
            if np.isnan(sub).any():  # a pair never answered together: the rows complete on the scale
                its = list(self.design.constructs[c].items)
                sub = chunked_moments((X for _, X in rows.blocks(its)), its).cov
            alpha[c] = alpha_from_cov(sub)
            con = self.design.constructs[c]
            if len(con.items) >= 3:
                f = self._fit(single_factor_model(con), data, compute_se=False)
                fits[f.spec.name] = f
                if f.status == "ok":
                    omega[c] = omega_total([f.est("load", c, i) for i in con.items],
                                           [f.est("cov", i, i) for i in con.items])
            if omega.get(c) is None:
                omega[c] = alpha[c]  # two items: omega is not identified alone
        sidx = {c: i for i, c in enumerate(self.score_names)}
        return _Run(
            rows=rows, compute_se=compute_se, data=data, scorr=scov / np.outer(sd, sd), sidx=sidx, n_s=n_s,
            score_moments=Moments(names=tuple(score_name(c) for c in self.score_names), cov=scov, n=n_s),
            var={c: scov[sidx[c], sidx[c]] for c in self.score_names}, alpha=alpha, omega=omega,
            score_rows=srows, item_rows=rows if isinstance(rows, ItemRows) else None,
            out={}, fits=fits, extra={"fits": fits, "alpha": alpha, "omega": omega})

    def _single(self, run: _Run, name: str, errors: dict[str, float], eq: list[Path] | None,
                moments: Moments) -> FitResult:
        spec = single_indicator_model(self.reduced, errors, name=name, equations=eq)
        f = self._fit(spec, moments, run.compute_se)
        run.fits[spec.name] = f
        return f

    def _robust(self, run: _Run, f: FitResult, rows: ItemRows | None):
        # the sandwich needs the rows the model was fitted to (not e.g. marker-adjusted moments)
        if rows is None or f.spec.name in run.robust_cache:
            return run.robust_cache.get(f.spec.name)
        pm = self._pair_moments(run, rows) if f.means is None else None
        if pm is not None and not set(f.spec.observed) <= set(pm.names):
            pm = None
        run.robust_cache[f.spec.name] = r = robust_se(f, pm if pm is not None else rows)
        return r

    def _pair_moments(self, run: _Run, rows: ItemRows) -> PairMoments | None:
        """The fourth-order moments every ML sandwich on these rows takes its meat from,
        formed once per set of rows over the columns the models use (the reduced design's
        items, or the scale scores); None when a cell is missing (the scores need the rows)."""
        key = tuple(rows.names)
        if key not in run.pair_cache:
            used = set(self.reduced.items) | {score_name(c) for c in self.score_names}
            try:
                run.pair_cache[key] = pair_moments(rows, [n for n in rows.names if n in used])
            except ValueError:  # a missing cell
                run.pair_cache[key] = None
        return run.pair_cache[key]

    def _from_fit(self, run: _Run, method: str, f: FitResult, eq: Path,
                  formula: dict[str, float] | None = None, rows: ItemRows | None = None) -> None:
        """``method``'s estimates of ``eq``'s paths: the fit's standardized coefficients (or
        ``formula``'s values), with the fit's standard errors."""
        for x in eq.predictors:
            if f.status not in ("ok",) and formula is None:
                run.out[(method, eq.outcome, x)] = Estimate(None, note=f"model status {f.status}", status=f.status)
                continue
            est = formula[x] if formula is not None else f.std("reg", eq.outcome, x)
            se = f.std_se("reg", eq.outcome, x) if run.compute_se and f.status == "ok" else None
            se_r = None
            if se is not None and rows is not None:
                r = self._robust(run, f, rows)
                se_r = None if r is None else r.std_se_of("reg", eq.outcome, x)
                se_r = se_r if se_r is not None and math.isfinite(se_r) else None
            run.out[(method, eq.outcome, x)] = Estimate(est, se, status=f.status, se_robust=se_r)

    def _spearman(self, run: _Run, method: str, corr: np.ndarray, rel: dict[str, float | None],
                  moments: Moments, errors_scale: dict[str, float], rows: ItemRows | None = None) -> None:
        """``method``'s estimates from correlations disattenuated with ``rel`` (Spearman 1904);
        standard errors from the single-indicator model with those reliabilities."""
        pn = self.path_names
        if any(rel[c] is None or rel[c] <= 0 for c in pn):
            for eq in self.paths:
                for x in eq.predictors:
                    run.out[(method, eq.outcome, x)] = Estimate(None, note="reliability not available",
                                                                status="undefined")
            return
        pos = [run.sidx[c] for c in pn]
        rc = disattenuate(corr[np.ix_(pos, pos)], np.array([rel[c] for c in pn]))
        local = {c: i for i, c in enumerate(pn)}
        for k, eq in enumerate(self.paths):
            sub = [local[eq.outcome]] + [local[x] for x in eq.predictors]
            if not _pd(rc[np.ix_(sub, sub)]):
                for x in eq.predictors:
                    run.out[(method, eq.outcome, x)] = Estimate(
                        None, note="the corrected correlations are not a valid correlation matrix "
                                   "(a corrected correlation above 1)", status="undefined")
                continue
            beta = standardized_coefficients(rc, local[eq.outcome], [local[x] for x in eq.predictors])
            formula = dict(zip(eq.predictors, map(float, beta), strict=True))
            f = self._single(run, f"{method}:{k}", {c: (1 - rel[c]) * errors_scale[c] for c in pn}, [eq],
                             moments) if run.compute_se else None
            if f is None:
                for x in eq.predictors:
                    run.out[(method, eq.outcome, x)] = Estimate(formula[x])
            else:
                self._from_fit(run, method, f, eq, formula, rows)

    def _method_factor_fit(self, data, compute_se: bool) -> FitResult:
        def spec(loadings: str):
            return method_path_model(self.reduced, method_factor_model(
                self.reduced, use_marker=self.use_method_factor == "marker",
                equal_loadings=loadings == "equal"))

        s = spec(self.method_loadings)
        at_zero = self.warm.get(without_method_factor(s).name)
        if not compute_se and s.name not in self.warm and at_zero is not None:
            # the full sample's method variance sat at its boundary: re-estimate it from there
            f = fit_model(s, data, time_limit=self._budget(at_zero)["time_limit"], n_starts=1, compute_se=False,
                          start=at_zero)
        else:
            f = self._fit(s, data, compute_se)
        if f.status == "improper" and only_method_variance_negative(f):
            # A negative method variance is what sampling error gives when the true one is zero;
            # the ML estimate within the parameter space is then its boundary, variance 0: the
            # same model without the method factor (Self & Liang 1987 on estimates at a boundary).
            return self._boundary_fit(f, data, compute_se)
        if compute_se and f.status != "ok" and self.method_loadings == "free":
            # Free loadings that were proper in the measurement part can turn improper once
            # the paths replace the trait correlations: fall back to equal loadings.
            g = self._fit(spec("equal"), data, compute_se)
            if g.status == "ok":
                self.method_loadings = "equal"
                self.notes.append("The free-loading method factor was improper in the path model; the "
                                  "equal-loading method factor was used for the corrected paths.")
                return g
        return f

    def _boundary_fit(self, f: FitResult, data, compute_se: bool) -> FitResult:
        """``f`` refitted without its method factor (method variance zero), started from ``f``."""
        spec = without_method_factor(f.spec)
        prev = self.warm.get(spec.name)
        if not compute_se and prev is not None and prev.status == "ok":
            return refit(prev, data, **self._budget(prev))
        g = fit_model(spec, data, time_limit=self.time_limit if compute_se else self._budget(f)["time_limit"],
                      n_starts=self.n_starts if compute_se else 1,
                      seed=self.seed, compute_se=compute_se, start=f)
        if compute_se and g.status == "ok":
            self.notes.append("The method variance was estimated below zero, which is what sampling error gives "
                              "when there is none; the method-factor estimate is taken at its lower limit, zero "
                              "(the same model without the method factor).")
        return g

    def _absent(self, out: dict, method: str, why: str) -> None:
        for eq in self.paths:
            for x in eq.predictors:
                out[(method, eq.outcome, x)] = Estimate(None, note=why, status="absent")

    def vector(self, est: dict[Key, Estimate]) -> np.ndarray:
        return np.array([np.nan if est[k].estimate is None else est[k].estimate for k in self.keys])

    def __call__(self, data: np.ndarray | ItemRows, idx: np.ndarray) -> np.ndarray:
        """Bootstrap statistic: every estimate on the rows ``data[idx]`` (ItemRows: the rows
        drawn, read a block at a time from ``data``)."""
        rows = data[idx] if isinstance(data, np.ndarray) else ResampledRows(data, idx)
        est, _ = self.estimate(rows, compute_se=False)
        return self.vector(est)


class ScoreRows(ItemRows):
    """Scale scores (the mean of each scale's answered items) as rows, formed a block at a
    time from the items' rows; rows where a score is undefined (a scale without any answer)
    are left out. ``count``: the number of rows, once a pass has counted them."""

    def __init__(self, items: ItemRows, names: Sequence[str], scales: Sequence[Sequence[str]],
                 count: int | None = None) -> None:
        self.items = items
        self.names = tuple(names)
        self.scales = [list(s) for s in scales]
        self.count = count
        self._columns = list(dict.fromkeys(i for s in self.scales for i in s))
        pos = {it: k for k, it in enumerate(self._columns)}
        self._cols = [[pos[i] for i in s] for s in self.scales]

    def __len__(self) -> int:
        if self.count is None:
            self.count = sum(len(S) for _, S in self.blocks())
        return self.count

    @property
    def labels(self) -> np.ndarray:
        out = [lab[self._defined(X)] for (_, X), lab in
               zip(self.items.blocks(self._columns), _label_blocks(self.items), strict=True)]
        return np.concatenate(out) if out else np.zeros(0, dtype=np.int64)

    def _all_scores(self, X: np.ndarray) -> np.ndarray:
        if not np.isnan(X).any():  # every item answered: the sum over the count, as nanmean forms it
            return np.column_stack([X[:, c].sum(axis=1) / len(c) for c in self._cols])
        with np.errstate(invalid="ignore"), warnings.catch_warnings():
            # a row without any answer to a scale (a second source without a row for it) has no score
            warnings.simplefilter("ignore", RuntimeWarning)
            return np.column_stack([np.nanmean(X[:, c], axis=1) for c in self._cols])

    def _defined(self, X: np.ndarray) -> np.ndarray:
        return ~np.isnan(self._all_scores(X)).any(axis=1)

    def blocks(self, columns=None, *, size=BLOCK_ROWS):
        idx = None if columns is None or list(columns) == list(self.names) else self._index(columns)
        at = 0
        for _, X in self.items.blocks(self._columns, size=size):
            S = self._all_scores(X)
            S = S[~np.isnan(S).any(axis=1)]
            if len(S):
                yield at, S if idx is None else S[:, idx]
                at += len(S)

    def select(self, keep):
        raise NotImplementedError("scale-score rows are not selected; select the items' rows")


def _label_blocks(rows: ItemRows) -> Iterator[np.ndarray]:
    labels = rows.labels
    for start, X in rows.blocks(rows.names[:1]):
        yield labels[start:start + len(X)]


class ResampledRows(ItemRows):
    """The rows ``idx`` of ``rows`` (drawn with replacement: a bootstrap replicate), read a
    block of ``rows`` at a time with each row repeated as often as it was drawn (rows in
    their stored order: a statistic of the rows does not depend on their order)."""

    def __init__(self, rows: ItemRows, idx: np.ndarray) -> None:
        self.rows = rows
        self.names = rows.names
        self.counts = np.bincount(np.asarray(idx, dtype=np.intp), minlength=len(rows))

    def __len__(self) -> int:
        return int(self.counts.sum())

    @property
    def labels(self) -> np.ndarray:
        return np.repeat(self.rows.labels, self.counts)

    def blocks(self, columns=None, *, size=BLOCK_ROWS):
        at = 0
        for start, X in self.rows.blocks(columns, size=size):
            Y = np.repeat(X, self.counts[start:start + len(X)], axis=0)
            if len(Y):
                yield at, Y
                at += len(Y)

    def select(self, keep):
        raise NotImplementedError("a replicate's rows are not selected")


def available_case_cov(patterns: Sequence[PatternSums], p: int) -> np.ndarray:
    """``np.ma.cov(masked rows, rowvar=False, bias=True)`` from the rows' per-pattern sums:
    each variable centred at its available-case mean, each pair's cross-products summed over
    the rows that answered both and divided by their number (NaN for a pair never answered
    together)."""
    count = np.zeros(p)
    total = np.zeros(p)
    for ps in patterns:
        o = np.flatnonzero(ps.observed)
        count[o] += ps.n
        total[o] += ps.total
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = total / count
    cross = np.zeros((p, p))
    pairs = np.zeros((p, p))
    for ps in patterns:
        o = np.flatnonzero(ps.observed)
        s = ps.sums   # formed on each use when the pattern holds its rows: once here
        d = s.mean - mean[o]
        cross[np.ix_(o, o)] += s.cross + s.n * np.outer(d, d)
        pairs[np.ix_(o, o)] += s.n
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(pairs > 0, cross / np.where(pairs > 0, pairs, 1.0), np.nan)



# --------------------------------------------------------------------------- the corrections

@dataclasses.dataclass
class _Run:
    """One call of :meth:`PathEstimator.estimate`: what every correction reads, and where it
    writes its estimates (``out``), its fits and the extras the report needs."""

    rows: Any                             # the items' rows (ItemRows; a replicate's moments under weights)
    compute_se: bool
    data: Moments | PatternData           # the items, for the models
    scorr: np.ndarray                     # scale-score correlations (score_names order)
    sidx: dict[str, int]
    n_s: int
    score_moments: Moments
    var: dict[str, float]                 # scale-score variances
    alpha: dict[str, float | None]
    omega: dict[str, float | None]
    score_rows: ItemRows | None           # the scale scores' rows, for robust SEs (None: no rows)
    item_rows: ItemRows | None
    out: dict[Key, Estimate]
    fits: dict[str, FitResult]
    extra: dict[str, Any]
    robust_cache: dict[str, Any] = dataclasses.field(default_factory=dict)
    pair_cache: dict[tuple[str, ...], PairMoments | None] = dataclasses.field(default_factory=dict)


@dataclasses.dataclass(frozen=True)
class Correction:
    """One estimate of a key path: ``name`` is its METHOD key in report.json, ``label`` its
    name in words (tables, report.html), ``note`` what it corrects and assumes (each
    estimate's note), ``assumptions`` the ids of the assumption checks that may name it in
    their ``affects`` (method_checks/assumptions.py decides, per survey, which do), and ``estimate(estimator, run)`` writes
    its estimate of every key path into ``run.out``. ``preference``: its places in the order
    the report picks its leading estimate from, as (rank, method-factor kind or None, why).
    Adding a correction: DEVELOPERS.md."""

    name: str
    label: str
    note: str
    assumptions: tuple[str, ...]
    estimate: Callable[[PathEstimator, _Run], None]
    preference: tuple[tuple[int, str | None, str], ...] = ()


def _observed(est: PathEstimator, run: _Run) -> None:
    # each equation by OLS on the scale scores (single indicators without error)
    for k, eq in enumerate(est.paths):
        f = est._single(run, f"observed:{k}", {c: 0.0 for c in est.path_names}, [eq], run.score_moments)
        est._from_fit(run, "observed", f, eq, rows=run.score_rows)


def _disattenuated(est: PathEstimator, run: _Run) -> None:
    est._spearman(run, "disattenuated", run.scorr, run.alpha, run.score_moments, run.var, run.score_rows)


def _disattenuated_omega(est: PathEstimator, run: _Run) -> None:
    est._spearman(run, "disattenuated_omega", run.scorr, run.omega, run.score_moments, run.var, run.score_rows)


def _errors_in_variables(est: PathEstimator, run: _Run) -> None:
    f = est._single(run, "errors_in_variables", {c: (1 - run.omega[c]) * run.var[c] for c in est.path_names},
                    None, run.score_moments)
    for eq in est.paths:
        est._from_fit(run, "errors_in_variables", f, eq, rows=run.score_rows)


def _latent(est: PathEstimator, run: _Run) -> None:
    f = est._fit(latent_path_model(est.reduced), run.data, run.compute_se)
    run.fits[f.spec.name] = f
    for eq in est.paths:
        est._from_fit(run, "latent", f, eq, rows=run.item_rows)


def _marker_adjusted(est: PathEstimator, run: _Run) -> None:
    # r_M from the marker's correlations with every substantive scale
    design = est.design
    if design.marker is None:
        est._absent(run.out, "marker_adjusted", "the design has no marker construct")
        return
    m = run.sidx[design.marker.name]
    # the marker shares the main file's method only: r_M from the main file's scales
    rs = [run.scorr[m, run.sidx[c]] for c in est.score_names
          if c != design.marker.name and design.source_of(c) == MAIN]
    if run.compute_se or est.r_m_index is None:  # the full sample chooses the source scale
        est.r_m_index = r_m_source(rs, est.r_m_rule)
    r_m = choose_r_m(rs, run.n_s, est.r_m_rule, index=est.r_m_index)
    run.extra["r_m"] = r_m
    src = np.array([design.source_of(c) for c in est.score_names])
    adj = marker_adjust(run.scorr, r_m, src[:, None] == src[None, :])
    est._spearman(run, "marker_adjusted", adj, run.alpha,
                  Moments(names=run.score_moments.names, cov=adj, n=run.n_s), {c: 1.0 for c in est.path_names})


def _method_factor_adjusted(est: PathEstimator, run: _Run) -> None:
    if not est.use_method_factor:
        est._absent(run.out, "method_factor_adjusted", "no method factor passed its identification checks")
        return
    f = est._method_factor_fit(run.data, run.compute_se)
    run.fits[f.spec.name] = f
    run.extra["method_factor_fit"] = f
    for eq in est.paths:
        est._from_fit(run, "method_factor_adjusted", f, eq, rows=run.item_rows)


def _measured_method_adjusted(est: PathEstimator, run: _Run) -> None:
    if not est.use_measured:
        why = "the design has no method construct" if est.design.method is None else \
            "the measured-method model did not fit cleanly"
        est._absent(run.out, "measured_method_adjusted", why)
        return
    spec = method_path_model(est.reduced, measured_method_model(est.reduced))
    f = est._fit(spec, run.data, run.compute_se)
    run.fits[f.spec.name] = f
    run.extra["measured_method_fit"] = f
    for eq in est.paths:
        est._from_fit(run, "measured_method_adjusted", f, eq, rows=run.item_rows)


# Every estimate of a key path, in the order they are computed and reported.
CORRECTIONS: tuple[Correction, ...] = (
    Correction("observed", "Observed (scale means)",
               "OLS on scale means: shrunk by unreliability and inflated by shared method alike.",
               ("estimate_stable", "no_shared_method"), _observed,
               ((6, None, "no corrected estimate could be computed"),)),
    Correction("disattenuated", "Disattenuated with alpha",
               "Spearman's (1904) correction with alpha, then the coefficients solved from the "
               "corrected correlations: corrects unreliability only, treats alpha as the reliability.",
               ("estimate_stable", "no_shared_method"), _disattenuated),
    Correction("disattenuated_omega", "Disattenuated with omega",
               "Spearman's correction with omega (one-factor reliability) instead of alpha.",
               ("estimate_stable", "no_shared_method", "items_continuous"), _disattenuated_omega),
    Correction("errors_in_variables", "Errors-in-variables",
               "All declared paths at once, each scale score a single indicator with its error "
               "variance fixed at (1 - omega) x its variance (Bollen 1989): corrects unreliability only.",
               ("estimate_stable", "no_shared_method", "items_continuous"), _errors_in_variables,
               ((5, None, "the latent model did not fit cleanly; the single-indicator model corrects "
                          "unreliability only"),)),
    Correction("latent", "Latent model",
               "Full structural model on the items: corrects unreliability, not shared method.",
               ("estimate_stable", "no_shared_method", "items_continuous"), _latent,
               ((4, None, "no method-variance correction passed its checks, so the latent model leads: it "
                          "corrects unreliability but not shared method"),)),
    Correction("marker_adjusted", "Marker-adjusted",
               "Scale correlations adjusted by the marker's r_M (Lindell & Whitney 2001), then "
               "disattenuated with alpha: assumes method variance is equal for every scale and that "
               "the marker shares it. Its analytic interval treats r_M and alpha as known, so it "
               "is too narrow; the bootstrap interval is not.",
               ("marker_carries_method", "method_orthogonal", "checks_agree", "estimate_stable"),
               _marker_adjusted),
    Correction("method_factor_adjusted", "Method-factor adjusted",
               "Structural model with a latent method factor on every item, orthogonal to the "
               "traits: corrects unreliability and the shared method the factor captures. In "
               "our simulations where all its assumptions held (600 respondents), its 95% Wald "
               "interval covered the truth in about 88% of samples, so read it as somewhat "
               "narrow (docs/coverage.md).",
               ("marker_carries_method", "method_loadings", "method_orthogonal", "items_continuous",
                "checks_agree", "estimate_stable"), _method_factor_adjusted,
               ((1, "marker", "the marker-identified method factor passed its checks: it corrects "
                              "unreliability and the shared method the marker identifies"),
                (3, "plain", "the plain method factor passed its identification checks"))),
    Correction("measured_method_adjusted", "Measured-method adjusted",
               "Structural model with the measured method construct loading on every "
               "substantive item (Podsakoff et al. 2003): corrects the method it measures.",
               ("method_orthogonal", "checks_agree", "items_continuous", "estimate_stable"),
               _measured_method_adjusted,
               ((2, None, "the measured method construct's model fitted cleanly: it corrects "
                          "unreliability and the method variance the method scale measures"),)),
)
CORRECTION = {c.name: c for c in CORRECTIONS}
METHODS = tuple(c.name for c in CORRECTIONS)
NOTES = {c.name: c.note for c in CORRECTIONS}
LABELS = {c.name: c.label for c in CORRECTIONS}


def preference_order(corrections: tuple[Correction, ...] = CORRECTIONS) -> list[tuple[str, str | None, str]]:
    """(method, method-factor kind or None, why) in the order the report picks its leading
    estimate from (paths_stage.PREFERENCE)."""
    ranked = sorted((rank, c.name, kind, why) for c in corrections for rank, kind, why in c.preference)
    return [(name, kind, why) for _, name, kind, why in ranked]


def wald(est: float | None, se: float | None, confidence: float) -> tuple[list | None, float | None]:
    if est is None or se is None or not math.isfinite(se) or se <= 0:
        return None, None
    z = stats.norm.ppf(0.5 + confidence / 2)
    return [est - z * se, est + z * se], float(2 * stats.norm.sf(abs(est / se)))
