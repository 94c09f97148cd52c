"""The bootstrap (percentile and BCa intervals) and the executors it runs on.

Reference for the intervals: scipy.stats.bootstrap (percentile and BCa; Efron & Tibshirani
1993, ch. 13-14). Fed our replicates through its ``bootstrap_result`` argument it computes its
intervals from exactly the same replicates, which allows exact comparisons; with its own
replicates the intervals agree up to Monte Carlo error.
"""

from __future__ import annotations

import os
import time
import types
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from samesource.corrections.bootstrap import (
    FAILED_SHARE_NOTE,
    MIN_SUCCESSFUL,
    BootstrapResult,
    acceleration_from_jackknife,
    bootstrap,
    jackknife_groups_for,
    replicate_indices,
)
from samesource.executor import (
    SERIAL_MAX_TASKS,
    Executor,
    LocalExecutor,
    SerialExecutor,
    WorkerBudget,
    WorkerLost,
    default_executor,
)

SERIAL = SerialExecutor()


# -- statistics (module level: picklable for the process pool) ------------------------------


def mean_stat(data: np.ndarray, idx: np.ndarray) -> np.ndarray:
    return np.atleast_1d(data[idx].mean(axis=0))


def corr_stat(data: np.ndarray, idx: np.ndarray) -> np.ndarray:
    return np.array([np.corrcoef(data[idx, 0], data[idx, 1])[0, 1]])


def mean_sd_stat(data: np.ndarray, idx: np.ndarray) -> np.ndarray:
    x = data[idx]
    return np.concatenate([x.mean(axis=0), x.std(axis=0, ddof=1)])


def scipy_corr(x: np.ndarray, y: np.ndarray, axis: int = -1) -> np.ndarray:
    # vectorized Pearson correlation for scipy.stats.bootstrap (the reference)
    xc = x - x.mean(axis=axis, keepdims=True)
    yc = y - y.mean(axis=axis, keepdims=True)
    return (xc * yc).sum(axis=axis) / np.sqrt((xc**2).sum(axis=axis) * (yc**2).sum(axis=axis))


def flaky_stat(data: np.ndarray, idx: np.ndarray) -> np.ndarray:
    """Raises in some replicates and fails its second estimate (NaN) in others, both decided
    by the drawn rows so the test can recount them."""
    if idx[0] % 10 == 3:
        raise ValueError("did not converge")
    second = np.nan if idx[1] % 4 == 2 else data[idx, 0].std()
    return np.array([data[idx, 0].mean(), second])


def distinct_rows(data: np.ndarray, idx: np.ndarray) -> np.ndarray:
    # every replicate has fewer distinct rows than the full data: all below the estimate
    return np.array([float(np.unique(idx).size)])


def mostly_failing(data: np.ndarray, idx: np.ndarray) -> np.ndarray:
    return np.array([data[idx, 0].mean() if idx[0] < 3 else np.nan])


def wrong_length(data: np.ndarray, idx: np.ndarray) -> np.ndarray:
    return np.zeros(3) if idx[0] == 0 else np.zeros(2)


def die(data: np.ndarray, idx: np.ndarray) -> np.ndarray:
    os._exit(3)  # a worker crash (as from a segfault or the OOM killer)


class WarmNewtonSD:
    """Standard deviation by Newton's iteration for s^2 = v, started from the previous
    answer: a picklable statistic carrying a warm start, like a refit from the last fit.
    Returns (sd, iterations used)."""

    def __init__(self, start: float = 1.0):
        self.start = start

    def __call__(self, data: np.ndarray, idx: np.ndarray) -> np.ndarray:
        x = data[idx, 0]
        v = float(np.mean((x - x.mean()) ** 2))
        s, it = self.start, 0
        while abs(s * s - v) > 1e-13 * v and it < 200:
            s = 0.5 * (s + v / s)
            it += 1
        self.start = s
        return np.array([s, float(it)])


# -- fixtures -----------------------------------------------------------------------------


@pytest.fixture(scope="module")
def pool():
    with LocalExecutor(2) as ex:
        yield ex


@pytest.fixture(scope="module")
def normal60() -> np.ndarray:
    # simulated: n = 60 pairs with correlation 0.5 (skewed x, so BCa differs from percentile)
    rng = np.random.default_rng(20240601)
    z = rng.standard_normal((60, 2))
    x = np.exp(0.5 * z[:, 0])
    y = 0.5 * z[:, 0] + np.sqrt(0.75) * z[:, 1]
    return np.column_stack([x, y])


def _scipy_with_our_replicates(res: BootstrapResult, samples: tuple, fn, j: int, *,
                               method: str, paired: bool = False):
    """scipy.stats.bootstrap's interval computed from our replicates of estimate j
    (``bootstrap_result`` with ``n_resamples=0``: scipy draws nothing and, for BCa, runs its own
    delete-one jackknife on the data)."""
    prior = types.SimpleNamespace(bootstrap_distribution=res.replicates[:, j])
    return stats.bootstrap(samples, fn, n_resamples=0, bootstrap_result=prior, method=method,
                           paired=paired, confidence_level=res.confidence, vectorized=True)


# -- seeding ----------------------------------------------------------------------------


def test_replicate_rows_come_from_the_spawned_seed_sequences():
    # numpy's SeedSequence.spawn is the documented scheme: child r of SeedSequence(seed)
    children = np.random.SeedSequence(123).spawn(40)
    for r in (0, 7, 39):
        want = np.random.default_rng(children[r]).integers(0, 25, size=25)
        np.testing.assert_array_equal(replicate_indices(123, r, 25), want)


# -- exact agreement with scipy on the same replicates ---------------------------------------


def test_mean_intervals_equal_scipy_on_the_same_replicates(normal60):
    x = normal60[:, 0]
    res = bootstrap(mean_stat, x, n_boot=2000, seed=11, executor=SERIAL, jackknife_groups=60)
    assert res.jackknife_groups == 60  # n <= groups: delete-one, as scipy
    # scipy.stats.bootstrap (reference), fed the same replicates
    for method, ours in (("percentile", res.ci_percentile[0]), ("BCa", res.ci_bca[0])):
        ref = _scipy_with_our_replicates(res, (x,), np.mean, 0, method=method)
        np.testing.assert_allclose(ours, [ref.confidence_interval.low,
                                          ref.confidence_interval.high], rtol=1e-12)
    # scipy.stats.bootstrap's standard_error is the ddof=1 sd of the replicates
    assert res.se[0] == pytest.approx(ref.standard_error, rel=1e-12)
    assert res.notes == []


def test_correlation_intervals_equal_scipy_on_the_same_replicates(normal60):
    res = bootstrap(corr_stat, normal60, n_boot=2000, seed=12, executor=SERIAL,
                    jackknife_groups=100)
    samples = (normal60[:, 0], normal60[:, 1])
    for method, ours in (("percentile", res.ci_percentile[0]), ("BCa", res.ci_bca[0])):
        # scipy.stats.bootstrap (reference), paired resampling, same replicates
        ref = _scipy_with_our_replicates(res, samples, scipy_corr, 0, method=method, paired=True)
        np.testing.assert_allclose(ours, [ref.confidence_interval.low,
                                          ref.confidence_interval.high], rtol=1e-10)
    assert res.acceleration[0] != 0.0 and np.isfinite(res.bias_correction[0])


def test_bca_levels_match_efron_tibshirani_formulas(normal60):
    # Efron & Tibshirani (1993) section 14.3, written out here independently: z0 from the
    # share of replicates below the estimate (ties one half, as scipy), a from the delete-one
    # jackknife, levels Phi(z0 + (z0 + z)/(1 - a (z0 + z))), then numpy's quantiles
    x = normal60[:, 0]
    res = bootstrap(mean_stat, x, n_boot=1500, seed=5, confidence=0.9, executor=SERIAL,
                    jackknife_groups=60)
    r = res.replicates[:, 0]
    theta = x.mean()
    z0 = stats.norm.ppf((np.sum(r < theta) + 0.5 * np.sum(r == theta)) / r.size)
    jack = np.array([np.delete(x, i).mean() for i in range(x.size)])
    d = jack.mean() - jack
    a = np.sum(d**3) / (6 * np.sum(d**2) ** 1.5)
    zs = stats.norm.ppf([0.05, 0.95])
    levels = stats.norm.cdf(z0 + (z0 + zs) / (1 - a * (z0 + zs)))
    assert res.bias_correction[0] == pytest.approx(z0, abs=1e-12)
    assert res.acceleration[0] == pytest.approx(a, rel=1e-10)
    np.testing.assert_allclose(res.ci_bca[0], np.quantile(r, levels), rtol=1e-12)
    np.testing.assert_allclose(res.ci_percentile[0], np.quantile(r, [0.05, 0.95]), rtol=1e-12)


def test_grouped_jackknife_acceleration_equals_delete_one_on_the_group_sums():
    # For the mean, deleting a group of m rows acts like deleting one of the G group sums:
    # the grouped acceleration must equal scipy.stats.bootstrap's delete-one acceleration for
    # the mean of the group sums (reference). Compared through the BCa interval scipy
    # computes from the same replicates, rescaled to the group-sum mean (x n/G).
    rng = np.random.default_rng(3)
    x = rng.gamma(2.0, size=400)
    res = bootstrap(mean_stat, x, n_boot=1000, seed=8, executor=SERIAL, jackknife_groups=40)
    assert res.jackknife_groups == 40
    labels, g = jackknife_groups_for(400, 40, 8)
    assert g == 40 and np.all(np.bincount(labels) == 10)
    sums = np.bincount(labels, weights=x)
    prior = types.SimpleNamespace(bootstrap_distribution=res.replicates[:, 0] * 10.0)
    ref = stats.bootstrap((sums,), np.mean, n_resamples=0, bootstrap_result=prior,
                          method="BCa", vectorized=True)
    np.testing.assert_allclose(res.ci_bca[0] * 10.0, [ref.confidence_interval.low,
                                                      ref.confidence_interval.high], rtol=1e-9)
    # and the formula itself, for unequal groups, reduces to the group-sum form
    a = acceleration_from_jackknife(
        np.array([(x.sum() - x[labels == k].sum()) / (400 - 10) for k in range(40)]), 400,
        np.full(40, 10))
    s = sums - sums.mean()
    assert a == pytest.approx(np.sum(s**3) / (6 * np.sum(s**2) ** 1.5), rel=1e-10)


# -- agreement with scipy on its own replicates (Monte Carlo error only) --------------------


@pytest.mark.parametrize("which", ["mean", "correlation"])
def test_intervals_agree_with_scipy_on_independent_replicates(normal60, which):
    if which == "mean":
        res = bootstrap(mean_stat, normal60[:, 0], n_boot=4000, seed=21, executor=SERIAL,
                        jackknife_groups=60)
        samples, fn, paired = (normal60[:, 0],), np.mean, False
    else:
        res = bootstrap(corr_stat, normal60, n_boot=4000, seed=22, executor=SERIAL,
                        jackknife_groups=60)
        samples, fn, paired = (normal60[:, 0], normal60[:, 1]), scipy_corr, True
    for method, ours in (("percentile", res.ci_percentile[0]), ("BCa", res.ci_bca[0])):
        # scipy.stats.bootstrap (reference) with its own 4000 replicates. A 2.5% quantile of
        # 4000 replicates has a Monte Carlo sd of about 0.04 bootstrap SEs, a difference of
        # two about 0.06: the tolerance of 0.25 SE is some 4 sd of that difference.
        ref = stats.bootstrap(samples, fn, n_resamples=4000, method=method, paired=paired,
                              vectorized=True, rng=np.random.default_rng(99))
        ci = [ref.confidence_interval.low, ref.confidence_interval.high]
        np.testing.assert_allclose(ours, ci, atol=0.25 * ref.standard_error)
    assert res.se[0] == pytest.approx(ref.standard_error, rel=0.05)  # sd of an sd: ~1.1% here


# -- determinism across executors and chunkings --------------------------------------------


def test_same_seed_same_replicates_whatever_the_executor_and_chunks(pool, normal60):
    runs = [bootstrap(mean_sd_stat, normal60, n_boot=300, seed=42, executor=SERIAL),
            bootstrap(mean_sd_stat, normal60, n_boot=300, seed=42, executor=SERIAL,
                      chunk_size=1),
            bootstrap(mean_sd_stat, normal60, n_boot=300, seed=42, executor=pool),
            bootstrap(mean_sd_stat, normal60, n_boot=300, seed=42, executor=pool, chunk_size=7),
            bootstrap(mean_sd_stat, normal60, n_boot=300, seed=42, executor=pool,
                      chunk_size=1000)]
    first = runs[0]
    assert first.replicates.shape == (300, 4)
    for other in runs[1:]:
        np.testing.assert_array_equal(other.replicates, first.replicates)
        np.testing.assert_array_equal(other.jackknife, first.jackknife)
        np.testing.assert_array_equal(other.ci_bca, first.ci_bca)
        np.testing.assert_array_equal(other.ci_percentile, first.ci_percentile)
    different = bootstrap(mean_sd_stat, normal60, n_boot=300, seed=43, executor=SERIAL)
    assert not np.array_equal(different.replicates, first.replicates)
    # the first replicates do not depend on how many are drawn
    shorter = bootstrap(mean_sd_stat, normal60, n_boot=50, seed=42, executor=SERIAL)
    np.testing.assert_array_equal(shorter.replicates, first.replicates[:50])


def test_grouped_jackknife_is_seeded_and_balanced():
    a, g = jackknife_groups_for(1003, 50, 1)
    b, _ = jackknife_groups_for(1003, 50, 1)
    c, _ = jackknife_groups_for(1003, 50, 2)
    assert g == 50
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, c)
    assert set(np.bincount(a)) == {20, 21}  # 1003 = 50 x 20 + 3
    d, g = jackknife_groups_for(30, 50, 1)
    assert g == 30 and np.array_equal(d, np.arange(30))  # delete-one


# -- failures -------------------------------------------------------------------------------


@pytest.mark.parametrize("use_pool", [False, True])
def test_failed_replicates_are_counted_and_left_out(normal60, pool, use_pool):
    n_boot = 400
    res = bootstrap(flaky_stat, normal60, n_boot=n_boot, seed=7,
                    executor=pool if use_pool else SERIAL)
    # recount independently from the replicates' rows
    idx = [replicate_indices(7, r, 60) for r in range(n_boot)]
    raised = np.array([i[0] % 10 == 3 for i in idx])
    nan2 = np.array([i[1] % 4 == 2 for i in idx]) & ~raised
    assert res.n_failed.tolist() == [raised.sum(), (raised | nan2).sum()]
    assert res.n_failed.dtype.kind == "i"
    assert np.isnan(res.replicates[raised]).all()
    # intervals from the rest: numpy's quantiles and sd of the successful replicates
    ok = ~(raised | nan2)
    want = np.array([normal60[i, 0].std() for i, keep in zip(idx, ok, strict=True) if keep])
    np.testing.assert_allclose(res.replicates[ok, 1], want, rtol=1e-12)
    np.testing.assert_allclose(res.ci_percentile[1], np.quantile(want, [0.025, 0.975]),
                               rtol=1e-12)
    assert res.se[1] == pytest.approx(np.std(want, ddof=1), rel=1e-12)
    assert np.isfinite(res.ci_bca).all()
    share2 = (raised | nan2).mean()
    assert share2 > FAILED_SHARE_NOTE  # about 10% + 22%
    assert any("raised an error" in n and "ValueError: did not converge" in n for n in res.notes)
    assert any(n.startswith("estimate 1:") and "replicates failed" in n for n in res.notes)
    assert "did not converge" in res.summary()


def test_bca_undefined_when_every_replicate_is_on_one_side(normal60):
    res = bootstrap(distinct_rows, normal60, n_boot=200, seed=1, executor=SERIAL)
    assert res.estimate[0] == 60.0 and np.all(res.replicates < 60)
    assert np.isnan(res.ci_bca).all() and np.isnan(res.bias_correction[0])
    assert np.isfinite(res.ci_percentile).all()
    assert any("BCa undefined" in n and "z0 infinite" in n for n in res.notes)


def test_too_few_successful_replicates_give_no_interval(normal60):
    res = bootstrap(mostly_failing, normal60, n_boot=60, seed=3, executor=SERIAL)
    assert res.n_failed[0] > 60 - MIN_SUCCESSFUL
    assert np.isnan(res.ci_percentile).all() and np.isnan(res.ci_bca).all()
    assert any("no bootstrap interval" in n for n in res.notes)


def test_wrong_number_of_values_counts_as_failed(normal60):
    res = bootstrap(wrong_length, normal60, n_boot=300, seed=2, executor=SERIAL,
                    estimate=np.zeros(2))
    assert 0 < res.n_failed[0] == res.n_failed[1] < 300
    assert any("wrong number of values" in n for n in res.notes)


def test_a_dead_worker_raises_a_clear_error_and_the_pool_recovers(normal60):
    with LocalExecutor(1) as ex:
        with pytest.raises(RuntimeError, match="worker process"):
            bootstrap(die, normal60, n_boot=20, seed=1, executor=ex, estimate=np.zeros(1))
        assert ex.map(abs, [-1, -2]) == [1, 2]  # a fresh pool


# -- stateful statistics, progress, executors ------------------------------------------------


def test_warm_started_statistic_through_the_process_pool(pool):
    rng = np.random.default_rng(17)
    data = rng.normal(0.0, 100.0, size=(80, 1))
    stat = WarmNewtonSD(start=1.0)
    res = bootstrap(stat, data, n_boot=64, seed=4, executor=pool, chunk_size=8)
    assert stat.start == pytest.approx(data[:, 0].std(), rel=1e-12)  # warmed on the full data
    # numpy's population sd of each replicate's rows (reference)
    want = [data[replicate_indices(4, r, 80), 0].std() for r in range(64)]
    np.testing.assert_allclose(res.replicates[:, 0], want, rtol=1e-12)
    cold = WarmNewtonSD(start=1.0)(data, np.arange(80))[1]
    assert cold >= 8 and res.replicates[:, 1].max() <= 5  # every replicate started warm
    assert res.n_failed.tolist() == [0, 0]


def test_progress_is_reported_in_the_calling_process(pool, normal60):
    calls = []
    pid = os.getpid()

    def progress(done: int, total: int) -> None:
        calls.append((done, total, os.getpid()))

    res = bootstrap(mean_stat, normal60[:, 0], n_boot=100, seed=1, executor=pool,
                    chunk_size=10, jackknife_groups=20, progress=progress)
    total = 100 + 20
    assert calls[0][:2] == (0, total) and calls[-1][:2] == (total, total)
    dones = [c[0] for c in calls]
    assert dones == sorted(dones) and len(calls) == 1 + (10 + 2) // 2
    assert {c[2] for c in calls} == {pid}
    plain = bootstrap(mean_stat, normal60[:, 0], n_boot=100, seed=1, executor=pool,
                      chunk_size=10, jackknife_groups=20)
    np.testing.assert_array_equal(res.replicates, plain.replicates)


def test_estimate_given_is_used_as_is(normal60):
    calls = []

    class Counting:
        def __call__(self, data, idx):
            calls.append(idx.size)
            return mean_stat(data, idx)

    res = bootstrap(Counting(), normal60[:, 0], n_boot=30, seed=1, executor=SERIAL,
                    jackknife_groups=10, estimate=np.array([1.25]))
    assert res.estimate.tolist() == [1.25] and len(calls) == 30 + 10


def test_executors_and_default():
    assert isinstance(SERIAL, Executor) and SERIAL.workers == 1
    ex = LocalExecutor(2)
    assert isinstance(ex, Executor) and ex.workers == 2
    assert ex.start_method in ("forkserver", "spawn")
    ex.shutdown()  # never started: nothing to stop
    assert LocalExecutor().workers == (os.cpu_count() or 1)
    with pytest.raises(ValueError, match="fork"):
        LocalExecutor(2, start_method="fork")
    assert isinstance(default_executor(SERIAL_MAX_TASKS), SerialExecutor)
    if (os.cpu_count() or 1) > 1:
        big = default_executor(1000)
        assert isinstance(big, LocalExecutor) and big is default_executor(5000)  # shared


def test_a_plain_script_needs_no_main_guard(tmp_path):
    # Python's documentation (multiprocessing, "Safe importing of main module"): spawn and
    # forkserver workers import the main script again, so a script without the guard would
    # start its work again in each worker. Ours leave the main module out (import_main=False);
    # with import_main=True the same script fails as the documentation says.
    import subprocess
    import sys
    import textwrap

    script = tmp_path / "plain.py"
    script.write_text(textwrap.dedent("""
        import sys
        from samesource.executor import LocalExecutor
        ex = LocalExecutor(2, import_main=sys.argv[1] == "main")
        print(ex.map(abs, list(range(-6, 0))), flush=True)
        ex.shutdown()
    """), encoding="utf-8")
    run = [sys.executable, str(script)]
    done = subprocess.run([*run, "no-main"], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "[6, 5, 4, 3, 2, 1]"
    guarded = subprocess.run([*run, "main"], capture_output=True, text=True, timeout=120)
    assert guarded.returncode != 0 and "RuntimeError" in guarded.stderr


def test_one_cap_on_processes_for_the_service():
    # in a fresh process: limit_workers changes the process-wide default pool
    import subprocess
    import sys

    code = """
from samesource.executor import LocalExecutor, SerialExecutor, WorkerBudget, default_executor, limit_workers
from samesource.service.config import ServiceConfig
assert ServiceConfig(job_workers=2, max_processes=8).process_cap == 8
assert ServiceConfig(job_workers=3, max_processes=2).workers == 2  # each job is a process too
assert ServiceConfig(job_workers=3, max_processes=2, executor="dask://h:1").workers == 3
assert ServiceConfig(job_workers=1, max_processes=0).process_cap >= 1
limit_workers(1)
assert isinstance(default_executor(1000), SerialExecutor)  # a cap of one: no pool at all
limit_workers(WorkerBudget(2))
big = default_executor(1000)
import os
assert (os.cpu_count() or 1) < 2 or (isinstance(big, LocalExecutor) and big.workers == 2)
print("ok")
"""
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0 and done.stdout.strip() == "ok", done.stderr


def test_a_lone_job_has_the_whole_cap_and_several_share_it():
    budget = WorkerBudget(4)
    assert budget.share() == 4  # nothing running yet: a job that starts gets all
    with budget.running():
        assert budget.share() == 4  # a lone job on a cap of four: four workers
        with budget.running():
            assert budget.share() == 2
            with budget.running(), budget.running(), budget.running():
                assert budget.share() == 1  # more jobs than the cap: one each, never none
        assert budget.share() == 4
    with pytest.raises(ValueError, match="at least 1"):
        WorkerBudget(0)


def _sleep_and_count(args):
    """A task that records how many tasks run at once (a file per running task)."""
    folder, i = args
    mark = Path(folder) / f"run-{i}"
    mark.touch()
    at_once = len(list(Path(folder).glob("run-*")))
    time.sleep(0.15)
    mark.unlink()
    return at_once


def test_a_map_runs_at_most_its_share_at_once_as_the_share_changes(tmp_path):
    # The share is asked again as tasks finish: two at once, then one once a second job
    # counts itself (as a job process does when another analysis starts).
    budget = WorkerBudget(2)
    with LocalExecutor(2, share=budget.share) as ex:
        with budget.running():
            first = ex.map(_sleep_and_count, [(str(tmp_path), i) for i in range(8)])
            with budget.running():
                second = ex.map(_sleep_and_count, [(str(tmp_path), i) for i in range(6)])
    assert max(first) == 2 and max(second) == 1, (first, second)


def test_submit_returns_a_future_and_a_dead_worker_is_worker_lost():
    import signal

    with LocalExecutor(1, own_groups=True) as ex:
        assert ex.submit(abs, -3).result(timeout=60) == 3
        (pid,) = ex.worker_pids()
        slow = ex.submit(time.sleep, 60)
        # concurrent.futures hands a task to the pool's call queue (max_workers + 1 places) as
        # soon as there is room, and a task in it can no longer be cancelled: with one worker
        # busy, two more fit, so the third is certainly still waiting
        _in_queue = [ex.submit(abs, -1), ex.submit(abs, -2)]
        queued = ex.submit(abs, -4)
        assert queued.cancel()  # not started: dropped
        time.sleep(0.5)
        os.kill(pid, signal.SIGKILL)
        with pytest.raises(WorkerLost):
            slow.result(timeout=30)
        assert ex.submit(abs, -5).result(timeout=60) == 5  # a fresh pool
        assert pid not in ex.worker_pids()
        ex.terminate()


def test_map_keeps_order_and_reraises_task_errors(pool):
    assert pool.map(abs, list(range(-20, 0))) == list(range(20, 0, -1))
    assert pool.map(abs, []) == []
    with pytest.raises(TypeError):
        pool.map(abs, [-1, "x", -3])
    assert pool.map(abs, [-4]) == [4]  # the pool survives a task error


@pytest.mark.parametrize("kwargs", [dict(n_boot=0), dict(seed=-1), dict(confidence=1.0),
                                    dict(chunk_size=0), dict(jackknife_groups=1)])
def test_bad_arguments(kwargs):
    args = dict(n_boot=10, seed=1) | kwargs
    with pytest.raises(ValueError):
        bootstrap(mean_stat, np.arange(10.0), executor=SERIAL, **args)


# -- coverage --------------------------------------------------------------------------------


def test_percentile_interval_coverage_for_a_normal_mean():
    # 200 simulated data sets of n = 30 from N(5, 2^2): the 95% percentile interval of the mean
    # should cover 5 in roughly 95% of them. Theory for this n: about the coverage of
    # mean +- 1.96 sd(ddof=0)/sqrt(n), i.e. 2 t_29.cdf(1.96 sqrt(29/30)) - 1 = 93.6%.
    # Observed here: percentile 89.0%, BCa 90.0%, while the analytic interval itself covers
    # 90.5% of these same data sets (an unlucky draw: 3 binomial sd = 5 points at 200 sets;
    # over 1000 other sets the percentile interval covered 92.5%, scipy.stats.bootstrap's 92.7%).
    rng = np.random.default_rng(2024)
    hits_pct = hits_bca = hits_z = 0
    z = stats.norm.ppf(0.975)
    for s in range(200):
        x = rng.normal(5.0, 2.0, size=30)
        res = bootstrap(mean_stat, x, n_boot=500, seed=s, executor=SERIAL, jackknife_groups=10)
        hits_pct += bool(res.ci_percentile[0, 0] <= 5.0 <= res.ci_percentile[0, 1])
        hits_bca += bool(res.ci_bca[0, 0] <= 5.0 <= res.ci_bca[0, 1])
        hits_z += bool(abs(x.mean() - 5.0) <= z * x.std() / np.sqrt(30))
    assert 0.87 <= hits_pct / 200 <= 0.99
    assert 0.87 <= hits_bca / 200 <= 0.99
    # on the same data sets the bootstrap tracks the large-sample interval it approximates
    assert abs(hits_pct - hits_z) <= 8 and abs(hits_bca - hits_z) <= 8


# -- replicates from weighted cross-products (measurement/corrections/replicate_moments.py) -------------


class MeanCovStat:
    """Means and covariances (divisor n) of the rows: from the rows, or from their moments."""

    def __call__(self, data: np.ndarray, idx: np.ndarray) -> np.ndarray:
        x = data[idx]
        return np.concatenate([x.mean(axis=0), np.cov(x, rowvar=False, bias=True)[np.triu_indices(x.shape[1])]])

    def from_moments(self, m) -> np.ndarray:
        return np.concatenate([m.mean, m.cov[np.triu_indices(m.cov.shape[0])]])


@pytest.fixture(scope="module")
def items5() -> np.ndarray:
    # simulated 5-point answers (large means, as survey items have), n not a multiple of a row block
    rng = np.random.default_rng(515)
    return np.clip(np.round(3 + rng.standard_normal((9001, 6)) @ np.triu(np.ones((6, 6))) / 3), 1, 5)


def test_weighted_covariance_equals_numpy_cov_with_frequency_weights(items5):
    # Reference: numpy's np.cov(..., fweights=..., bias=True) and np.average(..., weights=...)
    from samesource.corrections.replicate_moments import BATCH, weighted_moments

    n = len(items5)
    count = BATCH + 5  # a whole batch and a part of one
    W = np.vstack([np.bincount(replicate_indices(9, r, n), minlength=n) for r in range(count)]).astype(float)
    W[-1] = (np.arange(n) % 3 != 0)  # 0/1 weights, as a jackknife deletion
    got = weighted_moments(items5, count, lambda a, b: lambda s, e: W[a:b, s:e])
    for r in (0, 17, count - 2, count - 1):
        w = W[r].astype(np.int64)
        want = np.cov(items5, rowvar=False, fweights=w, bias=True)
        np.testing.assert_allclose(got[r].cov, want, rtol=1e-12, atol=1e-13)
        np.testing.assert_allclose(got[r].mean, np.average(items5, axis=0, weights=w), rtol=1e-13)
        assert got[r].n == w.sum()
    # and the resampled rows themselves
    idx = replicate_indices(9, 17, n)
    np.testing.assert_allclose(got[17].cov, np.cov(items5[idx], rowvar=False, bias=True), rtol=1e-12, atol=1e-13)


def test_weighted_replicates_equal_resampled_ones_and_do_not_depend_on_the_chunks(pool, items5):
    stat = MeanCovStat()
    rows = bootstrap(stat, items5, n_boot=70, seed=5, executor=SERIAL, scheme="rows", jackknife_groups=12)
    runs = [bootstrap(stat, items5, n_boot=70, seed=5, executor=SERIAL, jackknife_groups=12),
            bootstrap(stat, items5, n_boot=70, seed=5, executor=SERIAL, chunk_size=1, jackknife_groups=12),
            bootstrap(stat, items5, n_boot=70, seed=5, executor=pool, jackknife_groups=12),
            bootstrap(stat, items5, n_boot=70, seed=5, executor=pool, chunk_size=7, jackknife_groups=12)]
    first = runs[0]
    # the same draws: equal to the resampled rows up to rounding
    np.testing.assert_allclose(first.replicates, rows.replicates, rtol=1e-11, atol=1e-12)
    np.testing.assert_allclose(first.jackknife, rows.jackknife, rtol=1e-11, atol=1e-12)
    for other in runs[1:]:  # bit for bit whatever the executor and the chunks
        np.testing.assert_array_equal(other.replicates, first.replicates)
        np.testing.assert_array_equal(other.jackknife, first.jackknife)
        np.testing.assert_array_equal(other.ci_bca, first.ci_bca)
    shorter = bootstrap(stat, items5, n_boot=40, seed=5, executor=SERIAL, jackknife_groups=12)
    np.testing.assert_array_equal(shorter.replicates, first.replicates[:40])


def test_rows_are_resampled_when_a_cell_is_missing(items5):
    # FIML fits the raw rows; the fitting engine takes no row weights, so no moment form
    from samesource.corrections.bootstrap import _moment_form

    holed = items5.copy()
    holed[3, 2] = np.nan
    assert _moment_form(MeanCovStat(), items5, "auto") is not None
    assert _moment_form(MeanCovStat(), holed, "auto") is None
    assert _moment_form(MeanCovStat(), items5, "rows") is None
    assert _moment_form(mean_stat, items5, "auto") is None  # a statistic without a moment form
    with pytest.raises(ValueError, match="scheme"):
        bootstrap(mean_stat, items5, n_boot=10, seed=1, executor=SERIAL, scheme="weights")


def test_path_estimates_from_a_replicates_moments_equal_those_from_its_rows():
    # The path estimator fed a replicate's moments (replicate_moments.MomentPathEstimator)
    # against the same estimator on the resampled rows (simulated survey with known truth).
    from samesource.corrections.bootstrap import ReplicateWeights
    from samesource.corrections.paths import PathEstimator
    from samesource.corrections.replicate_moments import moment_form, weighted_moments
    from samesource.input.design import parse_design
    from simulate import ConstructSpec, SurveySpec, design_for, simulate_survey

    spec = SurveySpec(constructs=[ConstructSpec("support", 4, 0.75, 0.3), ConstructSpec("engagement", 4, 0.7, 0.3),
                                  ConstructSpec("weather", 3, 0.7, 0.3, role="marker", prefix="wth")],
                      paths={"engagement": {"support": 0.4}}, n=400, seed=8)
    df, _ = simulate_survey(spec)
    design = parse_design(design_for(spec))
    est = PathEstimator(design, use_method_factor="marker", method_loadings="equal", use_measured=False)
    X = df[est.items].to_numpy(dtype=float)
    full, extra = est.estimate(X, compute_se=True)
    est.warm = dict(extra["fits"])
    form = moment_form(est)
    assert form is not None and form is not est
    moments = weighted_moments(X, 3, lambda a, b: ReplicateWeights(3, range(a, b), len(X)))
    for r in range(3):
        from_rows = est(X, replicate_indices(3, r, len(X)))
        from_moments = form.from_moments(moments[r])
        assert np.isfinite(from_rows).sum() == 7  # all but measured_method_adjusted (no method scale)
        np.testing.assert_allclose(from_moments, from_rows, rtol=1e-5, atol=1e-6, equal_nan=True)


# -- draws split over draw blocks (rows read a block at a time) --------------------------------


def test_draws_split_over_blocks_are_an_exact_multinomial(monkeypatch):
    """With n rows over several draw blocks (DRAW_ROWS made small), a replicate's draw counts
    are a multinomial of n draws over n equally likely rows: every replicate's counts sum to n,
    each row's count has mean 1 and variance (n - 1)/n, two rows' counts covariance -1/n
    (the multinomial's known moments), within a block and across blocks; the counts'
    distribution matches numpy's own multinomial (Generator.multinomial) by a chi-square test
    (scipy.stats.chi2_contingency)."""
    from samesource.corrections import bootstrap as boot

    monkeypatch.setattr(boot, "DRAW_ROWS", 50)
    n, R = 230, 4000   # five draw blocks, the last of 30 rows
    C = np.vstack([np.bincount(boot.replicate_indices(11, r, n), minlength=n) for r in range(R)])
    assert (C.sum(axis=1) == n).all()
    se = np.sqrt(2.0 / R)   # about the sampling error of a variance near 1 over R replicates
    assert abs(C.mean() - 1.0) < 0.01
    assert abs(C.var(axis=0, ddof=1).mean() - (n - 1) / n) < 3 * se / np.sqrt(n) + 0.01
    cov = np.cov(C, rowvar=False)
    same = cov[0, 1:50].mean()            # rows of one block
    across = cov[0, 50:].mean()           # rows of other blocks
    for c in (same, across):
        assert abs(c - (-1.0 / n)) < 4 * se / np.sqrt(49)
    totals = C.reshape(R, -1)[:, :200].reshape(R, 4, 50).sum(axis=2)   # draws per full block
    assert abs(totals.mean() - n * 50 / n) < 0.3
    q = 50 / n   # a full block's share of the rows: its total is binomial, two totals covary -n q^2
    assert abs(totals.var() - n * q * (1 - q)) < 0.1 * n * q * (1 - q)
    assert abs(np.cov(totals, rowvar=False)[0, 1:].mean() - (-n * q * q)) < 0.15 * n * q * q
    ref = np.random.default_rng(4).multinomial(n, np.full(n, 1.0 / n), size=R)   # numpy's multinomial
    top = max(C.max(), ref.max()) + 1
    table = np.vstack([np.bincount(C.ravel(), minlength=top), np.bincount(ref.ravel(), minlength=top)])
    table = table[:, table.min(axis=0) >= 5]
    assert stats.chi2_contingency(table).pvalue > 0.001


def test_replicate_weights_are_the_counted_draws_however_rows_are_read(monkeypatch):
    # ReplicateWeights over any split of the row positions equals replicate_indices counted
    # (np.bincount): the draws do not depend on how the rows are read
    from samesource.corrections import bootstrap as boot

    monkeypatch.setattr(boot, "DRAW_ROWS", 64)
    n = 300
    w = boot.ReplicateWeights(5, [0, 3, 9], n)
    want = np.vstack([np.bincount(boot.replicate_indices(5, r, n), minlength=n) for r in (0, 3, 9)])
    for cuts in ([0, n], [0, 10, 64, 65, 200, n], [0, 128, 129, n]):
        got = np.hstack([w(a, b) for a, b in zip(cuts[:-1], cuts[1:], strict=True)])
        np.testing.assert_array_equal(got, want)


def test_weighted_replicates_equal_on_frame_rows_and_coded_rows(items5):
    # The same answers as a DataFrame (FrameRows) and as one byte per cell (CodedRows, with a
    # selection: blocks of uneven size) give the same replicate moments; reference: numpy's
    # np.cov with frequency weights of the counted draws
    import pandas as pd

    from samesource.input.rows import CodedRows, FrameRows

    stat = MeanCovStat()
    names = [f"i{j}" for j in range(items5.shape[1])]
    keep = np.random.default_rng(6).random(len(items5)) < 0.9
    frame = FrameRows(pd.DataFrame(items5, columns=names)).select(keep)
    coded = CodedRows.encode(items5, names, np.arange(len(items5)), 1.0).select(keep)
    X = items5[keep]
    full = stat(X, np.arange(len(X)))   # the statistic reads arrays; its moment form reads the rows
    a = bootstrap(stat, frame, n_boot=33, seed=4, executor=SERIAL, jackknife_groups=5, estimate=full)
    b = bootstrap(stat, coded, n_boot=33, seed=4, executor=SERIAL, jackknife_groups=5, estimate=full)
    np.testing.assert_allclose(b.replicates, a.replicates, rtol=1e-12, atol=1e-12)
    w = np.bincount(replicate_indices(4, 32, len(X)), minlength=len(X))
    want = np.cov(X, rowvar=False, fweights=w, bias=True)[np.triu_indices(X.shape[1])]
    np.testing.assert_allclose(a.replicates[32, X.shape[1]:], want, rtol=1e-11, atol=1e-12)
