"""Slow simulation study with known truth (run with `pytest -m slow`; not part of `make test`).

One condition of tests/benchmarks/coverage_study.py (n = 600, 100 samples, two paths): the
preferred estimate's 95% Wald interval must cover the true path at a rate consistent with 95%,
its bias must be small, and the estimates that ignore shared method must show the inflation the
product exists to correct. Truth: the simulation's population values (sample_surveys/simulate.py).
Binomial limits: scipy.stats.binom.
"""

from __future__ import annotations

import sys
from pathlib import Path

import pytest
from scipy.stats import binom

sys.path.insert(0, str(Path(__file__).resolve().parent / "benchmarks"))

from coverage_study import TRUTH, run, summarize  # noqa: E402

pytestmark = pytest.mark.slow

SEEDS = 100
N = 600


@pytest.fixture(scope="module")
def cells():
    return summarize(run(SEEDS, [N], workers=2))


def test_preferred_interval_covers_at_a_rate_consistent_with_95_percent(cells):
    both = [cells[(N, path, "(preferred)")] for path in TRUTH]
    covered = sum(c.covered for c in both)
    total = sum(c.with_ci for c in both)
    assert total == 2 * SEEDS
    # below this count a true 95% procedure falls with probability 0.1%
    floor = int(binom.ppf(0.001, total, 0.95))
    assert covered >= floor, f"{covered}/{total} covered (floor {floor})"


def test_preferred_estimate_is_nearly_unbiased(cells):
    for path in TRUTH:
        c = cells[(N, path, "(preferred)")]
        assert abs(c.bias) < 0.03, (path, c.bias)


def test_estimates_that_ignore_shared_method_are_inflated(cells):
    # Correcting unreliability alone moves the estimate further from the truth when the items
    # share method variance: the latent model's mean is well above the true path.
    for path in TRUTH:
        latent = cells[(N, path, "latent")]
        assert latent.bias > 0.05, (path, latent.bias)
        assert latent.coverage < 0.80, (path, latent.coverage)
