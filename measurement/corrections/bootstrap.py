"""Nonparametric case-resampling bootstrap with percentile and BCa intervals.

Method (Efron & Tibshirani 1993, *An Introduction to the Bootstrap*):

* Replicates: rows drawn with replacement, n of n (ch. 6), each replicate from its own seed
  streams, so the replicates are bit-for-bit the same whatever the executor, the number of
  workers, the chunk size or how the rows are read. The n draws are split over fixed draw
  blocks of :data:`DRAW_ROWS` row positions, exactly: how many draws fall in each block is one
  multinomial over the blocks' sizes (from ``SeedSequence(seed, spawn_key=(r, TOTALS_KEY))``),
  and block b's draws are uniform over its rows (from ``SeedSequence(seed, spawn_key=(r,))``
  for block 0 and ``(r, b)`` for the others). A multinomial of n draws over n rows is
  the same distribution as a multinomial over blocks followed, within each block, by one
  over its rows (the multinomial's grouping property), so a replicate is the usual n-of-n
  resample; its draw counts are formed one block at a time (memory of one block per
  replicate, not of n rows). With n at most one block (every survey under 65,536 rows) the
  draws are those of ``SeedSequence(seed).spawn(n_boot)[r]``: ``integers(0, n, n)``.
* Percentile interval: the alpha/2 and 1 - alpha/2 quantiles of the successful replicates
  (ch. 13), with numpy's default (linear) quantile, the one scipy.stats.bootstrap uses.
* BCa interval (Efron 1987, JASA 82:171-185; Efron & Tibshirani 1993, ch. 14, section 14.3):
  the quantiles at levels ``Phi(z0 + (z0 + z_a) / (1 - a (z0 + z_a)))``, with the bias
  correction ``z0 = Phi^-1(share of replicates below the estimate)`` (ties count one half,
  as in scipy) and the acceleration ``a = sum U^3 / (6 (sum U^2)^1.5)`` from jackknife
  influence values ``U``.
* The jackknife for ``a``: with n rows at most ``jackknife_groups``, the ordinary delete-one
  jackknife (n refits). Beyond that, a delete-a-group jackknife: rows are split at random
  (from the seed) into G groups of near-equal size m and each group is deleted in turn, so the
  cost is G refits, not n (the grouped jackknife: Efron 1982, *The Jackknife, the Bootstrap
  and Other Resampling Plans*; Shao & Tu 1995, *The Jackknife and Bootstrap*, on deleting d
  rows at a time). ``U_g = (n - m_g)(mean of the deleted-group estimates - theta_(g))`` is
  then about the sum of the delete-one influence values in group g; those sums have
  third/second moment ratio ``n m3 / (n m2)^1.5``, the same as n single values, so ``a``
  estimates the same quantity, with more noise the fewer the groups.

* Weighted cross-products (measurement/corrections/replicate_moments.py): when the data have no missing
  cell and the statistic needs only the rows' moments (it has ``from_moments``, as the path
  estimator does), a replicate is not materialised: its draw counts (the same draws, from the
  same seed, counted) weight one matrix product per batch of replicates, and the jackknife's
  deletions are 0/1 weights. The replicates are those of the resampled rows up to rounding
  in the last bits. With a missing cell (FIML fits raw rows) rows are resampled as above.

Failures: a statistic returns NaN for an estimate that failed in a replicate (a model that
did not converge) or raises, which fails the whole replicate. Non-finite values count as
failed. Every interval uses the successful replicates of its estimate; estimates with more
than 10% failures get a note, since failures that are not random bias the interval.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from samesource.executor import Executor, StopRequested, default_executor, stop_requested
from samesource.input.rows import ItemRows

Statistic = Callable[[np.ndarray, np.ndarray], np.ndarray]
"""``statistic(data, idx)`` -> 1-D float vector of k estimates for the rows ``data[idx]``.

NaN entries mean "this estimate failed here"; raising fails every estimate of the
replicate. Must be picklable (module-level function or picklable object, which may carry
warm-start state: each chunk of replicates gets its own copy, so the state carries over
from one replicate to the next within a chunk)."""

CHUNKS_PER_WORKER = 4  # enough chunks to balance uneven refit times, few enough to amortize pickling
MIN_SUCCESSFUL = 10  # fewer successful replicates than this: no interval for that estimate
FAILED_SHARE_NOTE = 0.10  # notes for estimates with a larger share of failed replicates
MIN_JACKKNIFE = 3  # fewer finite jackknife values: no acceleration
# Spawn key of the jackknife grouping generator; replicate r uses spawn key (r,), so this
# stays independent of the replicates for any n_boot below it (options cap n_boot at 100,000).
_JACKKNIFE_KEY = 0x4A41434B
# Row positions per draw block of a replicate (fixed: a replicate's draws must not depend on
# how the rows are read); and the second spawn key of a replicate's block totals (block b
# uses (r, b), b < TOTALS_KEY: a file would need 2^32 blocks to reach it).
DRAW_ROWS = 65_536
TOTALS_KEY = 0xFFFFFFFF


@dataclass
class BootstrapResult:
    """Replicates and intervals for k estimates.

    NaN appears only where documented: ``replicates`` for failed replicates; ``se`` with
    fewer than 2 successful replicates; ``ci_percentile`` with fewer than
    :data:`MIN_SUCCESSFUL`; ``ci_bca``, ``acceleration`` and ``bias_correction`` where BCa is
    undefined; ``estimate`` where the full-data statistic failed. Each NaN interval has a note.
    """

    estimate: np.ndarray  # (k,) statistic on the full data
    replicates: np.ndarray  # (B, k), NaN for failed
    n_boot: int
    seed: int
    confidence: float
    n_failed: np.ndarray  # (k,) failed replicates per estimate
    se: np.ndarray  # (k,) sd of the successful replicates (ddof=1)
    ci_percentile: np.ndarray  # (k, 2)
    ci_bca: np.ndarray  # (k, 2)
    acceleration: np.ndarray  # (k,) BCa's a
    bias_correction: np.ndarray  # (k,) BCa's z0
    notes: list[str] = field(default_factory=list)
    jackknife_groups: int = 0  # jackknife fits behind the acceleration (n: delete-one)
    jackknife: np.ndarray | None = None  # (G, k) jackknife estimates, NaN for failed

    def summary(self) -> str:
        """A plain-text table of the estimates, their bootstrap SEs and intervals."""
        pct = round(100 * self.confidence, 6)
        lines = [f"Bootstrap: {self.n_boot} replicates (seed {self.seed}), {pct:g}% intervals; "
                 f"BCa acceleration from {self.jackknife_groups} jackknife fits"]
        lines.append(f"{'#':>4} {'estimate':>11} {'se':>10} {'percentile':>25} {'BCa':>25} "
                     f"{'failed':>7}")

        def fmt(ci: np.ndarray) -> str:
            return f"[{ci[0]:.4g}, {ci[1]:.4g}]" if np.all(np.isfinite(ci)) else "-"

        for j in range(self.estimate.shape[0]):
            lines.append(f"{j:>4} {self.estimate[j]:>11.4g} {self.se[j]:>10.4g} "
                         f"{fmt(self.ci_percentile[j]):>25} {fmt(self.ci_bca[j]):>25} "
                         f"{int(self.n_failed[j]):>7}")
        lines += [f"note: {n}" for n in self.notes]
        return "\n".join(lines)


# ---------------------------------------------------------------------------------------
# Tasks (run in the workers)
# ---------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class _Chunk:
    """One task: a run of bootstrap replicates or of jackknife deletions.

    The data travel once per chunk; the rows of each replicate are drawn in the worker from
    the replicate's own seed, so no index arrays are shipped."""

    statistic: Any
    data: Any
    k: int
    kind: str  # "boot" | "jack"
    start: int  # first replicate / group
    stop: int
    seed: int = 0
    labels: np.ndarray | None = None  # jackknife group of every row
    moments: Any = None  # the statistic's moment form: replicates from weighted cross-products

    @property
    def size(self) -> int:
        return self.stop - self.start


@dataclass
class _ChunkResult:
    start: int
    values: np.ndarray  # (size, k)
    n_raised: int
    n_bad_shape: int
    first_error: str | None


def _block_sizes(n: int) -> np.ndarray:
    k = max(1, -(-n // DRAW_ROWS))
    sizes = np.full(k, DRAW_ROWS, dtype=np.int64)
    sizes[-1] = n - DRAW_ROWS * (k - 1)
    return sizes


def block_totals(seed: int, r: int, n: int) -> np.ndarray:
    """How many of replicate ``r``'s n draws fall in each draw block of :data:`DRAW_ROWS`
    rows: a multinomial over the blocks' sizes (n itself when there is one block)."""
    sizes = _block_sizes(n)
    if sizes.size == 1:
        return np.array([n], dtype=np.int64)
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(r, TOTALS_KEY)))
    return rng.multinomial(n, sizes / n)


def block_draws(seed: int, r: int, block: int, total: int, size: int) -> np.ndarray:
    """Replicate ``r``'s ``total`` draws in draw block ``block`` of ``size`` rows (positions
    within the block), uniform, from the block's own seed stream."""
    key = (r,) if block == 0 else (r, block)
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=key))
    return rng.integers(0, size, size=total)


def replicate_indices(seed: int, r: int, n: int) -> np.ndarray:
    """Row indices of bootstrap replicate ``r``: n draws with replacement (see the module
    docstring for the seed streams); with n at most :data:`DRAW_ROWS`, the draws
    ``integers(0, n, n)`` of ``SeedSequence(seed).spawn(n_boot)[r]``."""
    sizes = _block_sizes(n)
    totals = block_totals(seed, r, n)
    return np.concatenate([b * DRAW_ROWS + block_draws(seed, r, b, int(t), int(sz))
                           for b, (t, sz) in enumerate(zip(totals, sizes, strict=True))])


class ReplicateWeights:
    """The draw counts of replicates ``replicates`` over row positions, formed one draw block
    at a time (``weights(start, stop)``: (replicates, stop - start) float, the counts of those
    rows); the same counts as :func:`replicate_indices` counted."""

    def __init__(self, seed: int, replicates: Sequence[int], n: int) -> None:
        self.seed, self.replicates, self.n = seed, list(replicates), n
        self.sizes = _block_sizes(n)
        self.totals = [block_totals(seed, r, n) for r in self.replicates]
        self._block: tuple[int, np.ndarray] | None = None  # the last block's counts

    def block(self, b: int) -> np.ndarray:
        if self._block is None or self._block[0] != b:
            size = int(self.sizes[b])
            W = np.empty((len(self.replicates), size))
            for i, r in enumerate(self.replicates):
                W[i] = np.bincount(block_draws(self.seed, r, b, int(self.totals[i][b]), size), minlength=size)
            self._block = (b, W)
        return self._block[1]

    def __call__(self, start: int, stop: int) -> np.ndarray:
        parts = []
        while start < stop:
            b = start // DRAW_ROWS
            end = min(stop, (b + 1) * DRAW_ROWS)
            parts.append(self.block(b)[:, start - b * DRAW_ROWS:end - b * DRAW_ROWS])
            start = end
        return parts[0] if len(parts) == 1 else np.hstack(parts)


def _run_chunk(chunk: _Chunk) -> _ChunkResult:
    n = len(chunk.data)
    values = np.full((chunk.size, chunk.k), np.nan)
    n_raised = n_bad = 0
    first: str | None = None
    replicates = range(chunk.start, chunk.stop)
    moments = _chunk_moments(chunk, replicates) if chunk.moments is not None else None
    for i, r in enumerate(replicates):
        if stop_requested():  # the owner stopped the run (a service task on a cluster worker)
            raise StopRequested("the work was told to stop")
        try:
            if moments is not None:
                out = chunk.moments.from_moments(moments[i])
            else:
                idx = replicate_indices(chunk.seed, r, n) if chunk.kind == "boot" else \
                    np.flatnonzero(chunk.labels != r)
                out = chunk.statistic(chunk.data, idx)
            out = np.asarray(out, dtype=float).reshape(-1)
        except Exception as exc:  # a failed replicate, not a failed bootstrap
            n_raised += 1
            first = first or f"{type(exc).__name__}: {exc}"
            continue
        if out.shape != (chunk.k,):
            n_bad += 1
            first = first or f"returned {out.size} values, expected {chunk.k}"
            continue
        values[i] = out
    values[~np.isfinite(values)] = np.nan  # infinities count as failures too
    return _ChunkResult(chunk.start, values, n_raised, n_bad, first)


def _chunk_moments(chunk: _Chunk, replicates: range) -> list:
    from samesource.corrections.replicate_moments import weighted_moments

    n = len(chunk.data)
    if chunk.kind == "boot":
        def weights(a: int, b: int) -> Callable[[int, int], np.ndarray]:
            return ReplicateWeights(chunk.seed, replicates[a:b], n)
    else:
        def weights(a: int, b: int) -> Callable[[int, int], np.ndarray]:
            groups = np.asarray(replicates[a:b])
            return lambda s, e: (chunk.labels[None, s:e] != groups[:, None]).astype(float)
    return weighted_moments(chunk.data, len(replicates), weights)


def _moment_form(statistic: Any, data: Any, scheme: str) -> Any:
    """The statistic's moment form when replicates can come from weighted cross-products:
    complete rows (no missing cell) and a statistic that needs only their moments."""
    if scheme == "rows":
        return None
    if isinstance(data, ItemRows):
        if not len(data) or any(not np.isfinite(X).all() for _, X in data.blocks()):
            return None
    elif not (isinstance(data, np.ndarray) and data.ndim == 2 and data.dtype.kind == "f"
              and len(data) and np.isfinite(data).all()):
        return None
    from samesource.corrections.replicate_moments import moment_form

    return moment_form(statistic)


# ---------------------------------------------------------------------------------------
# Interval formulas
# ---------------------------------------------------------------------------------------


def jackknife_groups_for(n: int, groups: int, seed: int) -> tuple[np.ndarray, int]:
    """Group label of every row and the number of groups: row i alone (delete-one) when
    ``n <= groups``, else ``groups`` random groups of near-equal size drawn from the seed."""
    if n <= groups:
        return np.arange(n), n
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(_JACKKNIFE_KEY,)))
    labels = np.empty(n, dtype=np.intp)
    labels[rng.permutation(n)] = np.arange(n) % groups
    return labels, groups


def acceleration_from_jackknife(values: np.ndarray, n: int, sizes: np.ndarray) -> float:
    """BCa acceleration from jackknife estimates (Efron & Tibshirani 1993, section 14.3):
    ``a = sum U^3 / (6 (sum U^2)^1.5)`` with ``U_g = (n - m_g)(mean - theta_(g))`` for groups
    of ``m_g`` deleted rows (m_g = 1: the delete-one formula scipy uses). Non-finite values
    are dropped; NaN when fewer than :data:`MIN_JACKKNIFE` remain or they do not vary."""
    values = np.asarray(values, dtype=float)
    ok = np.isfinite(values)
    if ok.sum() < MIN_JACKKNIFE:
        return math.nan
    v = values[ok]
    u = (n - np.asarray(sizes, dtype=float)[ok]) * (v.mean() - v)
    # values equal up to rounding carry no skewness information
    if np.ptp(v) <= 64 * np.finfo(float).eps * max(1.0, float(np.max(np.abs(v)))):
        return math.nan
    return float(np.sum(u**3) / (6.0 * np.sum(u**2) ** 1.5))


def bias_correction(replicates: np.ndarray, estimate: float) -> float:
    """BCa's z0 = Phi^-1(share of replicates below the estimate), ties counted one half (as
    ``scipy.stats.bootstrap`` does); +-inf when all replicates lie on one side."""
    from scipy.special import ndtri  # here, not at the top: workers need only numpy

    r = np.asarray(replicates, dtype=float)
    share = (np.count_nonzero(r < estimate) + np.count_nonzero(r <= estimate)) / (2.0 * r.size)
    return float(ndtri(share))


def bca_levels(z0: float, a: float, confidence: float) -> tuple[float, float]:
    """The BCa quantile levels (Efron 1987; Efron & Tibshirani 1993, section 14.3):
    ``Phi(z0 + (z0 + z) / (1 - a (z0 + z)))`` for z = z_(alpha/2) and z_(1 - alpha/2);
    NaN when a denominator is not positive (the adjusted level would wrap around)."""
    from scipy.special import ndtr, ndtri

    alpha = (1.0 - confidence) / 2.0
    out = []
    for z in (float(ndtri(alpha)), float(ndtri(1.0 - alpha))):
        denom = 1.0 - a * (z0 + z)
        out.append(float(ndtr(z0 + (z0 + z) / denom)) if denom > 0 else math.nan)
    return out[0], out[1]


# ---------------------------------------------------------------------------------------
# The bootstrap
# ---------------------------------------------------------------------------------------


def bootstrap(statistic: Statistic, data: np.ndarray | ItemRows, *, n_boot: int, seed: int,
              confidence: float = 0.95, executor: Executor | None = None,
              chunk_size: int | None = None, jackknife_groups: int = 50,
              progress: Callable[[int, int], None] | None = None,
              estimate: np.ndarray | None = None,
              names: Sequence[str] | None = None, scheme: str = "auto") -> BootstrapResult:
    """Case-resampling bootstrap of ``statistic`` with percentile and BCa intervals.

    Efron & Tibshirani (1993) ch. 6, 13 and 14; BCa from Efron (1987); the jackknife for the
    acceleration as described in the module docstring.

    Parameters
    ----------
    statistic:
        ``statistic(data, idx)`` -> k estimates for rows ``data[idx]`` (see :data:`Statistic`).
    data:
        Rows = respondents (an array, or :class:`~samesource.input.rows.ItemRows` read a block
        at a time); passed to the statistic unchanged.
    n_boot, seed:
        Number of replicates and the seed (a non-negative integer) they are drawn from.
    executor:
        Where the replicates and jackknife fits run; default :func:`default_executor`.
    chunk_size:
        Replicates (or jackknife fits) per task; default about
        :data:`CHUNKS_PER_WORKER` chunks per worker; rounded up to whole batches of
        ``replicate_moments.BATCH`` under weighted cross-products. Does not change the results.
    jackknife_groups:
        Groups of the delete-a-group jackknife (delete-one when n is not larger).
    progress:
        ``progress(done, total)`` in the calling process, at the start and as chunks finish;
        ``total`` counts replicates plus jackknife fits. An exception it raises stops the
        bootstrap (a way to cancel).
    estimate:
        The statistic on the full data if already computed (it is not recomputed). Computed
        here otherwise; an exception it raises then propagates (no replicate to fail).
    names:
        A label per estimate for the notes; with names, estimates that are NaN on the full
        data (not estimable there) get no notes.
    scheme:
        "auto" (default): weighted cross-products where they apply (complete rows, a
        statistic with a moment form; see the module docstring), resampled rows otherwise;
        "rows": always resampled rows.
    """
    n_boot, seed, chunk_size = _check_args(n_boot, seed, confidence, chunk_size, jackknife_groups)
    if scheme not in ("auto", "rows"):
        raise ValueError(f"scheme must be 'auto' or 'rows', got {scheme!r}")
    n = len(data)
    if n < 2:
        raise ValueError(f"the bootstrap needs at least 2 rows, got {n}")
    if estimate is None:
        # in the calling process, so a stateful statistic ships its full-data warm start
        estimate = statistic(data, np.arange(n))
    est = np.asarray(estimate, dtype=float).reshape(-1).copy()
    k = est.size
    if k == 0:
        raise ValueError("the statistic returned no estimates")
    est[~np.isfinite(est)] = np.nan

    labels, n_groups = jackknife_groups_for(n, jackknife_groups, seed)
    total = n_boot + n_groups
    ex = executor if executor is not None else default_executor(total)
    workers = max(1, int(ex.workers))

    moments = _moment_form(statistic, data, scheme)
    chunks: list[_Chunk] = []
    for kind, count in (("boot", n_boot), ("jack", n_groups)):
        size = chunk_size or max(1, math.ceil(count / (CHUNKS_PER_WORKER * workers)))
        if moments is not None:  # whole batches, so a replicate's sums never depend on the chunks
            from samesource.corrections.replicate_moments import BATCH

            size = math.ceil(size / BATCH) * BATCH
        for start in range(0, count, size):
            chunks.append(_Chunk(None if moments is not None else statistic, data, k, kind, start,
                                 min(start + size, count), seed, labels if kind == "jack" else None,
                                 moments))
    results = _map_chunks(ex, chunks, workers, progress, total)

    reps = np.full((n_boot, k), np.nan)
    jack = np.full((n_groups, k), np.nan)
    raised = {"boot": [0, 0, None], "jack": [0, 0, None]}
    for chunk, res in zip(chunks, results, strict=True):
        (reps if chunk.kind == "boot" else jack)[res.start:res.start + chunk.size] = res.values
        tally = raised[chunk.kind]
        tally[0] += res.n_raised
        tally[1] += res.n_bad_shape
        tally[2] = tally[2] or res.first_error

    notes = _failure_notes(raised)
    sizes = np.bincount(labels, minlength=n_groups)
    out = _intervals(est, reps, jack, n, sizes, confidence, notes, names)
    return BootstrapResult(estimate=est, replicates=reps, n_boot=n_boot, seed=seed,
                           confidence=float(confidence), notes=notes, jackknife_groups=n_groups,
                           jackknife=jack, **out)


def _check_args(n_boot: int, seed: int, confidence: float, chunk_size: int | None,
                jackknife_groups: int) -> tuple[int, int, int | None]:
    if int(n_boot) != n_boot or n_boot < 1:
        raise ValueError(f"n_boot must be a positive integer, got {n_boot}")
    if int(seed) != seed or seed < 0:
        raise ValueError(f"seed must be a non-negative integer, got {seed}")
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must be between 0 and 1, got {confidence}")
    if chunk_size is not None and (int(chunk_size) != chunk_size or chunk_size < 1):
        raise ValueError(f"chunk_size must be a positive integer, got {chunk_size}")
    if int(jackknife_groups) != jackknife_groups or jackknife_groups < 2:
        raise ValueError(f"jackknife_groups must be an integer of at least 2, got {jackknife_groups}")
    return int(n_boot), int(seed), None if chunk_size is None else int(chunk_size)


def _map_chunks(ex: Executor, chunks: Sequence[_Chunk], workers: int,
                progress: Callable[[int, int], None] | None, total: int) -> list[_ChunkResult]:
    if progress is None:
        return list(ex.map(_run_chunk, chunks))
    # Executor.map returns only when all its items are done, so progress comes in waves
    # of one chunk per worker; the results do not depend on the waves.
    progress(0, total)
    out: list[_ChunkResult] = []
    done = 0
    for i in range(0, len(chunks), workers):
        wave = chunks[i:i + workers]
        out.extend(ex.map(_run_chunk, wave))
        done += sum(c.size for c in wave)
        progress(done, total)
    return out


def _failure_notes(raised: dict[str, list]) -> list[str]:
    notes = []
    for kind, what in (("boot", "bootstrap replicates"), ("jack", "jackknife fits")):
        n_raised, n_bad, first = raised[kind]
        if n_raised or n_bad:
            parts = []
            if n_raised:
                parts.append(f"{n_raised} raised an error")
            if n_bad:
                parts.append(f"{n_bad} returned the wrong number of values")
            notes.append(f"{' and '.join(parts)} among the {what} and count as failed "
                         f"for every estimate (first: {first})")
    return notes


def _intervals(est: np.ndarray, reps: np.ndarray, jack: np.ndarray, n: int, sizes: np.ndarray,
               confidence: float, notes: list[str],
               names: Sequence[str] | None = None) -> dict[str, np.ndarray]:
    k = est.size
    n_boot = reps.shape[0]
    alpha = (1.0 - confidence) / 2.0
    se = np.full(k, np.nan)
    pct = np.full((k, 2), np.nan)
    bca = np.full((k, 2), np.nan)
    acc = np.full(k, np.nan)
    z0s = np.full(k, np.nan)
    ok_mask = np.isfinite(reps)
    n_failed = (n_boot - ok_mask.sum(axis=0)).astype(np.int64)
    n_jack = jack.shape[0]

    for j in range(k):
        ok = reps[ok_mask[:, j], j]
        b = ok.size
        label = names[j] if names is not None else f"estimate {j}"
        if names is not None and not np.isfinite(est[j]):
            continue  # the caller names estimates and knows this one is absent: nothing to say
        if n_failed[j] > FAILED_SHARE_NOTE * n_boot:
            notes.append(f"{label}: {n_failed[j]} of {n_boot} replicates failed "
                         f"({100 * n_failed[j] / n_boot:.1f}%); its intervals use the {b} "
                         "successful ones and are biased if failures are not random")
        if b >= 2:
            se[j] = float(np.std(ok, ddof=1))
        if b < MIN_SUCCESSFUL:
            notes.append(f"{label}: no bootstrap interval: only {b} successful replicates "
                         f"(at least {MIN_SUCCESSFUL} needed)")
            continue
        pct[j] = np.quantile(ok, [alpha, 1.0 - alpha])
        _extreme_note(notes, label, "percentile", alpha, 1.0 - alpha, b)

        if not np.isfinite(est[j]):
            notes.append(f"{label}: BCa undefined: the estimate on the full data failed")
            continue
        z0 = bias_correction(ok, est[j])
        if not np.isfinite(z0):
            side = "above" if z0 < 0 else "below"
            notes.append(f"{label}: BCa undefined: all {b} successful replicates lie {side} "
                         "the estimate (bias correction z0 infinite)")
            continue
        z0s[j] = z0
        n_bad_jack = int(np.count_nonzero(~np.isfinite(jack[:, j])))
        if n_bad_jack:
            notes.append(f"{label}: {n_bad_jack} of {n_jack} jackknife fits failed; the "
                         "acceleration uses the rest")
        a = acceleration_from_jackknife(jack[:, j], n, sizes)
        if not np.isfinite(a):
            why = (f"fewer than {MIN_JACKKNIFE} jackknife fits succeeded"
                   if n_jack - n_bad_jack < MIN_JACKKNIFE else "the jackknife estimates do not vary")
            notes.append(f"{label}: BCa undefined: no acceleration ({why})")
            continue
        acc[j] = a
        lo, hi = bca_levels(z0, a, confidence)
        if not (np.isfinite(lo) and np.isfinite(hi)):
            notes.append(f"{label}: BCa undefined: the acceleration ({a:.3g}) is too large for "
                         f"the {100 * confidence:g}% levels")
            continue
        bca[j] = np.quantile(ok, [lo, hi])
        _extreme_note(notes, label, "BCa", lo, hi, b)
    return {"n_failed": n_failed, "se": se, "ci_percentile": pct, "ci_bca": bca,
            "acceleration": acc, "bias_correction": z0s}


def _extreme_note(notes: list[str], label: str, what: str, lo: float, hi: float, b: int) -> None:
    # a level within one replicate of either end interpolates between the outermost
    # replicates: the endpoint rests on one or two draws
    if min(lo, 1.0 - hi) * (b - 1) < 1.0:
        notes.append(f"{label}: the {what} interval's levels ({lo:.4g}, {hi:.4g}) reach the "
                     f"outermost of {b} replicates; its endpoints are unstable (more "
                     "replicates needed)")


__all__ = ["BootstrapResult", "Statistic", "bootstrap", "replicate_indices", "ReplicateWeights",
           "block_totals", "block_draws", "DRAW_ROWS",
           "jackknife_groups_for", "acceleration_from_jackknife", "bias_correction", "bca_levels",
           "CHUNKS_PER_WORKER", "MIN_SUCCESSFUL", "FAILED_SHARE_NOTE"]
