"""Simulation study with known truth: the split-team cross-source estimate (measurement/statistics/teams.py).

Run on demand (a minute or two per condition); the results are recorded in docs/methods.md
("Teams"). Each replicate is an invented team survey: J teams with sizes drawn from a negative
binomial (mean ``--size``), team-level traits X1, X2 (correlation .30) and Y = .50 X1 - .30 X2 +
team residual, all of unit variance at the team level, so the team-level standardized
coefficients are exactly .50 and -.30. Each person's construct score is the mean of four items,
each 0.70 x (sqrt(icc) x the team's trait + sqrt(1 - icc) x a personal part) + 0.45 x the
person's own answering style (shared by the three constructs, no team part) + error. The
estimate must see through the answering style (it inflates same-source team analyses) and the
unreliability of part-team means.

    python tests/benchmarks/split_team_study.py [--replicates 200] [--teams 120 300] [--size 20] [--icc 0.10]
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from samesource.statistics.teams import split_team_estimate

TRUTH = np.array([0.50, -0.30])
R12 = 0.30


def survey(seed: int, teams: int, size: float, icc: float) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    sizes = np.maximum(rng.negative_binomial(4, 4 / (4 + size), teams), 1)
    team = np.repeat(np.arange(teams), sizes)
    n = len(team)
    xb = rng.multivariate_normal([0, 0], [[1, R12], [R12, 1]], teams)
    explained = TRUTH @ np.array([[1, R12], [R12, 1]]) @ TRUTH
    yb = xb @ TRUTH + rng.normal(0, np.sqrt(1 - explained), teams)
    style = rng.normal(size=n)
    err = np.sqrt(1 - 0.49 - 0.45 ** 2)

    def score(tb: np.ndarray) -> np.ndarray:
        trait = np.sqrt(icc) * tb[team] + np.sqrt(1 - icc) * rng.normal(size=n)
        return np.mean([0.7 * trait + 0.45 * style + err * rng.normal(size=n) for _ in range(4)], axis=0)

    return np.column_stack([score(yb), score(xb[:, 0]), score(xb[:, 1])]), team


def study(replicates: int, teams: int, size: float, icc: float, n_boot: int) -> dict:
    est, cover, width, failed = [], [], [], 0
    for r in range(replicates):
        scores, team = survey(1000 + r, teams, size, icc)
        out = split_team_estimate(scores, team, n_boot=n_boot, seed=r)
        if out["estimate"] is None or out["ci"] is None:
            failed += 1
            continue
        ci = np.array(out["ci"])
        est.append(out["estimate"])
        cover.append((ci[:, 0] <= TRUTH) & (TRUTH <= ci[:, 1]))
        width.append(ci[:, 1] - ci[:, 0])
    e = np.array(est)
    return {"bias": e.mean(axis=0) - TRUTH, "rmse": np.sqrt(((e - TRUTH) ** 2).mean(axis=0)),
            "coverage": np.mean(cover, axis=0), "width": np.mean(width, axis=0), "failed": failed}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--replicates", type=int, default=200)
    ap.add_argument("--teams", type=int, nargs="+", default=[120, 300])
    ap.add_argument("--size", type=float, default=20.0)
    ap.add_argument("--icc", type=float, default=0.10)
    ap.add_argument("--n-boot", type=int, default=200)
    a = ap.parse_args()
    print(f"truth {TRUTH[0]:+.2f} (X1), {TRUTH[1]:+.2f} (X2); mean team size {a.size:g}, ICC {a.icc:g}, "
          f"{a.replicates} replicates, {a.n_boot} bootstrap replicates each")
    print("| teams | bias X1 | bias X2 | RMSE X1 | RMSE X2 | 95% coverage X1 | X2 | mean width X1 | X2 | failed |")
    print("|---|---|---|---|---|---|---|---|---|---|")
    for J in a.teams:
        t = time.perf_counter()
        s = study(a.replicates, J, a.size, a.icc, a.n_boot)
        print(f"| {J} | {s['bias'][0]:+.3f} | {s['bias'][1]:+.3f} | {s['rmse'][0]:.3f} | {s['rmse'][1]:.3f} | "
              f"{s['coverage'][0]:.2f} | {s['coverage'][1]:.2f} | {s['width'][0]:.2f} | {s['width'][1]:.2f} | "
              f"{s['failed']} |  ({time.perf_counter() - t:.0f} s)")


if __name__ == "__main__":
    main()
