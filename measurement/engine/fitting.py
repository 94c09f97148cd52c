"""Maximum-likelihood fitting engine for :class:`~samesource.engine.modelspec.ModelSpec` models.

Our own engine on numpy/scipy, so that every fit is capped in time, tried from several
starting points, warm-started for fast bootstrap refits and reported with honest status
flags.

Model (RAM notation, McArdle & McDonald 1984): all variables ``v = (observed, latent)``,
``v = A v + e`` with ``cov(e) = S``, so the covariance of all variables is
``Omega = E S E'`` with ``E = (I - A)^-1`` and the observed covariance is
``Sigma = F Omega F'`` (F selects the observed rows, which come first).

Estimators

* ``"ml"`` (from :class:`Moments`): minimizes the discrepancy
  ``F = log|Sigma| + tr(S Sigma^-1) - log|S| - p`` (Joreskog 1969), S with divisor N;
  chi2 = N F_min.
* ``"fiml"`` (from :class:`RawData`): maximizes the casewise normal log-likelihood of the
  observed entries, with a free saturated mean vector (Arbuckle 1996; Enders 2010), grouped
  by missing-data pattern; chi2 = -2(LL_model - LL_saturated), the saturated model fitted by
  EM (Dempster, Laird & Rubin 1977).

Optimizer: damped Fisher scoring (Levenberg-Marquardt on the expected information; Lee &
Jennrich 1979 compare scoring with other algorithms for covariance structures) with a
symmetric rank-one secant correction for the misfit part of the Hessian (Dennis, Gay &
Welsch 1981), an Armijo acceptance test and a damping factor that grows when a step fails
(Sigma not positive definite, or no decrease) and shrinks when it succeeds. The gradient
is analytic: ``dF/dSigma = Sigma^-1 - Sigma^-1 S Sigma^-1`` pushed through the RAM
matrices; the information matrix is formed from whitened derivative vectors, with no
Python loop over parameters.

Time: :func:`fit_model` and :func:`refit` obey ``time_limit`` for everything (EM, all
starts, standard errors) and report ``capped=True`` when they had to stop. The limit counts
seconds of computation (CPU time of the fitting thread, see :class:`_Deadline`), so a fit
stops at the same point on a busy machine as on an idle one.
"""

from __future__ import annotations

import contextlib
import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

import numpy as np
import pandas as pd
from scipy import linalg, stats

from samesource.engine import fit_indices as fx
from samesource.engine.fiml import FIMLRows, PatternData
from samesource.engine.modelspec import ModelSpec, Param
from samesource.errors import DataError

ParamKey = tuple[str, str, str]

LOG2PI = math.log(2.0 * math.pi)

# Status thresholds (documented in FitResult).
GRAD_TOL = 1e-6          # converged: largest scaled gradient of F (or -2 LL / N) below this
VAR_TOL = 1e-8           # proper: a free variance must exceed VAR_TOL x its variable's scale
STD_LOAD_TOL = 1e-6      # proper: |standardized loading| <= 1 + STD_LOAD_TOL
EIG_TOL = 1e-10          # identified: smallest/largest eigenvalue of the scaled information
STD_SE_MAX = 10.0        # identified: no standardized SE above this
SE_RATIO_MAX = 1e4       # identified: no SE above this multiple of the estimate's scale
# Stall stop: F (the ML discrepancy, or -2 LL / N for FIML) improved by less than STALL_F over
# STALL_WINDOW iterations. Identified models converge in tens of iterations; a model drifting
# along a flat ridge (a variance sliding to zero, loadings trading off) otherwise used all
# 1000 iterations, 6 s for one free-loading method-factor check at 2,000 x 60, to gain <0.02.
# In units of F, not of chi-square (N F): for a given covariance matrix F, its gradient and
# the optimizer's path do not depend on N (the ML estimates are a function of S alone), so
# neither does where a fit stops; counted in chi-square units the same ridge ran its full
# 1000 iterations at 1,000,000 rows and stopped after 184 at 239. 1e-4 is 0.01 chi-square units
# at N = 100. A stop with the gradient still above GRAD_TOL is reported as not converged.
STALL_WINDOW = 50
STALL_F = 1e-4

try:  # optional: present wherever scikit-learn is; the engine works without it
    from threadpoolctl import ThreadpoolController
except ImportError:  # pragma: no cover
    ThreadpoolController = None
_POOL: list[Any] = []


def _single_threaded_blas() -> contextlib.AbstractContextManager:
    """Run BLAS single-threaded during a fit, if threadpoolctl is available.

    The engine multiplies small matrices many times; OpenBLAS thread hand-offs dominate
    and collapse when the cores are busy (measured on two loaded cores: a 60-item fit took
    1-5 s multi-threaded vs 0.15 s single-threaded).
    """
    if ThreadpoolController is None:
        return contextlib.nullcontext()
    if not _POOL:
        _POOL.append(ThreadpoolController())
    return _POOL[0].limit(limits=1, user_api="blas")


# ---------------------------------------------------------------------------------------
# Data
# ---------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class Moments:
    """Sample moments of complete rows: covariance with divisor N, and optionally means."""

    names: tuple[str, ...]
    cov: np.ndarray
    n: int
    mean: np.ndarray | None = None

    def __post_init__(self) -> None:
        cov = np.asarray(self.cov, dtype=float)
        k = len(self.names)
        if cov.shape != (k, k):
            raise DataError(f"covariance matrix is {cov.shape}, expected {k} x {k} for the names")
        if not np.all(np.isfinite(cov)):
            raise DataError("covariance matrix has missing or infinite values")
        if self.n < 2:
            raise DataError(f"need at least 2 observations, got {self.n}")
        object.__setattr__(self, "names", tuple(self.names))
        object.__setattr__(self, "cov", (cov + cov.T) / 2.0)
        if self.mean is not None:
            object.__setattr__(self, "mean", np.asarray(self.mean, dtype=float).reshape(k))

    @classmethod
    def from_data(cls, X: np.ndarray | pd.DataFrame, names: Any = None) -> Moments:
        """Moments of a complete data matrix (rows = respondents); NaN raises ``DataError``
        (a ``ValueError``): drop or impute incomplete rows first, or use :class:`RawData`."""
        arr, nm = _as_matrix(X, names)
        if np.isnan(arr).any():
            raise DataError("data contain missing values; use complete rows or RawData (FIML)")
        n = arr.shape[0]
        mean, cross = centred_cross_products(arr)
        return cls(names=nm, cov=cross / n, n=n, mean=mean)


# Rows per block of centred rows: a block's copy stays small however many rows there are.
CROSS_BLOCK_ROWS = 65_536


def centred_cross_products(X: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Column means of complete rows and the sum of their centred outer products
    (sum_i (x_i - mean)(x_i - mean)'), a block of rows at a time: no centred copy of every
    row, BLAS single-threaded (see :func:`_single_threaded_blas`)."""
    X = np.asarray(X, dtype=float)
    mean = X.mean(axis=0)
    cross = np.zeros((X.shape[1], X.shape[1]))
    with _single_threaded_blas():
        for s in range(0, X.shape[0], CROSS_BLOCK_ROWS):
            dev = X[s:s + CROSS_BLOCK_ROWS] - mean
            cross += dev.T @ dev
    return mean, (cross + cross.T) / 2.0


@dataclass(frozen=True, eq=False)
class RawData:
    """Raw rows with NaN for a missing answer, for full-information ML."""

    names: tuple[str, ...]
    X: np.ndarray

    def __post_init__(self) -> None:
        X = np.asarray(self.X, dtype=float)
        if X.ndim != 2 or X.shape[1] != len(self.names):
            raise DataError(f"data matrix is {X.shape}, expected {len(self.names)} columns")
        if np.isinf(X).any():
            raise DataError("data contain infinite values")
        object.__setattr__(self, "names", tuple(self.names))
        object.__setattr__(self, "X", X)

    @classmethod
    def from_data(cls, X: np.ndarray | pd.DataFrame, names: Any = None) -> RawData:
        arr, nm = _as_matrix(X, names)
        return cls(names=nm, X=arr)


def _as_matrix(X: np.ndarray | pd.DataFrame, names: Any) -> tuple[np.ndarray, tuple[str, ...]]:
    if isinstance(X, pd.DataFrame):
        nm = tuple(str(c) for c in X.columns) if names is None else tuple(names)
        try:
            arr = X.to_numpy(dtype=float)
        except (TypeError, ValueError) as exc:
            raise DataError(f"data are not all numeric: {exc}") from exc
    else:
        arr = np.asarray(X, dtype=float)
        if arr.ndim != 2:
            raise DataError("data must be a 2-D matrix (rows = respondents)")
        nm = tuple(names) if names is not None else tuple(f"v{i + 1}" for i in range(arr.shape[1]))
    if len(nm) != arr.shape[1]:
        raise DataError(f"{len(nm)} names for {arr.shape[1]} columns")
    return arr, nm


def _select(names: tuple[str, ...], wanted: tuple[str, ...]) -> np.ndarray:
    pos = {n: i for i, n in enumerate(names)}
    missing = [w for w in wanted if w not in pos]
    if missing:
        raise DataError(f"the data have no variable {', '.join(repr(m) for m in missing)}",
                        column=missing[0])
    return np.array([pos[w] for w in wanted], dtype=int)


# ---------------------------------------------------------------------------------------
# The compiled model structure (data independent)
# ---------------------------------------------------------------------------------------


class _Structure:
    """RAM index arrays for a spec: which free parameter fills which A or S cell."""

    def __init__(self, spec: ModelSpec) -> None:
        self.spec = spec
        self.observed = tuple(spec.observed)
        self.latent = tuple(spec.latent)
        self.names = self.observed + self.latent
        self.p = len(self.observed)
        self.m = len(self.names)
        idx = {n: i for i, n in enumerate(self.names)}
        m = self.m
        self.A0 = np.zeros((m, m))
        self.S0 = np.zeros((m, m))
        groups: dict[Any, int] = {}
        self.free_names: list[str] = []
        self.free_params: list[list[int]] = []   # spec-param positions per free parameter
        pidx, rows, cols, mats = [], [], [], []
        used: dict[tuple[str, int, int], ParamKey] = {}
        for j, par in enumerate(spec.params):
            if par.op == "load":
                r, c, mat = idx[par.rhs], idx[par.lhs], "A"
            elif par.op == "reg":
                r, c, mat = idx[par.lhs], idx[par.rhs], "A"
            else:
                r, c, mat = idx[par.lhs], idx[par.rhs], "S"
                if r < c:
                    r, c = c, r
            cell = (mat, r, c)
            if cell in used:
                raise ValueError(f"{spec.name}: {par.key} and {used[cell]} fill the same "
                                 "matrix cell")
            used[cell] = par.key
            if mat == "A" and r == c:
                raise ValueError(f"{spec.name}: {par.key} regresses a variable on itself")
            rows.append(r)
            cols.append(c)
            mats.append(mat)
            if not par.free:
                if mat == "A":
                    self.A0[r, c] = par.value
                else:
                    self.S0[r, c] = self.S0[c, r] = par.value
                pidx.append(-1)
                continue
            gkey = ("label", par.label) if par.label else ("param", par.key)
            if gkey not in groups:
                groups[gkey] = len(groups)
                self.free_names.append(par.label or _key_text(par.key))
                self.free_params.append([])
            k = groups[gkey]
            self.free_params[k].append(j)
            pidx.append(k)
        self.q = len(groups)
        self.pidx = np.array(pidx, dtype=int)
        self.rows = np.array(rows, dtype=int)
        self.cols = np.array(cols, dtype=int)
        self.is_a = np.array([mt == "A" for mt in mats], dtype=bool)
        free = self.pidx >= 0
        a = free & self.is_a
        s = free & ~self.is_a
        # Cells written from x (A entries; S entries in both triangles).
        self.a_r, self.a_c, self.a_k = self.rows[a], self.cols[a], self.pidx[a]
        sr, sc, sk = self.rows[s], self.cols[s], self.pidx[s]
        off = sr != sc
        self.s_r = np.concatenate([sr, sc[off]])
        self.s_c = np.concatenate([sc, sr[off]])
        self.s_k = np.concatenate([sk, sk[off]])
        # Derivative entries: dSigma/dx_k = sum_e w_e (a_e b_e' + b_e a_e'), with
        # a_e = (FE)[:, row] and b_e = (F Omega)[:, col] for A cells, (FE)[:, col] for S.
        self.e_arow = np.concatenate([self.a_r, sr])
        self.e_bcol = np.concatenate([self.a_c, sc + m])   # column of [F Omega, F E]
        ek = np.concatenate([self.a_k, sk])
        ew = np.concatenate([np.ones(len(self.a_r)), np.where(off, 1.0, 0.5)])
        self.Z = np.zeros((self.q, len(ek)))
        self.Z[ek, np.arange(len(ek))] = ew
        # Z h Z' without the dense product where each parameter has one entry (no labels): a
        # reordering of h weighted by w w', the same bits as the product (every weight is 1
        # or 1/2, so each product is exact, and the other terms are exact zeros). With labels
        # the product stays: summed in another order its rounding differed, and that moved
        # which of several starts reaching one solution was reported.
        self.e_single = len(ek) == self.q
        self.e_order = np.argsort(ek, kind="stable")
        self.e_ww = np.outer(ew[self.e_order], ew[self.e_order])
        # (I - A)^-1 in closed form where no variable both receives and sends a path and every
        # path runs from a later variable to an earlier one (measurement models: loadings from
        # latents, which come after the observed): then A A = 0 and I - A is upper triangular,
        # so E = I + A, the same bits as LAPACK's inverse (its elimination multiplies by 1 and
        # adds 0) for a tenth of the work.
        ar, ac = self.rows[self.is_a], self.cols[self.is_a]
        self.two_layer = not (set(ar.tolist()) & set(ac.tolist())) and bool(np.all(ar < ac))
        self.eye = np.eye(self.m)
        # Spec bookkeeping for standardization and reporting.
        self.fixed_values = np.array([np.nan if p.free else float(p.value) for p in spec.params])
        self.keymap: dict[ParamKey, int] = {}
        for j, par in enumerate(spec.params):
            self.keymap[par.key] = j
            if par.op == "cov":
                self.keymap[("cov", par.rhs, par.lhs)] = j
        self.loads_of: dict[str, list[int]] = {lat: [] for lat in self.latent}
        self.n_loads = np.zeros(self.p, dtype=int)
        self.endogenous = np.zeros(self.m, dtype=bool)
        for par in spec.params:
            if par.op == "load":
                self.loads_of[par.lhs].append(idx[par.rhs])
                self.n_loads[idx[par.rhs]] += 1
                self.endogenous[idx[par.rhs]] = True
            elif par.op == "reg":
                self.endogenous[idx[par.lhs]] = True
        self.idx = idx

    def values(self, x: np.ndarray) -> np.ndarray:
        """Values of every spec parameter (fixed ones at their value)."""
        v = self.fixed_values.copy()
        free = self.pidx >= 0
        v[free] = x[self.pidx[free]]
        return v

    def matrices(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        A = self.A0.copy()
        A[self.a_r, self.a_c] = x[self.a_k]
        S = self.S0.copy()
        S[self.s_r, self.s_c] = x[self.s_k]
        return A, S

    def moments(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray] | None:
        """(E, Omega) or None when I - A is singular."""
        A, S = self.matrices(x)
        if self.two_layer:
            E = self.eye + A
        else:
            try:
                E = np.linalg.inv(self.eye - A)
            except np.linalg.LinAlgError:
                return None
        if not np.all(np.isfinite(E)):
            return None
        Om = E @ S @ E.T
        return E, (Om + Om.T) / 2.0

    def deriv_vectors(self, E: np.ndarray, Om: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        p = self.p
        FE = E[:p, :]
        Amat = FE[:, self.e_arow]
        Bmat = np.hstack([Om[:p, :], FE])[:, self.e_bcol]
        return Amat, Bmat

    def standardized(self, x: np.ndarray) -> np.ndarray:
        """Completely standardized value of every spec parameter (NaN where a sd is not real)."""
        mo = self.moments(x)
        vals = self.values(x)
        if mo is None:
            return np.full(len(vals), np.nan)
        var = np.diag(mo[1])
        with np.errstate(invalid="ignore", divide="ignore"):
            sd = np.where(var > 0, np.sqrt(np.abs(var)), np.nan)
            out = np.where(self.is_a, vals * sd[self.cols] / sd[self.rows],
                           vals / (sd[self.rows] * sd[self.cols]))
        return out

    def standardized_jacobian(self, x: np.ndarray) -> np.ndarray:
        """d standardized / d x (spec parameters x free parameters), analytic.

        The variances of all variables move as diag(dOmega/dx_k) = sum_e 2 w_e a_e * b_e (the
        derivative vectors of :meth:`deriv_vectors` over all variables, not only the
        observed), and each standardized value is its estimate times a ratio of sds, so
        d std = (d value) ratio + std (d log sd(col) -/+ d log sd(row)). One evaluation in
        place of the 2q of a central-difference Jacobian, which it equals to about 1e-9 (the
        differences' own error). NaN where a sd is not real.
        """
        n = len(self.pidx)
        mo = self.moments(x)
        if mo is None:
            return np.full((n, self.q), np.nan)
        E, Om = mo
        var = np.diag(Om)
        vals = self.values(x)
        dvar = (2.0 * E[:, self.e_arow] * np.hstack([Om, E])[:, self.e_bcol]) @ self.Z.T
        with np.errstate(invalid="ignore", divide="ignore"):
            sd = np.where(var > 0, np.sqrt(np.abs(var)), np.nan)
            dlog = dvar / (2.0 * var[:, None])                   # d log sd / dx, per variable
            ratio = np.where(self.is_a, sd[self.cols] / sd[self.rows], 1.0 / (sd[self.rows] * sd[self.cols]))
            sign = np.where(self.is_a, 1.0, -1.0)[:, None]
            J = (vals * ratio)[:, None] * (sign * dlog[self.cols] - dlog[self.rows])
        free = np.flatnonzero(self.pidx >= 0)
        J[free, self.pidx[free]] += ratio[free]
        return J

    def param_unit(self, Om: np.ndarray) -> np.ndarray:
        """Natural scale of each spec parameter from the implied sds (for SE checks)."""
        var = np.abs(np.diag(Om))
        sd = np.sqrt(np.where(var > 0, var, 1.0))
        return np.where(self.is_a, sd[self.rows] / sd[self.cols], sd[self.rows] * sd[self.cols])


def _key_text(key: ParamKey) -> str:
    op, lhs, rhs = key
    sym = {"load": "=~", "reg": "~", "cov": "~~"}[op]
    return f"{lhs} {sym} {rhs}"


# LAPACK called directly with the arguments scipy.linalg's wrappers pass it, so the same bits:
# at these sizes their array-API, batch and validation layers cost more than the solves.
_TRTRS, _POTRF, _POTRS = linalg.lapack.dtrtrs, linalg.lapack.dpotrf, linalg.lapack.dpotrs


def _solve_lower(L: np.ndarray, B: np.ndarray) -> np.ndarray:
    """L^-1 B for a finite lower-triangular float64 L with a positive diagonal (a Cholesky
    factor from :func:`_chol`): ``scipy.linalg.solve_triangular(L, B, lower=True)``."""
    if L.flags.f_contiguous:
        x, info = _TRTRS(L, B, lower=1, trans=0)
    else:  # as scipy does: the transposed system, since LAPACK reads Fortran order
        x, info = _TRTRS(L.T, B, lower=0, trans=1)
    if info != 0:
        raise linalg.LinAlgError(f"triangular solve failed (info {info})")
    return x


def _cho_solve(M: np.ndarray, g: np.ndarray) -> np.ndarray | None:
    """M^-1 g through M's Cholesky factor, None when M is not positive definite:
    ``scipy.linalg.cho_solve(cho_factor(M, lower=True), g)``."""
    c, info = _POTRF(M, lower=1, clean=0, overwrite_a=0)
    if info != 0:
        return None
    x, info = _POTRS(c, g, lower=1, overwrite_b=0)
    return x if info == 0 else None


def _chol(M: np.ndarray) -> np.ndarray | None:
    try:
        L = np.linalg.cholesky(M)
    except np.linalg.LinAlgError:
        return None
    if not np.all(np.isfinite(L)) or np.min(np.diag(L)) <= 0:
        return None
    return L


def _info_from_whitened(At: np.ndarray, Bt: np.ndarray, st: _Structure) -> np.ndarray:
    """tr(Sigma^-1 Sigma_k Sigma^-1 Sigma_l) from whitened derivative vectors.

    With Sigma_k = sum_e w_e (a_e b_e' + b_e a_e') and whitened a~ = L^-1 a:
    tr(...) = 2[(a~e.a~f)(b~e.b~f) + (a~e.b~f)(b~e.a~f)] summed over the entries
    (``st.Z h st.Z'``; a reordering of h where every parameter has one entry).
    """
    gaa = At.T @ At
    gbb = Bt.T @ Bt
    gab = At.T @ Bt
    h = 2.0 * (gaa * gbb + gab * gab.T)
    if not st.e_single:
        return st.Z @ h @ st.Z.T
    o = st.e_order
    return h[o[:, None], o[None, :]] * st.e_ww


# ---------------------------------------------------------------------------------------
# Objectives: ML from moments and FIML from raw rows
# ---------------------------------------------------------------------------------------


def cpu_seconds() -> float:
    """CPU seconds of the calling thread so far (``time.thread_time``), the clock of every
    fit's cap and of every budget derived from a fit's duration."""
    return time.thread_time()


class _Deadline:
    """A cap counted in CPU seconds of the thread doing the work, not in wall time.

    In wall time the same data gave another result on a loaded machine (a busy server, a Dask
    worker beside others): a fit that converges alone was cut at its cap, a replicate counted
    as failed. Counted in the thread's own CPU time the cap is as far away however many other
    processes share the cores. A hang stays impossible: a fit reads arrays already in memory
    and waits on nothing but the CPU (no I/O, no lock, no other process), so its thread keeps
    accruing CPU time until the cap. BLAS runs in the calling thread during a fit
    (:func:`_single_threaded_blas`), so its work is counted too; were BLAS to run threads of
    its own (threadpoolctl missing), their share would go uncounted and a fit could take more
    CPU in all than its cap, but still stop. ``time.thread_time`` is
    clock_gettime(CLOCK_THREAD_CPUTIME_ID) on Linux: about 1 microsecond a call, next to
    milliseconds per evaluation. The service's own limits (reading an upload, a job's lease)
    stay in wall time.
    """

    def __init__(self, seconds: float) -> None:
        self.t0 = cpu_seconds()
        self.end = self.t0 + max(float(seconds), 0.0)

    def over(self) -> bool:
        return cpu_seconds() >= self.end

    def elapsed(self) -> float:
        return cpu_seconds() - self.t0


class _TimeUp(Exception):
    pass


class _Infeasible(Exception):
    pass


class _PointCache:
    """The model's moments and Sigma's Cholesky factor at the last point asked for.

    The optimizer asks for the value at a trial point and then, once it is accepted, for the
    gradient and information at the same point: the second reuses the first's moments and
    factorization (the same arrays, so the same numbers). Callers only read what they get.
    """

    def __init__(self, st: _Structure) -> None:
        self.st = st
        self.x: np.ndarray | None = None
        self.got: tuple[tuple[np.ndarray, np.ndarray] | None, np.ndarray | None] = (None, None)

    def at(self, x: np.ndarray) -> tuple[tuple[np.ndarray, np.ndarray] | None, np.ndarray | None]:
        """((E, Omega) or None, Cholesky factor of Sigma or None) at the parameters x."""
        if self.x is not None and np.array_equal(self.x, x):
            return self.got
        mo = self.st.moments(x)
        L = None if mo is None else _chol(mo[1][: self.st.p, : self.st.p])
        self.x, self.got = np.array(x, dtype=float), (mo, L)
        return self.got


class _MLObjective:
    """F_ML of a structure on a sample covariance matrix; x holds the model parameters."""

    estimator = "ml"
    deadline: _Deadline | None = None   # ML evaluations are quick: not checked inside

    def __init__(self, st: _Structure, S: np.ndarray, n: int) -> None:
        self.st = st
        self.S = S
        self.n = n
        self.p = st.p
        self.nx = st.q
        Ls = _chol(S)
        if Ls is None:
            raise DataError(
                f"the sample covariance matrix of the {self.p} observed variables is not "
                f"positive definite (N = {n}); remove redundant or constant items")
        self.logdet_s = 2.0 * np.sum(np.log(np.diag(Ls)))
        self.eye = np.eye(self.p)
        self.point = _PointCache(st)

    def value(self, x: np.ndarray) -> float:
        mo, L = self.point.at(x)
        if mo is None or L is None:
            return math.inf
        # L is a Cholesky factor checked finite: scipy's finiteness checks would only repeat it
        W = _solve_lower(L, self.S)
        W = _solve_lower(L, W.T)
        f = 2.0 * np.sum(np.log(np.diag(L))) + np.trace(W) - self.logdet_s - self.p
        return float(f) if np.isfinite(f) else math.inf

    def full(self, x: np.ndarray) -> tuple[float, np.ndarray, np.ndarray] | None:
        """(F, gradient, expected Hessian) or None if Sigma is not positive definite."""
        st = self.st
        mo, L = self.point.at(x)
        if mo is None or L is None:
            return None
        E, Om = mo
        Li = _solve_lower(L, self.eye)
        Si = Li.T @ Li
        SiS = Si @ self.S
        f = 2.0 * np.sum(np.log(np.diag(L))) + np.trace(SiS) - self.logdet_s - self.p
        G = Si - SiS @ Si
        Amat, Bmat = st.deriv_vectors(E, Om)
        g = st.Z @ (2.0 * np.sum(Amat * (G @ Bmat), axis=0))
        H = _info_from_whitened(Li @ Amat, Li @ Bmat, st)
        return float(f), g, H

    def param_cov_scale(self) -> float:
        """Expected information = (N/2) x expected Hessian of F."""
        return self.n / 2.0


class _FIMLObjective:
    """-2 LL / N of the observed entries; x = (model parameters, saturated means).

    The rows enter through their per-pattern sufficient statistics, held as a few weighted
    pseudo-rows per missing-data pattern (:class:`~samesource.engine.fiml.FIMLRows`), so an
    evaluation costs the number of patterns, not of rows. Every pattern's inverse and
    determinant come from the full precision matrix ``P = Sigma^-1`` through the Schur
    complement (``Sigma_oo^-1 = P_oo - P_om P_mm^-1 P_mo``,
    ``log|Sigma_oo| = log|Sigma| + log|P_mm|``), so a pattern costs O(p m^2) for its m
    missing variables and the quadratic forms are one pass over the pseudo-rows, instead of
    a Cholesky factorization of every observed block.
    """

    estimator = "fiml"

    def __init__(self, st: _Structure, X: np.ndarray | FIMLRows) -> None:
        self.st = st
        self.p = p = st.p
        self.nx = st.q + st.p
        rows = X if isinstance(X, FIMLRows) else FIMLRows.from_rows(X)
        self.dropped = rows.dropped
        self.n = n = rows.n
        self.ac_mean, self.ac_var, self.ac_n = rows.ac_mean, rows.ac_var, rows.ac_n
        if np.any(self.ac_n < 2) or np.any(~(self.ac_var > 0)):
            raise DataError("a variable has fewer than two answers or no variance")
        self.obs = rows.obs
        self.Y0 = rows.Y0
        self.scale = rows.scale
        self.k_sum = rows.k_sum
        pats, inv = rows.observed, rows.pattern
        self.n_patterns = len(pats)
        self.complete = rows.complete
        by_m: dict[int, list[int]] = {}
        for g, pat in enumerate(pats):
            m = int(p - pat.sum())
            if m:
                by_m.setdefault(m, []).append(g)
        self.groups = []
        for _, gs in sorted(by_m.items()):
            M = np.array([np.flatnonzero(~pats[g]) for g in gs], dtype=int)
            local = {g: i for i, g in enumerate(gs)}
            prow = np.flatnonzero(np.isin(inv, gs))
            pi = np.array([local[g] for g in inv[prow]], dtype=int)
            counts = rows.counts[gs]
            self.groups.append({"M": M, "rows": prow, "pi": pi, "w": counts / n, "counts": counts,
                                "ii": np.arange(len(gs))[:, None, None]})
        self.deadline: _Deadline | None = None
        self.eye = np.eye(p)
        self.point = _PointCache(st)

    def _core(self, Sig: np.ndarray, mu: np.ndarray, grad: bool, L: np.ndarray | None = None):
        """-2 LL / N at (Sigma, mu) and, if asked, d/dSigma (as G with tr(G dSigma)) and
        d/dmu; also returns P and the exact expected information block of mu. ``L``: Sigma's
        Cholesky factor when the caller has it."""
        L = _chol(Sig) if L is None else L
        if L is None:
            return None
        Li = _solve_lower(L, self.eye)
        P = Li.T @ Li
        n = self.n
        Et = (self.Y0 - self.scale[:, None] * mu) * self.obs
        U = Et @ P
        logdet = n * 2.0 * float(np.sum(np.log(np.diag(L))))
        Q = np.zeros((self.p, self.p)) if grad else None
        for gr in self.groups:
            if self.deadline is not None and self.deadline.over():
                raise _TimeUp
            M, rows, pi = gr["M"], gr["rows"], gr["pi"]
            Pmm = P[M[:, :, None], M[:, None, :]]
            try:
                Lm = np.linalg.cholesky(Pmm)
            except np.linalg.LinAlgError:
                return None
            logdet += float(np.sum(gr["counts"] *
                                   2.0 * np.sum(np.log(np.diagonal(Lm, axis1=1, axis2=2)),
                                                axis=1)))
            # V_g = P[:, M_g] Lm_g^-T, so that P_:M P_MM^-1 P_M: = V_g V_g'.
            V = np.linalg.solve(Lm, P[:, M].transpose(1, 2, 0)).transpose(0, 2, 1)
            Vr = V[pi]
            c = np.matmul(Et[rows][:, None, :], Vr)                 # (r, 1, m)
            U[rows] -= np.matmul(Vr, c.transpose(0, 2, 1))[:, :, 0]
            if grad:
                Vw = (V * np.sqrt(gr["w"])[:, None, None]).transpose(1, 0, 2).reshape(self.p, -1)
                Q += Vw @ Vw.T
        quad = float(np.sum(Et * U))
        f = (self.k_sum * LOG2PI + logdet + quad) / n
        if not np.isfinite(f):
            return None
        if not grad:
            return f, None, None, None
        Wsum = P - Q                         # sum_g w_g Sigma_oo^-1 (embedded)
        G = Wsum - U.T @ U / n
        gmu = -2.0 * (self.scale @ U) / n   # the mean rows: sum_g n_g Sigma_oo^-1 (m_g - mu_o)
        return f, (G + G.T) / 2.0, gmu, 2.0 * Wsum

    def value(self, x: np.ndarray) -> float:
        mo, L = self.point.at(x[: self.st.q])
        if mo is None or L is None:
            return math.inf
        r = self._core(mo[1][: self.p, : self.p], x[self.st.q:], False, L)
        return math.inf if r is None else r[0]

    def _grad(self, x: np.ndarray, info: bool):
        st = self.st
        mo, L = self.point.at(x[: st.q])
        if mo is None or L is None:
            return None
        E, Om = mo
        Sig = Om[: self.p, : self.p]
        r = self._core(Sig, x[st.q:], True, L)
        if r is None:
            return None
        f, G, gmu, Hmu = r
        Amat, Bmat = st.deriv_vectors(E, Om)
        g = np.concatenate([st.Z @ (2.0 * np.sum(Amat * (G @ Bmat), axis=0)), gmu])
        if not info:
            return f, g, None
        # Curvature for the optimizer: complete-data expected information for the model
        # parameters (an upper bound of the observed-data one: the missing-information
        # principle, Orchard & Woodbury 1972), exact expected information for the means.
        Li = _solve_lower(L, self.eye)
        H = np.zeros((self.nx, self.nx))
        H[: st.q, : st.q] = _info_from_whitened(Li @ Amat, Li @ Bmat, st)
        H[st.q:, st.q:] = Hmu
        return f, g, H

    def full(self, x: np.ndarray):
        return self._grad(x, True)

    def gradient(self, x: np.ndarray) -> np.ndarray | None:
        r = self._grad(x, False)
        return None if r is None else r[1]

    def loglik(self, f: float) -> float:
        return -0.5 * self.n * f

    def saturated(self, deadline: _Deadline, max_iter: int = 20000):
        """EM estimates of the unrestricted mean and covariance (Dempster, Laird & Rubin
        1977; Little & Rubin 2002, ch. 11) and their log-likelihood; None if cut off by the
        deadline. The E-step uses the precision matrix: E(y_m | y_o) = mu_m -
        P_mm^-1 P_mo (y_o - mu_o), cov(y_m | y_o) = P_mm^-1. Stops when the log-likelihood
        gains less than 1e-12 x (1 + |LL|)."""
        n = self.n
        if self.complete:
            mu = self.scale @ self.Y0 / n
            dev = self.Y0 - self.scale[:, None] * mu
            Sig = dev.T @ dev / n
            r = self._core(Sig, mu, False)
            return None if r is None else (mu, Sig, -0.5 * n * r[0])
        mu = self.ac_mean.copy()
        Sig = np.diag(self.ac_var)
        last = -math.inf
        for _ in range(max_iter):
            if deadline.over():
                return None
            L = _chol(Sig)
            if L is None:
                return None
            r = self._core(Sig, mu, False, L)
            if r is None:
                return None
            ll = -0.5 * n * r[0]
            if ll - last < 1e-12 * (1.0 + abs(ll)):
                return mu, Sig, ll
            last = ll
            P = linalg.cho_solve((L, True), np.eye(self.p))
            Yc = self.Y0.copy()
            Et = (self.Y0 - self.scale[:, None] * mu) * self.obs
            extra = np.zeros((self.p, self.p))
            for gr in self.groups:
                M, rows, pi, ii = gr["M"], gr["rows"], gr["pi"], gr["ii"]
                Pmm = P[M[:, :, None], M[:, None, :]]
                Cm = np.linalg.inv(Pmm)                               # cov(y_m | y_o)
                PmE = np.einsum("rmp,rp->rm", P[M][pi], Et[rows])     # P_mo (y_o - mu_o)
                Yc[rows[:, None], M[pi]] = (self.scale[rows, None] * mu[M[pi]]
                                            - np.einsum("rij,rj->ri", Cm[pi], PmE))
                add = np.zeros((len(M), self.p, self.p))
                add[ii, M[:, :, None], M[:, None, :]] = Cm
                extra += np.einsum("g,gij->ij", gr["w"] * n, add)
            mu = self.scale @ Yc / n
            Sig = (Yc.T @ Yc + extra) / n - np.outer(mu, mu)
            Sig = (Sig + Sig.T) / 2.0
        return mu, Sig, last

    def baseline_loglik(self) -> float:
        """Independence model under FIML: per-variable available-case mean and variance are
        its MLE, so its log-likelihood is a sum of univariate terms."""
        return float(np.sum(-0.5 * self.ac_n * (LOG2PI + np.log(self.ac_var) + 1.0)))


# ---------------------------------------------------------------------------------------
# Optimizer
# ---------------------------------------------------------------------------------------


def _scaled_grad(g: np.ndarray, H: np.ndarray) -> float:
    """Largest |g_k| / sqrt(H_kk): the gradient in units of each parameter's information
    scale, so the test does not depend on the units of the variables."""
    if g.size == 0:
        return 0.0
    d = np.abs(np.diag(H))
    d = np.maximum(d, 1e-12 * max(float(np.max(d)), 1e-300))
    return float(np.max(np.abs(g) / np.sqrt(d)))


@dataclass
class _Run:
    x: np.ndarray
    f: float
    g: np.ndarray
    H: np.ndarray
    iterations: int
    success: bool
    capped: bool
    stalled: bool = False  # stopped on a flat ridge, not converged (see STALL_F)


def _optimize(obj, x0: np.ndarray, deadline: _Deadline, max_iter: int = 1000,
              secant: bool = True, lam0: float = 1e-3) -> _Run | None:
    """Damped Fisher scoring (Levenberg-Marquardt on the expected information).

    Curvature matrix: the expected information H plus a symmetric rank-one secant
    correction C for the part of the Hessian that comes from misfit (the structured
    quasi-Newton idea of Dennis, Gay & Welsch 1981). Pure scoring converges only linearly
    when the model misfits (rate about .7 on the Holzinger-Swineford model); the
    correction makes it superlinear. C is dropped whenever H + C is not positive definite.
    Stops when the largest scaled gradient (see :func:`_scaled_grad`) is below 1e-10, when
    steps stop changing F, when F has improved by less than STALL_F over STALL_WINDOW
    iterations (a flat ridge; not converged unless the gradient is within GRAD_TOL), when the
    damping grows past
    1e12 (no descent possible) or at the deadline.
    """
    # The first evaluation always completes, so there is a point to report; after it the
    # objective itself watches the deadline (FIML evaluations can be long).
    obj.deadline = None
    st = obj.full(x0)
    if st is None:
        return None
    x = np.array(x0, dtype=float)
    f, g, H = st
    C = np.zeros_like(H)
    lam = lam0
    it = 0
    stalls = 0
    capped = False
    ridge = False
    history = [f]  # F after each iteration, for the ridge stop
    obj.deadline = deadline
    try:
        while it < max_iter:
            if deadline.over():
                capped = True
                break
            if _scaled_grad(g, H) < 1e-10:
                break
            dg = np.diag(H).copy()
            scale = max(float(np.max(np.abs(dg), initial=0.0)), 1e-300)
            dg = np.maximum(dg, 1e-10 * scale)
            B = H + C
            accepted = False
            while lam < 1e12:
                if deadline.over():
                    capped = True
                    break
                sol = _cho_solve(B + np.diag(lam * dg), g)
                ok = sol is not None and bool(np.all(np.isfinite(sol)))
                if ok:
                    d = -sol
                if not ok:
                    if C.any():
                        C[:] = 0.0
                        B = H
                    else:
                        lam = max(lam * 10.0, 1e-8)
                    continue
                slope = float(g @ d)
                fn = obj.value(x + d)
                if np.isfinite(fn) and fn <= f + 1e-4 * slope:
                    accepted = True
                    break
                lam = max(lam * 10.0, 1e-8)
            if not accepted:
                break
            xn = x + d
            stn = obj.full(xn)
            if stn is None:  # pragma: no cover - value() just accepted this point
                break
            it += 1
            small = (f - fn) <= 1e-15 * (1.0 + abs(f)) and np.max(np.abs(d)) <= 1e-9 * (
                1.0 + np.max(np.abs(x)))
            gn, Hn = stn[1], stn[2]
            if secant:
                r = (gn - g) - Hn @ d - C @ d
                rs = float(r @ d)
                if abs(rs) > 1e-8 * float(np.linalg.norm(r) * np.linalg.norm(d)) and rs != 0.0:
                    C = C + np.outer(r, r) / rs
            x, f, g, H = xn, stn[0], gn, Hn
            lam = max(lam / 10.0, 1e-12)
            stalls = stalls + 1 if small else 0
            if stalls >= 3:
                break
            history.append(f)
            if it >= STALL_WINDOW and history[it - STALL_WINDOW] - f < STALL_F:
                # converged already (gradient within GRAD_TOL) but short of the 1e-10 that ends
                # the loop: F no longer moves, so the rest would be spent on a flat ridge too
                ridge = _scaled_grad(g, H) > GRAD_TOL
                break
    except _TimeUp:
        capped = True
    finally:
        obj.deadline = None
    success = (not capped) and _scaled_grad(g, H) <= GRAD_TOL
    return _Run(x=x, f=f, g=g, H=H, iterations=it, success=success, capped=capped, stalled=ridge)


# ---------------------------------------------------------------------------------------
# Starting values
# ---------------------------------------------------------------------------------------


def _rule_start(st: _Structure, S: np.ndarray) -> np.ndarray:
    """Deterministic start: error variances at half the observed variances, each factor's
    loadings from the first principal component of its items' reduced covariance matrix
    (diagonal = observed variance minus the error-variance start) in the spec's scale
    convention, regressions and covariances 0 (exogenous observed covariances at their sample
    values), latent (residual) variances from that scale. A spec ``value`` on a free
    parameter overrides the rule."""
    spec = st.spec
    p = st.p
    sv = np.diag(S).copy()
    vals: dict[int, float] = {}
    err = np.zeros(p)
    for j, par in enumerate(spec.params):
        if par.op == "cov" and par.lhs == par.rhs and par.lhs in st.idx and st.idx[par.lhs] < p:
            i = st.idx[par.lhs]
            if not par.free:
                err[i] = par.value
            elif par.value is not None:
                err[i] = par.value
            else:
                err[i] = 0.5 * sv[i] if st.endogenous[i] else sv[i]
            vals[j] = err[i]
    lat_var: dict[str, float] = {}
    load_start: dict[tuple[str, str], float] = {}
    for lat in st.latent:
        items = st.loads_of[lat]
        if not items:
            continue
        C = S[np.ix_(items, items)].copy()
        red = np.maximum(sv[items] - err[items], 0.05 * sv[items])
        C[np.diag_indices(len(items))] = red
        w, V = np.linalg.eigh(C)
        ell, v = max(w[-1], 1e-6 * np.max(sv[items])), V[:, -1]
        if v.sum() < 0:
            v = -v
        lam = math.sqrt(ell) * v / np.sqrt(st.n_loads[items])   # latent variance 1
        fixed_load = [(spec.find("load", lat, st.names[i]), k) for k, i in enumerate(items)]
        fixed_load = [(par, k) for par, k in fixed_load if par is not None and not par.free
                      and par.value != 0]
        vpar = spec.find("cov", lat, lat)
        if fixed_load:
            par, k = fixed_load[0]
            if abs(lam[k]) > 1e-3 * np.max(np.abs(lam)):
                phi = (lam[k] / par.value) ** 2
                lam = lam * par.value / lam[k]
            else:
                phi = float(np.mean(red)) / par.value ** 2
                lam = np.full(len(items), par.value)
        elif vpar is not None and not vpar.free and vpar.value > 0:
            phi = float(vpar.value)
            lam = lam / math.sqrt(phi)
        else:
            phi = 1.0
        lat_var[lat] = phi
        for k, i in enumerate(items):
            load_start[(lat, st.names[i])] = float(lam[k])
    exo_obs = {st.names[i] for i in range(p) if not st.endogenous[i]}
    has_loads = {lat for lat in st.latent if st.loads_of[lat]}
    for j, par in enumerate(spec.params):
        if j in vals:
            continue
        if par.op == "load":
            vals[j] = load_start.get((par.lhs, par.rhs), 1.0)
        elif par.op == "reg":
            # A latent with no indicators enters only through its paths: a zero start is a
            # saddle point there, so start those paths away from 0.
            vals[j] = 0.5 if (par.rhs in st.latent and par.rhs not in has_loads) else 0.0
        elif par.lhs == par.rhs:
            vals[j] = lat_var.get(par.lhs, 1.0)
        elif par.lhs in exo_obs and par.rhs in exo_obs:
            vals[j] = float(S[st.idx[par.lhs], st.idx[par.rhs]])
        else:
            vals[j] = 0.0
    x = np.zeros(st.q)
    for k, members in enumerate(st.free_params):
        given = [spec.params[j].value for j in members if spec.params[j].value is not None]
        x[k] = given[0] if given else vals[members[0]]
    return x


def _safe_start(st: _Structure, S: np.ndarray) -> np.ndarray:
    """A start with Sigma close to diagonal: paths and covariances 0, variances at the
    observed variances (latents 1). Used to pull an infeasible start back to feasibility."""
    x = np.zeros(st.q)
    for k, members in enumerate(st.free_params):
        par = st.spec.params[members[0]]
        if par.op == "cov" and par.lhs == par.rhs:
            i = st.idx[par.lhs]
            x[k] = S[i, i] if i < st.p else 1.0
    return x


def _feasible(obj, x: np.ndarray, safe: np.ndarray) -> np.ndarray | None:
    if np.isfinite(obj.value(x)):
        return x
    for t in (0.5, 0.25, 0.1, 0.0):
        y = safe + t * (x - safe)
        if np.isfinite(obj.value(y)):
            return y
    return None


def _perturb(st: _Structure, x0: np.ndarray, S: np.ndarray, rng: np.random.Generator
             ) -> np.ndarray:
    """A random start around the rule start: variances scaled by exp(N(0, .4^2)), loadings
    and paths moved by N(0, .3^2) in units of the implied sd ratio, covariances by
    N(0, .2^2) in correlation units."""
    mo = st.moments(x0)
    var = np.abs(np.diag(mo[1])) if mo is not None else np.ones(st.m)
    var[: st.p] = np.diag(S)
    sd = np.sqrt(np.where(var > 0, var, 1.0))
    x = x0.copy()
    z = rng.standard_normal(st.q)
    for k, members in enumerate(st.free_params):
        j = members[0]
        r, c = st.rows[j], st.cols[j]
        if st.is_a[j]:
            x[k] = x0[k] + 0.3 * z[k] * sd[r] / sd[c]
        elif r == c:
            x[k] = x0[k] * math.exp(0.4 * z[k])
        else:
            x[k] = x0[k] + 0.2 * z[k] * sd[r] * sd[c]
    return x


def _start_from(st: _Structure, start: Any, base: np.ndarray) -> np.ndarray:
    """A warm start from a previous FitResult or a {param key: value} dict."""
    if isinstance(start, FitResult):
        if start._structure is not None and start._structure.spec == st.spec:
            return np.array(start.x, dtype=float)
        start = {p.key: float(v) for p, v in zip(start.spec.params, start.values, strict=True)}
    x = base.copy()
    for k, members in enumerate(st.free_params):
        for j in members:
            par = st.spec.params[j]
            v = start.get(par.key)
            if v is None and par.op == "cov":
                v = start.get(("cov", par.rhs, par.lhs))
            if v is not None and np.isfinite(v):
                x[k] = float(v)
                break
    return x


# ---------------------------------------------------------------------------------------
# Result
# ---------------------------------------------------------------------------------------


@dataclass
class FitResult:
    """A fitted model.

    Main attributes: ``params`` (one row per spec parameter, in spec order: op, lhs, rhs,
    label, free, estimate, se, z, p, std, std_se); ``x`` (the free-parameter vector, one
    entry per free parameter or label); ``param_cov`` (their covariance matrix, None when the
    information matrix is singular); ``implied`` (model-implied covariance of the observed
    variables, in ``spec.observed`` order); ``all_cov`` (implied covariance of all
    variables, observed and latent); ``sample_cov`` (the covariance the model was fitted to:
    the sample one for ML, the EM estimate for FIML); ``means`` (FIML only: the saturated
    mean vector); ``fmin`` (F_ML at the minimum, or -2 LL / N for FIML); the fit indices
    (see :meth:`fit_indices`).

    Standardized values (``std``, completely standardized, with the model-implied sds of
    all variables): b sd(rhs)/sd(lhs) for a regression, lambda sd(latent)/sd(item) for a
    loading, c/(sd sd) for a covariance (so an error variance becomes 1 - R^2); ``std_se``
    by the delta method (central-difference Jacobian times ``param_cov``).

    Status flags and their thresholds:

    * ``converged``: the optimizer stopped normally (not at the time cap) with the largest
      gradient of F (ML) or of -2 LL / N (FIML), each element divided by the square root of
      its information diagonal (so independent of the variables' units), at most 1e-6.
    * ``proper``: no Heywood case: every free variance (error, latent, residual) above
      1e-8 x its variable's scale, the model-implied covariance matrix of the latent
      variables positive definite, every |standardized loading| <= 1 + 1e-6. Offenders are
      listed in ``heywood``.
    * ``identified``: the information matrix of the free parameters (expected information
      for ML, observed for FIML when SEs are computed) scaled to unit diagonal has smallest /
      largest eigenvalue above 1e-10, and no SE explodes: no standardized SE above 10 and no
      SE above 1e4 x max(|estimate|, its natural unit sd(lhs)/sd(rhs) or sd(lhs)sd(rhs)).
      With ``compute_se=False`` only the eigenvalue and raw-SE tests run.
    * ``capped``: the time limit (CPU seconds of the fitting thread, the same on a busy or
      idle machine) stopped the fit (during EM, a start or the SEs). When it
      struck after a start had finished, the reported point is that finished solution and
      ``converged`` describes it.
    * ``status``: the first that applies of "capped", "not_converged", "unidentified",
      "improper", else "ok".

    ``warnings`` holds plain sentences for a report; ``heywood`` the offending parameters.
    ``iterations`` counts the scoring steps of the reported start; ``elapsed`` is the fit's
    CPU time in seconds (of the thread that ran it), the clock of its cap.
    """

    spec: ModelSpec
    estimator: str
    n: int
    converged: bool
    proper: bool
    identified: bool
    capped: bool
    status: str
    warnings: list[str]
    heywood: list[str]
    elapsed: float
    starts_tried: int
    iterations: int
    x: np.ndarray
    implied: np.ndarray
    all_cov: pd.DataFrame
    sample_cov: np.ndarray
    means: pd.Series | None
    chi2: float | None
    df: int
    loglik: float | None
    aic: float | None
    bic: float | None
    baseline_chi2: float | None
    baseline_df: int
    fmin: float
    param_cov: np.ndarray | None = field(default=None, repr=False)
    # inverse information of every estimated quantity: the model parameters and, for FIML,
    # the saturated means after them (the robust sandwich needs the whole of it)
    param_cov_all: np.ndarray | None = field(default=None, repr=False)
    _structure: _Structure | None = field(default=None, repr=False, compare=False)
    # per spec parameter: the estimate, the SE (NaN when fixed or not computed) and the SE of
    # the standardized value; ``params`` and the standardized values are formed from these on
    # first use (a bootstrap replicate reads a few estimates and never the table)
    values: np.ndarray = field(default_factory=lambda: np.empty(0), repr=False, compare=False)
    se_values: np.ndarray = field(default_factory=lambda: np.empty(0), repr=False, compare=False)
    std_se_values: np.ndarray = field(default_factory=lambda: np.empty(0), repr=False, compare=False)

    # -- formed on first use -------------------------------------------------------------

    @cached_property
    def std_values(self) -> np.ndarray:
        """Completely standardized value of every spec parameter."""
        return (self._structure or _Structure(self.spec)).standardized(self.x)

    @cached_property
    def params(self) -> pd.DataFrame:
        """One row per spec parameter: estimate, SE, z, p, standardized value and its SE."""
        return _parameter_table(self.spec, self.values, self.std_values, self.se_values, self.std_se_values)

    @cached_property
    def p(self) -> float | None:
        return None if self.chi2 is None else fx.chi2_pvalue(self.chi2, self.df)

    @cached_property
    def cfi(self) -> float | None:
        return None if self.chi2 is None else fx.cfi(self.chi2, self.df, self.baseline_chi2, self.baseline_df)

    @cached_property
    def tli(self) -> float | None:
        return None if self.chi2 is None else fx.tli(self.chi2, self.df, self.baseline_chi2, self.baseline_df)

    @cached_property
    def rmsea(self) -> float | None:
        return None if self.chi2 is None else fx.rmsea(self.chi2, self.df, self.n)

    @cached_property
    def rmsea_ci(self) -> list[float] | None:
        return None if self.chi2 is None else fx.rmsea_ci(self.chi2, self.df, self.n)

    @cached_property
    def srmr(self) -> float | None:
        # sample_cov and implied are the matrices the fit compared (copies of them)
        return fx.srmr(self.sample_cov, self.implied)

    # -- lookups -------------------------------------------------------------------------

    def _row(self, op: str, lhs: str, rhs: str) -> int:
        j = self._structure.keymap.get((op, lhs, rhs)) if self._structure else None
        if j is None:
            raise KeyError(f"the model has no parameter {_key_text((op, lhs, rhs))}")
        return j

    def est(self, op: str, lhs: str, rhs: str) -> float:
        return float(self.values[self._row(op, lhs, rhs)])

    def std(self, op: str, lhs: str, rhs: str) -> float:
        return float(self.std_values[self._row(op, lhs, rhs)])

    def se(self, op: str, lhs: str, rhs: str) -> float:
        return float(self.se_values[self._row(op, lhs, rhs)])

    def std_se(self, op: str, lhs: str, rhs: str) -> float:
        return float(self.std_se_values[self._row(op, lhs, rhs)])

    # -- reporting -----------------------------------------------------------------------

    def fit_indices(self) -> dict[str, Any]:
        return {
            "chi2": self.chi2, "df": self.df, "p": self.p, "cfi": self.cfi, "tli": self.tli,
            "rmsea": self.rmsea, "rmsea_ci": None if self.rmsea_ci is None else list(self.rmsea_ci),
            "srmr": self.srmr, "n": self.n, "loglik": self.loglik, "aic": self.aic,
            "bic": self.bic, "baseline_chi2": self.baseline_chi2,
            "baseline_df": self.baseline_df,
        }

    def summary(self) -> str:
        def num(v: Any, fmt: str = ".3f") -> str:
            return "n/a" if v is None or (isinstance(v, float) and not np.isfinite(v)) \
                else format(v, fmt)

        width = 78
        ci = "n/a" if self.rmsea_ci is None else \
            f"[{num(self.rmsea_ci[0])}, {num(self.rmsea_ci[1])}]"
        left = [("Model:", self.spec.name), ("Estimator:", self.estimator.upper()),
                ("Observations:", str(self.n)), ("Free parameters:", str(len(self.x))),
                ("Status:", self.status), ("Starts tried:", str(self.starts_tried)),
                ("Iterations:", str(self.iterations)), ("CPU time (s):", f"{self.elapsed:.3f}")]
        right = [("Chi-square:", num(self.chi2)), ("df:", str(self.df)), ("p:", num(self.p)),
                 ("CFI:", num(self.cfi)), ("TLI:", num(self.tli)), ("RMSEA:", num(self.rmsea)),
                 ("RMSEA 90% CI:", ci), ("SRMR:", num(self.srmr))]
        lines = ["Model fit".center(width), "=" * width]
        for (a, b), (c, d) in zip(left, right, strict=True):
            lines.append(f"{a:<18}{b:>18}    {c:<16}{d:>20}")
        lines.append(f"{'Log-likelihood:':<18}{num(self.loglik):>18}    "
                     f"{'AIC / BIC:':<16}{num(self.aic, '.1f') + ' / ' + num(self.bic, '.1f'):>20}")
        lines.append("=" * width)
        tab = self.params.copy()
        tab["param"] = [_key_text((o, a, b)) for o, a, b in zip(tab["op"], tab["lhs"], tab["rhs"],
                                                                strict=True)]
        tab = tab[["param", "label", "estimate", "se", "z", "p", "std", "std_se"]]
        tab["label"] = tab["label"].fillna("")
        lines.append(tab.to_string(index=False, float_format=lambda v: f"{v:.4f}", na_rep="."))
        lines.append("=" * width)
        for w in self.warnings:
            lines.append(f"Warning: {w}")
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.summary()


# ---------------------------------------------------------------------------------------
# Fitting
# ---------------------------------------------------------------------------------------


def _objective_for(st: _Structure, data: Moments | RawData):
    if isinstance(data, Moments):
        sel = _select(data.names, st.observed)
        return _MLObjective(st, data.cov[np.ix_(sel, sel)], int(data.n))
    if isinstance(data, RawData):
        sel = _select(data.names, st.observed)
        return _FIMLObjective(st, data.X[:, sel])
    if isinstance(data, PatternData):
        return _FIMLObjective(st, data.rows_for(_select(data.names, st.observed)))
    raise TypeError("data must be Moments, RawData or PatternData")


def _check_proper(st: _Structure, x: np.ndarray, S: np.ndarray) -> list[str]:
    """Heywood offenders at x (plain phrases naming each)."""
    out: list[str] = []
    mo = st.moments(x)
    if mo is None:
        return ["I - A is singular (the regression paths form an explosive loop)"]
    Om = mo[1]
    vals = st.values(x)
    scale = np.abs(np.diag(Om)).copy()
    scale[: st.p] = np.diag(S)
    for j, par in enumerate(st.spec.params):
        if par.op == "cov" and par.lhs == par.rhs and par.free:
            i = st.idx[par.lhs]
            if vals[j] <= VAR_TOL * max(scale[i], 1e-12):
                if i < st.p and st.endogenous[i]:
                    what = f"error variance of {par.lhs}"
                elif i >= st.p and st.endogenous[i]:
                    what = f"residual variance of {par.lhs}"
                else:
                    what = f"variance of {par.lhs}"
                out.append(f"{what} is {'zero' if vals[j] == 0 else 'negative'} "
                           f"({vals[j]:.4g})")
    if st.m > st.p:
        L = Om[st.p:, st.p:]
        w = np.linalg.eigvalsh(L)
        if w[0] <= 1e-10 * max(abs(w[-1]), 1e-300):
            out.append("the model-implied covariance matrix of the latent variables is not "
                       "positive definite")
    std = st.standardized(x)
    for j, par in enumerate(st.spec.params):
        if par.op == "load" and np.isfinite(std[j]) and abs(std[j]) > 1.0 + STD_LOAD_TOL:
            out.append(f"standardized loading of {par.rhs} on {par.lhs} is {std[j]:.4g}")
    return out


def _num_jacobian(fun, x: np.ndarray, deadline: _Deadline) -> np.ndarray:
    """Central-difference Jacobian of a vector function."""
    f0 = np.asarray(fun(x))
    J = np.empty((f0.size, x.size))
    for k in range(x.size):
        if deadline.over():
            raise _TimeUp
        h = 1e-6 * max(abs(x[k]), 1.0)
        xp = x.copy()
        xp[k] += h
        xm = x.copy()
        xm[k] -= h
        fp, fm = fun(xp), fun(xm)
        if fp is None or fm is None:
            raise _Infeasible
        J[:, k] = (np.asarray(fp) - np.asarray(fm)) / (2.0 * h)
    return J


def _scaled_min_eig(M: np.ndarray) -> float:
    d = np.diag(M)
    if M.size == 0:
        return 1.0
    if np.any(~np.isfinite(M)) or np.any(d <= 0):
        return 0.0
    s = 1.0 / np.sqrt(d)
    w = np.linalg.eigvalsh(M * np.outer(s, s))
    return float(w[0] / w[-1]) if w[-1] > 0 else 0.0


def fit_model(spec: ModelSpec, data: Moments | RawData, *, time_limit: float = 60.0,
              n_starts: int = 4, start: FitResult | dict[ParamKey, float] | None = None,
              seed: int = 0, compute_se: bool = True) -> FitResult:
    """Fit a model by ML (from :class:`Moments`) or FIML (from :class:`RawData`).

    Starts: ``n_starts`` points, a deterministic data-driven rule first and random
    perturbations of it after (``numpy.random.Generator(seed)``); a ``start`` (a previous
    FitResult or a dict of parameter key -> value, missing keys from the rule) is tried
    before them and counts as one of the ``n_starts``. The best proper solution (lowest
    discrepancy) is kept; if none is proper, the lowest one, with a warning. The whole fit,
    starts and standard errors included, stops after ``time_limit`` seconds of computation
    (CPU time of the calling thread, so the same on a busy or an idle machine): the best
    point so far is returned with ``capped=True`` and status "capped".

    SEs: ML from the expected information ``(N/2) tr(Sigma^-1 Sigma_k Sigma^-1 Sigma_l)``;
    FIML from the observed information (central-difference Hessian of the analytic
    gradient). Standardized SEs by the delta method.
    """
    deadline = _Deadline(time_limit)
    st = _Structure(spec)
    with _single_threaded_blas():
        return _fit(st, data, deadline, n_starts=n_starts, start=start, seed=seed,
                    compute_se=compute_se, warm_x=None)


def refit(previous: FitResult, data: Moments | RawData, *, time_limit: float = 60.0,
          compute_se: bool = False, max_iter: int = 1000) -> FitResult:
    """Refit the same model to new data from the previous estimates, one start (for the
    bootstrap: data are typically a resampled covariance matrix). ``max_iter`` caps the
    scoring steps: a cap in steps, unlike one in seconds, gives the same result however
    busy the machine is."""
    deadline = _Deadline(time_limit)
    st = previous._structure or _Structure(previous.spec)
    warm = np.array(previous.x, dtype=float)
    if previous.means is not None and isinstance(data, RawData):
        warm = np.concatenate([warm, previous.means.to_numpy(dtype=float)])
    with _single_threaded_blas():
        return _fit(st, data, deadline, n_starts=1, start=None, seed=0,
                    compute_se=compute_se, warm_x=warm, max_iter=max_iter)


def _fit(st: _Structure, data: Moments | RawData, deadline: _Deadline, *, n_starts: int,
         start: Any, seed: int, compute_se: bool, warm_x: np.ndarray | None,
         max_iter: int = 1000) -> FitResult:
    """The fit in its phases: the moments to start from, the starting points, a run from
    each, the best solution, its standard errors, the parameter table, the fit statistics
    and the status flags."""
    obj = _objective_for(st, data)
    fiml = isinstance(obj, _FIMLObjective)
    warnings: list[str] = []
    m = _start_moments(obj, deadline, warnings)
    capped = m.capped
    starts, warm_full = _candidate_starts(st, obj, m, start=start, seed=seed, n_starts=n_starts,
                                          warm_x=warm_x)
    runs, tried, capped = _run_starts(st, obj, m, starts, warm_full, deadline, capped=capped,
                                      max_iter=max_iter, warm=warm_x is not None)
    best, heywood = _best_run(st, obj, runs, warnings)

    x_all = best.x
    x = x_all[: st.q]
    E, Om = st.moments(x)
    Sig = Om[: st.p, : st.p]
    vals = st.values(x)
    se = _standard_errors(st, obj, best, vals, st.param_unit(Om), deadline, compute_se=compute_se,
                          capped=capped)
    capped = se.capped
    stats_ = _fit_statistics(st, obj, best, m, warnings)
    info_failed = se.info_failed
    identified = not info_failed and not se.se_failed
    if stats_["df"] < 0:
        info_failed.append(f"it has more free parameters ({st.q}) than the {st.p * (st.p + 1) // 2} "
                           "variances and covariances it explains")
        identified = False
    converged = best.success and not best.capped
    status = _status_and_warnings(best, heywood, warnings, deadline, capped=capped, converged=converged,
                                  identified=identified, tried=tried, n_starts=len(starts),
                                  unidentified=info_failed + se.se_failed)

    means = pd.Series(x_all[st.q:], index=list(st.observed), name="mean") if fiml else None
    return FitResult(
        spec=st.spec, estimator=obj.estimator, n=obj.n, converged=converged, proper=not heywood,
        identified=identified, capped=capped, status=status, warnings=warnings,
        heywood=heywood, elapsed=deadline.elapsed(), starts_tried=tried,
        iterations=best.iterations, x=x.copy(),
        implied=Sig.copy(), all_cov=pd.DataFrame(Om, index=list(st.names), columns=list(st.names)),
        sample_cov=np.array(m.S_ref), means=means, **stats_, fmin=float(best.f),
        param_cov=se.param_cov, param_cov_all=se.param_cov_all, _structure=st,
        values=vals, se_values=_se_per_param(st, se.se_free), std_se_values=se.std_se)


@dataclass
class _StartMoments:
    """The covariance matrix the starts are made from and the one fit is judged against
    (ML: the sample's; FIML: the saturated model's EM estimate), and FIML's saturated fit."""

    fiml: bool
    S_start: np.ndarray
    S_ref: np.ndarray
    sat: Any          # FIML: (means, covariance, log-likelihood) of the saturated model, or None
    capped: bool      # the saturated model ran out of time

    def with_means(self, obj: Any, x: np.ndarray) -> np.ndarray:
        """A parameter vector with FIML's saturated means appended (ML: unchanged)."""
        if not self.fiml:
            return x
        mu = obj.ac_mean if self.sat is None else self.sat[0]
        return np.concatenate([x, mu])


def _start_moments(obj: Any, deadline: _Deadline, warnings: list[str]) -> _StartMoments:
    if not isinstance(obj, _FIMLObjective):
        return _StartMoments(False, obj.S, obj.S, None, False)
    if obj.dropped:
        warnings.append(f"{obj.dropped} rows with no answer on any of the model's "
                        "variables were left out.")
    sat = obj.saturated(deadline)
    S_start = np.diag(obj.ac_var) if sat is None else sat[1]
    return _StartMoments(True, S_start, S_start, sat, sat is None)


def _candidate_starts(st: _Structure, obj: Any, m: _StartMoments, *, start: Any, seed: int,
                      n_starts: int, warm_x: np.ndarray | None) -> tuple[list[np.ndarray], np.ndarray | None]:
    """The starting points: a warm start alone, or the given start, the data-driven rule and
    random perturbations of it, ``n_starts`` in all; and FIML's full warm vector (with means)."""
    starts: list[np.ndarray] = []
    warm_full = None
    if warm_x is not None:
        starts.append(warm_x[: st.q])
        if m.fiml and len(warm_x) == obj.nx:
            warm_full = warm_x
        return starts, warm_full
    rule = _rule_start(st, m.S_start)
    if start is not None:
        starts.append(_start_from(st, start, rule))
    starts.append(rule)
    rng = np.random.Generator(np.random.PCG64(seed))
    while len(starts) < max(n_starts, 1):
        starts.append(_perturb(st, rule, m.S_start, rng))
    return starts[: max(n_starts, 1)], warm_full


def _run_starts(st: _Structure, obj: Any, m: _StartMoments, starts: list[np.ndarray],
                warm_full: np.ndarray | None, deadline: _Deadline, *, capped: bool, max_iter: int,
                warm: bool) -> tuple[list[tuple[_Run, list[str]]], int, bool]:
    """A run of the optimizer from each start until the deadline: (run, its Heywood cases)
    for each start that began inside the admissible region, the starts tried, and capped."""
    runs: list[tuple[_Run, list[str]]] = []
    tried = 0
    safe_full = m.with_means(obj, _safe_start(st, m.S_start))
    for k, x0 in enumerate(starts):
        if runs and (capped or deadline.over()):
            capped = True
            break
        xs = warm_full if (k == 0 and warm_full is not None) else m.with_means(obj, x0)
        xs = _feasible(obj, xs, safe_full)
        tried += 1
        if xs is None:
            continue
        # Even past the deadline the first start is evaluated, so there is a point to report.
        # A warm start is near a solution: begin with almost undamped scoring steps.
        run = _optimize(obj, xs, deadline, max_iter=max_iter, lam0=1e-6 if warm else 1e-3)
        if run is None:
            continue
        runs.append((run, _check_proper(st, run.x[: st.q], m.S_ref)))
        if run.capped:
            capped = True
            break
    if not runs:
        raise DataError(f"{st.spec.name}: no starting point gave a positive definite "
                        "model-implied covariance matrix; check the fixed values of the model")
    return runs, tried, capped


def _best_run(st: _Structure, obj: Any, runs: list[tuple[_Run, list[str]]],
              warnings: list[str]) -> tuple[_Run, list[str]]:
    """The proper run with the lowest discrepancy (any run when none is proper)."""
    proper_runs = [r for r in runs if not r[1]]
    pool = proper_runs or runs
    best, heywood = min(pool, key=lambda r: r[0].f)
    if not proper_runs and len(runs) > 1:
        warnings.append(f"None of the {len(runs)} starting points gave a proper solution; "
                        "the one with the lowest discrepancy is reported.")
    done = [r for r, hw in runs if r.success and not hw]
    if len(done) > 1:
        fs = [r.f for r in done]
        spread = (max(fs) - min(fs)) * obj.n
        if spread > 0.01:
            warnings.append(f"Starting points reached different solutions (chi-square spread "
                            f"{spread:.3g}); the best one is reported.")
    return best, heywood


@dataclass
class _StandardErrors:
    se_free: np.ndarray          # per free parameter (NaN without compute_se)
    std_se: np.ndarray           # per spec parameter, of the standardized value
    param_cov: np.ndarray | None
    param_cov_all: np.ndarray | None
    info_failed: list[str]       # why the information matrix says unidentified
    se_failed: list[str]         # standard errors that exploded
    capped: bool


def _standard_errors(st: _Structure, obj: Any, best: _Run, vals: np.ndarray, unit: np.ndarray,
                     deadline: _Deadline, *, compute_se: bool, capped: bool) -> _StandardErrors:
    """Standard errors from the information matrix (FIML: observed, by numerical
    differentiation; ML: expected), and the identification checks made on them."""
    q = st.q
    x_all = best.x
    x = x_all[:q]
    se_free = np.full(q, np.nan)
    std_se = np.full(len(vals), np.nan)
    info = None
    param_cov = None
    param_cov_all = None
    info_failed: list[str] = []
    se_failed: list[str] = []
    if isinstance(obj, _FIMLObjective) and compute_se and not capped:
        try:
            obj.deadline = deadline
            H = _num_jacobian(obj.gradient, x_all, deadline)
            info = (obj.n / 2.0) * (H + H.T) / 2.0
        except _TimeUp:
            capped = True
            info = None
        except _Infeasible:
            info = None
            info_failed.append("the observed information could not be computed (a numerical "
                               "step left the positive definite region)")
        finally:
            obj.deadline = None
    else:
        info = (obj.n / 2.0) * best.H
    if info is not None:
        eig = _scaled_min_eig(info)
        if eig <= EIG_TOL:
            info_failed.append(f"the information matrix is singular (smallest scaled "
                               f"eigenvalue {eig:.2g})")
        else:
            try:
                cov_all = np.linalg.inv(info)
                cov_t = cov_all[:q, :q]
                d = np.diag(cov_t)
                if np.any(d <= 0) or not np.all(np.isfinite(d)):
                    info_failed.append("the information matrix is not positive definite")
                else:
                    param_cov = (cov_t + cov_t.T) / 2.0
                    param_cov_all = (cov_all + cov_all.T) / 2.0
                    se_free = np.sqrt(d)
            except np.linalg.LinAlgError:
                info_failed.append("the information matrix cannot be inverted")
    if param_cov is not None:
        free = st.pidx >= 0
        se_spec = np.full(len(vals), np.nan)
        se_spec[free] = se_free[st.pidx[free]]
        scale = np.maximum(np.abs(vals), unit)
        bad = free & (se_spec > SE_RATIO_MAX * scale)
        for j in np.flatnonzero(bad)[:5]:
            se_failed.append(f"the SE of {_key_text(st.spec.params[j].key)} "
                             f"({se_spec[j]:.3g}) is more than {SE_RATIO_MAX:g} times its scale")
        if compute_se and not capped:
            try:
                if deadline.over():
                    raise _TimeUp
                J = st.standardized_jacobian(x)
                cs = np.einsum("ik,kl,il->i", J, param_cov, J)
                std_se = np.sqrt(np.where(cs >= 0, cs, np.nan))
                big = np.flatnonzero(std_se > STD_SE_MAX)
                for j in big[:5]:
                    se_failed.append(f"the standardized SE of {_key_text(st.spec.params[j].key)}"
                                     f" is {std_se[j]:.3g}")
            except _TimeUp:
                capped = True
    if not compute_se:
        se_free = np.full(q, np.nan)
    return _StandardErrors(se_free, std_se, param_cov, param_cov_all, info_failed, se_failed, capped)


def _parameter_table(spec: ModelSpec, vals: np.ndarray, std: np.ndarray, se_col: np.ndarray,
                     std_se: np.ndarray) -> pd.DataFrame:
    """One row per spec parameter: estimate, SE, z, p, standardized value and its SE."""
    free = np.array([p.free for p in spec.params], dtype=bool)
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.where(free, vals / se_col, np.nan)
    pval = np.where(np.isfinite(z), 2.0 * stats.norm.sf(np.abs(z)), np.nan)
    return pd.DataFrame({
        "op": [p.op for p in spec.params],
        "lhs": [p.lhs for p in spec.params],
        "rhs": [p.rhs for p in spec.params],
        "label": [p.label for p in spec.params],
        "free": [p.free for p in spec.params],
        "estimate": vals,
        "se": se_col,
        "z": z,
        "p": pval,
        "std": std,
        "std_se": std_se,
    })


def _se_per_param(st: _Structure, se_free: np.ndarray) -> np.ndarray:
    """The free parameters' SEs spread over the spec's parameters (NaN where fixed)."""
    free = st.pidx >= 0
    se_col = np.full(len(st.pidx), np.nan)
    se_col[free] = se_free[st.pidx[free]]
    return se_col


def _fit_statistics(st: _Structure, obj: Any, best: _Run, m: _StartMoments,
                    warnings: list[str]) -> dict[str, Any]:
    """Chi-square against the saturated model and the baseline, log-likelihood, AIC and BIC,
    as FitResult's fields of those names (the indices formed from them, CFI, TLI, RMSEA with
    its interval, SRMR and the p-value, are FitResult's properties, formed on first use)."""
    n = obj.n
    p = st.p
    q = st.q
    moments_count = p * (p + 1) // 2
    df = moments_count - q
    base_df = p * (p - 1) // 2
    k_total = q + p  # means are estimated (saturated) in the log-likelihood
    sat = m.sat
    if m.fiml:
        ll = obj.loglik(best.f)
        if sat is not None:
            chi2 = max(-2.0 * (ll - sat[2]), 0.0)
            base_chi2 = max(-2.0 * (obj.baseline_loglik() - sat[2]), 0.0)
        else:
            chi2 = base_chi2 = None
    else:
        chi2 = max(n * best.f, 0.0)
        ll = -0.5 * n * (best.f + obj.logdet_s + p + p * LOG2PI)
        base_f = float(np.sum(np.log(np.diag(obj.S)))) - obj.logdet_s
        base_chi2 = n * base_f
    if chi2 is None:
        warnings.append("The saturated model could not be fitted in time, so chi-square "
                        "based fit indices are not available.")
    aic = -2.0 * ll + 2.0 * k_total
    bic = -2.0 * ll + k_total * math.log(n)
    return {"chi2": None if chi2 is None else float(chi2), "df": int(df), "loglik": float(ll),
            "aic": float(aic), "bic": float(bic),
            "baseline_chi2": None if base_chi2 is None else float(base_chi2), "baseline_df": int(base_df)}


def _status_and_warnings(best: _Run, heywood: list[str], warnings: list[str], deadline: _Deadline, *,
                         capped: bool, converged: bool, identified: bool, tried: int, n_starts: int,
                         unidentified: list[str]) -> str:
    """The fit's status (the first of capped, not_converged, unidentified, improper, else ok),
    with a plain sentence in ``warnings`` for each flag that is raised."""
    if capped:
        limit = deadline.end - deadline.t0
        warnings.insert(0, f"The fit was stopped at its time limit of {limit:g} s after "
                        f"{tried} of {n_starts} starting points; the estimates are the best "
                        "point reached and may not be a solution.")
    if not converged and not best.capped:
        ridge = (f"; the discrepancy improved by less than {STALL_F:g} in {STALL_WINDOW} "
                 "iterations, a flat ridge typical of a model the data do not identify"
                 if best.stalled else "")
        warnings.append(f"The optimizer did not converge (largest scaled gradient "
                        f"{_scaled_grad(best.g, best.H):.2g} after {best.iterations} "
                        f"iterations{ridge}).")
    if heywood:
        warnings.append("Improper solution (Heywood case): " + "; ".join(heywood) + ".")
    if unidentified:
        warnings.append("The model looks unidentified: " + "; ".join(unidentified) + ".")
    if capped:
        return "capped"
    if not converged:
        return "not_converged"
    if not identified:
        return "unidentified"
    if heywood:
        return "improper"
    return "ok"


def delta_method(fit: FitResult, fun: Callable[[np.ndarray], float],
                 cov: np.ndarray | None = None, *, time_limit: float = 10.0) -> tuple[float, float | None]:
    """A function of the completely standardized parameter values (the ``std`` column, in
    spec order) with its delta-method standard error: sqrt(J V J'), J the gradient of ``fun``
    over the free parameters (its central-difference gradient over the standardized values
    times their analytic Jacobian) and V their covariance (``fit.param_cov`` unless another,
    e.g. a robust one, is given). SE None without a covariance."""
    st = fit._structure or _Structure(fit.spec)
    std = st.standardized(fit.x)
    value = float(fun(std))
    V = fit.param_cov if cov is None else cov
    if V is None or not math.isfinite(value):
        return value, None
    # chain rule: fun's central-difference gradient over the standardized values it reads
    # (cheap: no model moments) times their analytic Jacobian over the free parameters
    try:
        used = np.flatnonzero(np.isfinite(std))
        grad = np.zeros(len(std))
        if used.size:
            def over_used(s: np.ndarray) -> np.ndarray:
                full = std.copy()
                full[used] = s
                return np.atleast_1d(fun(full))

            grad[used] = _num_jacobian(over_used, std[used], _Deadline(time_limit))[0]
    except (_TimeUp, _Infeasible):
        return value, None
    read = np.flatnonzero(grad)
    J = grad[read] @ st.standardized_jacobian(fit.x)[read]
    var = float(J @ V @ J)
    return value, (math.sqrt(var) if var >= 0 and math.isfinite(var) else None)


__all__ = ["Moments", "RawData", "FitResult", "fit_model", "refit", "delta_method", "Param"]
