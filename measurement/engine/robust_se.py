"""Robust (sandwich) standard errors for ML and FIML fits.

Normal-theory standard errors come from the inverse information matrix A^-1. When the
items are not normal (skewed or few-category answers, as survey items are), those SEs are
too small or too large; the sandwich A^-1 B A^-1, with B the sum over respondents of the
outer products of their casewise scores, stays consistent under non-normality (Huber 1967;
White 1982; for covariance structures Browne 1984, and for incomplete data with FIML
Yuan & Bentler 2000). With complete data and saturated means this is the same estimator as
Browne's (1984) asymptotically distribution-free "sandwich" around the normal-theory
weight matrix, which the tests compute by hand from fourth-order moments.

Casewise score of respondent i (observed variables o, deviation d = x_o - mu_o):

    l_i = -1/2 [log|Sigma_oo| + d' Sigma_oo^-1 d]
    dl_i/dSigma = -1/2 W_i + 1/2 u_i u_i',   W_i = Sigma_oo^-1 (embedded), u_i = W_i d
    dl_i/dmu    = u_i

and dl_i/dtheta_k = tr(dl_i/dSigma . dSigma/dtheta_k), from the engine's derivative vectors.

With complete rows and the sample means (ML on a covariance matrix), each score is a quadratic
form in the row's deviations, s_ik = d_i' Q_k d_i - c_k, so the meat B = sum_i s_i s_i' needs
only the rows' fourth-order moments: with v_i the products d_ij d_il (j <= l) of a row,
B = Q'(sum v v')Q - (Q' sum v) c' - c (sum v)'Q + n c c'. :func:`pair_moments` forms sum v v'
once for the rows (two passes over ItemRows, a block of rows at a time: the means, then the
pair products), and every model fitted to those rows or to a subset of their columns takes
its meat from it, without another pass over the rows. FIML's casewise scores are summed a
block of rows at a time too.
"""

from __future__ import annotations

import math
import threading
from collections.abc import Iterator, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from samesource.engine.fitting import (  # the engine's own helpers
    FitResult,
    _Deadline,
    _num_jacobian,
    _single_threaded_blas,
    _Structure,
    _TimeUp,
    delta_method,
)
from samesource.engine.patterns import row_patterns, rows_by_pattern
from samesource.input.rows import FrameRows, ItemRows, map_in_threads


@dataclass(frozen=True)
class RobustSE:
    """Sandwich covariance of a fit's free parameters, and SEs per spec parameter."""

    fit: FitResult
    cov: np.ndarray          # free parameters (theta block)
    se: np.ndarray           # per spec parameter, raw scale (NaN for fixed ones)
    std_se: np.ndarray       # per spec parameter, completely standardized (delta method)

    def std_se_of(self, op: str, lhs: str, rhs: str) -> float:
        return float(self.std_se[self.fit._row(op, lhs, rhs)])

    def se_of(self, op: str, lhs: str, rhs: str) -> float:
        return float(self.se[self.fit._row(op, lhs, rhs)])

    def delta(self, fun) -> tuple[float, float | None]:
        return delta_method(self.fit, fun, self.cov)


@dataclass(frozen=True)
class PairMoments:
    """Moments of complete rows up to the fourth order, for sandwich meats: with d_i a row's
    deviation from the column means and v_i its pair products d_ij d_il (j <= l, in
    ``np.triu_indices`` order), ``sums`` = sum_i v_i and ``cross`` = sum_i v_i v_i'."""

    names: tuple[str, ...]
    n: int
    mean: np.ndarray   # (p,)
    sums: np.ndarray   # (p(p+1)/2,)
    cross: np.ndarray  # (p(p+1)/2, p(p+1)/2)

    def pair_index(self) -> np.ndarray:
        """(p, p) symmetric: the position in v of the product of columns j and l."""
        p = len(self.names)
        iu, ju = np.triu_indices(p)
        out = np.empty((p, p), dtype=np.intp)
        out[iu, ju] = out[ju, iu] = np.arange(iu.size)
        return out


def pair_products(D: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
    """The products D[:, j] * D[:, l] of every pair j <= l of columns, in ``np.triu_indices``
    order: column j times columns j..p-1, one broadcast product per column instead of two
    gathers of p(p+1)/2 columns (the same products, several times faster)."""
    n, p = D.shape
    if out is None:
        out = np.empty((n, p * (p + 1) // 2))
    at = 0
    for j in range(p):
        np.multiply(D[:, j:j + 1], D[:, j:], out=out[:, at:at + p - j])
        at += p - j
    return out


# Rows per block of pair products (at 25 columns, 325 products: about 40 MB a block).
PAIR_BLOCK_ROWS = 16_384


def as_rows(X: np.ndarray | ItemRows, names: Sequence[str]) -> ItemRows:
    """``X`` as :class:`~samesource.input.rows.ItemRows` (an array's columns named ``names``)."""
    if isinstance(X, ItemRows):
        return X
    X = np.asarray(X, dtype=float)
    if X.ndim != 2 or X.shape[1] != len(names):
        raise ValueError(f"rows are {X.shape}, expected {len(names)} columns")
    return FrameRows(pd.DataFrame(X, columns=list(names), copy=False))


def pair_moments(rows: ItemRows | np.ndarray, names: Sequence[str] | None = None, *,
                 threads: int | None = None) -> PairMoments:
    """:class:`PairMoments` of complete rows: ``rows`` an :class:`~samesource.input.rows.ItemRows`
    (``names``: the columns to use, default all) or an array whose columns ``names`` names.
    Two passes over the rows, a block at a time: the column means, then the pair products
    of the deviations. Raises ``ValueError`` when a cell is missing (FIML's scores need the
    rows). ``threads``: how many threads form the pair products (default
    :func:`~samesource.input.rows.block_threads`); the sums do not depend on it (each block's
    are added in the blocks' order).

    Whole-number answers (survey items) take the exact way (:func:`_whole_number_sums`): the
    sums of products of their integer deviations from whole-number shifts, in single precision
    where every partial sum is an integer below 2**24 (so exact, and twice as fast as double
    precision), centred on the means afterwards."""
    if not isinstance(rows, ItemRows):
        if names is None:
            raise ValueError("an array of rows needs its column names")
        rows, names = as_rows(rows, names), None
    cols = list(rows.names) if names is None else list(names)
    p = len(cols)
    n = 0
    total = np.zeros(p)
    whole = True
    lo, hi = np.full(p, np.inf), np.full(p, -np.inf)
    for _, X in rows.blocks(cols, size=PAIR_BLOCK_ROWS):
        if np.isnan(X).any():
            raise ValueError("pair moments need complete rows")
        n += X.shape[0]
        total += X.sum(axis=0)
        if whole and X.size:
            whole = bool(np.all(X == np.rint(X)))
            np.minimum(lo, X.min(axis=0), out=lo)
            np.maximum(hi, X.max(axis=0), out=hi)
    if n == 0:
        raise ValueError("pair moments need at least one row")
    mean = total / n
    shift = np.rint(mean)
    block = _exact_block_rows(lo - shift, hi - shift) if whole else 0
    if block:
        sums, cross = _whole_number_sums(rows, cols, n, shift, mean - shift, min(n, block), threads)
    else:
        sums, cross = _pair_sums(rows, cols, n, mean, min(n, PAIR_BLOCK_ROWS), threads)
    return PairMoments(names=tuple(cols), n=n, mean=mean, sums=sums, cross=cross)


# Single precision holds every integer up to 2**24 exactly.
_EXACT_SINGLE = 2 ** 24


def _exact_block_rows(low: np.ndarray, high: np.ndarray) -> int:
    """Rows per block for which the single-precision sums of products of integer deviations
    from ``low`` to ``high`` (per column) are exact: each product of four deviations is at most
    K**4 (K the largest deviation), so a block's sums stay below 2**24 with 2**24 / K**4 rows;
    0 when that is too few rows for the exact way to pay (deviations beyond about 11)."""
    k = max(float(np.max(np.abs(low))), float(np.max(np.abs(high))), 1.0)
    rows = int((_EXACT_SINGLE - 1) // k ** 4)
    return min(rows, PAIR_BLOCK_ROWS) if rows >= 1024 else 0


def _pair_sums(rows: ItemRows, cols: list[str], n: int, mean: np.ndarray, block: int, threads: int | None
               ) -> tuple[np.ndarray, np.ndarray]:
    """sum_i v_i and sum_i v_i v_i' of the pair products v of the rows' deviations from
    ``mean`` over the ``n`` rows, a block of ``block`` rows at a time."""
    q = len(cols) * (len(cols) + 1) // 2
    buffers = _Buffers((block, q), np.float64)

    def one(X: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        V = pair_products(X - mean, out=buffers.get()[:len(X)])
        return V.sum(axis=0), V.T @ V  # one symmetric rank-k update (numpy hands A'A to syrk)

    sums, cross = np.zeros(q), np.zeros((q, q))
    for s, c in _over_blocks(rows, cols, n, block, one, threads):
        sums += s
        cross += c
    return sums, cross


def _whole_number_sums(rows: ItemRows, cols: list[str], n: int, shift: np.ndarray, offset: np.ndarray,
                       block: int, threads: int | None) -> tuple[np.ndarray, np.ndarray]:
    """:func:`_pair_sums` of whole-number rows, exactly: with d = x - ``shift`` (integers) and
    w = (1, d, the pair products of d), G = sum_i w_i w_i' holds every sum of products of up
    to four deviations, formed in single precision a block of ``block`` rows at a time (each
    block's sums are integers below 2**24, so exact whatever the order of the additions) and
    added in double precision (exact too). The centred pair products are v = T w with
    ``offset`` = mean - shift, since (d_j - o_j)(d_l - o_l) = d_j d_l - o_l d_j - o_j d_l + o_j o_l,
    so sum v = T G e_0 and sum v v' = T G T'."""
    p = len(cols)
    q = p * (p + 1) // 2
    m = 1 + p + q
    buffers = _Buffers((block, m), np.float32, first=1.0)

    def one(X: np.ndarray) -> np.ndarray:
        W = buffers.get()[:len(X)]
        np.subtract(X, shift, out=W[:, 1:1 + p], casting="same_kind")
        pair_products(W[:, 1:1 + p], out=W[:, 1 + p:])
        return W.T @ W

    G = np.zeros((m, m))
    for g in _over_blocks(rows, cols, n, block, one, threads):
        G += g
    a, b = np.triu_indices(p)
    T = np.zeros((q, m))
    T[:, 0] = offset[a] * offset[b]
    np.add.at(T, (np.arange(q), 1 + a), -offset[b])
    np.add.at(T, (np.arange(q), 1 + b), -offset[a])
    T[np.arange(q), 1 + p + np.arange(q)] = 1.0
    return T @ G[:, 0], T @ G @ T.T


class _Buffers:
    """One work array per thread, reused from block to block: formed afresh per block, a 42 MB
    array of pair products was most of the pass's system time. ``first``: the value of every
    row's first cell, set once."""

    def __init__(self, shape: tuple[int, int], dtype, first: float | None = None) -> None:
        self.shape, self.dtype, self.first, self.local = shape, dtype, first, threading.local()

    def get(self) -> np.ndarray:
        buf = getattr(self.local, "buf", None)
        if buf is None:
            buf = self.local.buf = np.empty(self.shape, dtype=self.dtype)
            if self.first is not None:
                buf[:, 0] = self.first
        return buf


def _over_blocks(rows: ItemRows, cols: list[str], n: int, block: int, one, threads: int | None) -> Iterator:
    """``one(X)`` of each block of ``block`` rows (of ``n``; one block is formed in this thread),
    in the blocks' order, worked out in threads
    (:func:`~samesource.input.rows.map_in_threads`)."""
    blocks = (X for _, X in rows.blocks(cols, size=block))
    # One BLAS thread per thread, as in the fits: on two busy cores OpenBLAS's own second thread
    # made this product 4 to 16 times slower (measured), not faster. Our own threads instead
    # split the blocks (numpy releases the GIL in the products).
    with _single_threaded_blas():
        yield from map_in_threads(one, blocks, 1 if n <= block else threads)


def _meat_from_pairs(fit: FitResult, pm: PairMoments) -> np.ndarray | None:
    """The scores' cross-products sum_i s_i s_i' of an ML fit (free parameters), from the
    rows' :class:`PairMoments` (see the module docstring); None when the fit's variables are
    not all among them."""
    st = fit._structure or _Structure(fit.spec)
    pos = {n: i for i, n in enumerate(pm.names)}
    if any(o not in pos for o in st.observed):
        return None
    E, Om = st.moments(fit.x)
    p = st.p
    Amat, Bmat = st.deriv_vectors(E, Om)
    W = np.linalg.inv(Om[:p, :p])
    alpha, beta = W @ Amat, W @ Bmat           # d'W a_k and d'W b_k: the score's two factors
    c = np.sum(Amat * beta, axis=0)
    a, b = np.triu_indices(p)
    Q = alpha[a] * beta[b] + np.where((a != b)[:, None], alpha[b] * beta[a], 0.0)
    Qz, cz = Q @ st.Z.T, st.Z @ c              # onto the free parameters
    idx = np.array([pos[o] for o in st.observed], dtype=np.intp)
    sel = pm.pair_index()[idx[a], idx[b]]
    G = pm.cross[np.ix_(sel, sel)]
    t = Qz.T @ pm.sums[sel]
    return Qz.T @ G @ Qz - np.outer(t, cz) - np.outer(cz, t) + pm.n * np.outer(cz, cz)


def casewise_scores(fit: FitResult, X: np.ndarray | ItemRows) -> np.ndarray:
    """Scores of every respondent's log-likelihood with respect to the fit's estimated
    quantities: the free parameters, then (FIML) the saturated means. ``X`` has the rows the
    model was fitted to: an array with columns in ``fit.spec.observed`` order, NaN for a
    missing answer, or ItemRows holding those columns. At the ML estimate they sum to (about)
    zero over respondents."""
    return np.vstack(list(_score_blocks(fit, X)))


# Rows per block of scores: a block's arrays stay a few tens of MB however many rows there are.
SCORE_BLOCK_ROWS = 65_536


def _score_blocks(fit: FitResult, X: np.ndarray | ItemRows, block: int = SCORE_BLOCK_ROWS
                  ) -> Iterator[np.ndarray]:
    """:func:`casewise_scores` a block of rows at a time (the same rows, in order; rows with
    no answer on the model's variables are left out, as the fit left them out)."""
    st = fit._structure or _Structure(fit.spec)
    cols = list(st.observed)
    rows = as_rows(X, cols)
    E, Om = st.moments(fit.x)
    p = st.p
    Sig = Om[:p, :p]
    Amat, Bmat = st.deriv_vectors(E, Om)
    fiml = fit.means is not None
    if fiml:
        mu = fit.means.to_numpy(dtype=float)
    else:  # an ML fit: its rows' means (a first pass)
        total, count = np.zeros(p), 0
        for _, Xb in rows.blocks(cols, size=block):
            Xb = Xb[~np.isnan(Xb).all(axis=1)]
            total += Xb.sum(axis=0)
            count += Xb.shape[0]
        mu = total / max(count, 1)
    weights: dict[bytes, tuple[np.ndarray, np.ndarray]] = {}  # per pattern: W and its constant
    for _, Xb in rows.blocks(cols, size=block):
        ob = ~np.isnan(Xb)
        keep = ob.any(axis=1)
        if not keep.all():
            Xb, ob = Xb[keep], ob[keep]
        n = Xb.shape[0]
        s_theta = np.zeros((n, Amat.shape[1]))
        s_mu = np.zeros((n, p))
        pats, inv = row_patterns(ob)
        for pat, sel in zip(pats, rows_by_pattern(inv, len(pats)), strict=True):
            key = pat.tobytes()
            if key not in weights:
                o = np.flatnonzero(pat)
                W = np.zeros((p, p))
                W[np.ix_(o, o)] = np.linalg.inv(Sig[np.ix_(o, o)])
                weights[key] = (W, np.sum(Amat * (W @ Bmat), axis=0))
            W, c = weights[key]
            D = np.where(ob[sel], Xb[sel] - mu, 0.0)
            U = D @ W
            s_theta[sel] = (U @ Amat) * (U @ Bmat) - c
            s_mu[sel] = U
        scores = s_theta @ st.Z.T
        yield np.hstack([scores, s_mu]) if fiml else scores


def robust_se(fit: FitResult, X: np.ndarray | ItemRows | PairMoments, *,
              time_limit: float = 30.0) -> RobustSE | None:
    """Sandwich SEs of a fit from the rows it was fitted to (an array with columns in
    ``fit.spec.observed`` order, or ItemRows holding those columns; see the module docstring,
    the casewise scores summed a block of rows at a time), or,
    for an ML fit to complete rows, from their :class:`PairMoments` (the same numbers without
    a pass over the rows).

    None when the fit has no information matrix to invert (unidentified, capped), or when
    the standardized SEs could not be computed in ``time_limit`` seconds.
    """
    A_inv = fit.param_cov_all if fit.param_cov_all is not None else fit.param_cov
    if A_inv is None:
        return None
    SS = None  # the scores' cross-products
    if isinstance(X, PairMoments):
        if fit.means is not None:
            raise ValueError("a FIML fit's scores need its rows, not pair moments")
        SS = _meat_from_pairs(fit, X)
        if SS is None:
            raise ValueError(f"pair moments lack some of {fit.spec.name}'s variables")
        if SS.shape[0] != A_inv.shape[0]:
            return None
    else:
        for S in _score_blocks(fit, X):  # block by block
            if S.shape[1] != A_inv.shape[0]:
                return None   # an ML fit's inverse information covers the parameters only
            SS = S.T @ S if SS is None else SS + S.T @ S
        if SS is None:
            return None
    V = A_inv @ SS @ A_inv
    q = fit.x.size
    cov = (V[:q, :q] + V[:q, :q].T) / 2.0
    st = fit._structure or _Structure(fit.spec)
    free = st.pidx >= 0
    d = np.diag(cov)
    se = np.full(len(st.spec.params), np.nan)
    se[free] = np.sqrt(np.where(d >= 0, d, np.nan))[st.pidx[free]]
    try:
        J = _num_jacobian(st.standardized, fit.x, _Deadline(time_limit))
    except _TimeUp:
        return None
    cs = np.einsum("ik,kl,il->i", J, cov, J)
    std_se = np.sqrt(np.where(cs >= 0, cs, np.nan))
    return RobustSE(fit=fit, cov=cov, se=se, std_se=std_se)


def se_ratio(robust: float | None, information: float | None) -> float | None:
    """Robust SE over normal-theory SE (None when either is missing)."""
    if robust is None or information is None or not (information > 0) or not math.isfinite(robust):
        return None
    return float(robust / information)
