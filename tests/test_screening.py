"""Respondent screening: longstring, IRV, Mahalanobis distance, missing share, flags."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from scipy.spatial.distance import mahalanobis
from semopy.examples import holzinger39

from samesource.errors import DesignError
from samesource.input.screening import ScreeningRules, screen_respondents

NA = np.nan


@pytest.fixture
def hand_rows() -> pd.DataFrame:
    rows = {
        2: [1, 1, 2, 2, 2, NA, 2, 2, 2, 2, 3, 3],
        3: [3] * 12,
        4: [1, 2, 3, 4, 5, 1, 2, 3, 4, 5, 1, 2],
        5: [NA] * 8 + [4, 4, 4, 4],
        6: [NA] * 12,
    }
    return pd.DataFrame.from_dict(rows, orient="index", columns=[f"q{i}" for i in range(12)])


def test_longstring_and_irv_hand_worked(hand_rows):
    res = screen_respondents(hand_rows, hand_rows, scale_min=1, scale_max=5)
    pr = res.per_row
    assert list(pr.index) == [2, 3, 4, 5, 6]  # the caller's row numbers are kept
    # Longstring (Johnson 2005): worked by hand; a missing answer breaks a run.
    # Row 2: 1 1 | 2 2 2 | NA | 2 2 2 2 | 3 3 -> 4.
    assert pr["longstring"].tolist() == [4, 12, 1, 4, 0]
    # IRV (Dunn et al. 2018), sample SD of the answered items, worked by hand:
    # row 2: 11 answers, mean 2, squared deviations 1+1+1+1 = 4 -> sqrt(4 / 10);
    # row 4: sum 33, sum of squares 115, SS = 115 - 12 * 2.75^2 = 24.25 -> sqrt(24.25 / 11).
    assert pr.loc[2, "irv"] == pytest.approx(math.sqrt(0.4), abs=1e-12)
    assert pr.loc[3, "irv"] == 0.0
    assert pr.loc[4, "irv"] == pytest.approx(math.sqrt(24.25 / 11), abs=1e-12)
    assert pr.loc[5, "irv"] == 0.0
    assert np.isnan(pr.loc[6, "irv"])  # no answers: undefined, documented NaN
    assert pr["share_missing"].tolist() == pytest.approx([1 / 12, 0, 0, 8 / 12, 1])


def test_flags_and_reasons_on_hand_rows(hand_rows):
    res = screen_respondents(hand_rows, hand_rows, scale_min=1, scale_max=5)
    pr = res.per_row
    # Row 3 straight-lines all 12 items: run 12 >= max(10, 6), same answer everywhere.
    assert res.reasons[3] == ["longstring", "irv"]
    # Row 5 has only 4 answers (below the 5 needed for the IRV rule) and 8/12 missing.
    assert res.reasons[5] == ["missing"]
    assert res.reasons[6] == ["missing"]
    assert res.flagged_rows == [3, 5, 6]
    assert not pr.loc[[2, 4], "flagged"].any()
    assert res.counts == {
        "longstring": 1, "irv": 1, "mahalanobis": 0, "missing": 2, "out_of_range": 0,
    }  # fmt: skip
    # Only two complete rows: no invertible covariance, so no distance and no flag.
    assert pr["mahalanobis_d2"].isna().all() and pr["mahalanobis_p"].isna().all()
    assert any("Mahalanobis" in n for n in res.notes)
    for rule in ("longstring", "irv", "mahalanobis", "missing"):
        assert "common practice" in res.rules[rule]
    assert "10" in res.rules["longstring"]


def test_out_of_range_and_configurable_rules(hand_rows):
    data = hand_rows.copy()
    data.loc[4, "q0"] = 9  # impossible on a 1-5 scale
    res = screen_respondents(data, scale_min=1, scale_max=5)
    assert res.per_row.loc[4, "n_out_of_range"] == 1
    assert res.reasons[4] == ["out_of_range"]
    assert any("not on the raw answers" in n for n in res.notes)
    off = screen_respondents(
        data,
        scale_min=None,
        scale_max=None,
        rules=ScreeningRules(longstring_min=None, max_share_missing=None),
    )
    assert "flag_longstring" not in off.per_row and "longstring" not in off.rules
    assert "flag_out_of_range" not in off.per_row
    assert off.flagged_rows == [3]  # only the IRV rule is left that fires
    with pytest.raises(DesignError):
        screen_respondents(data, scale_min=5, scale_max=1)
    with pytest.raises(ValueError):
        screen_respondents(data, data.iloc[:3], scale_min=1, scale_max=5)


@pytest.fixture(scope="module")
def hs_items() -> pd.DataFrame:
    # Holzinger & Swineford (1939), shipped with semopy; index 1..301 kept as row numbers.
    return holzinger39.get_data()[[f"x{i}" for i in range(1, 10)]]


def test_mahalanobis_matches_scipy_on_complete_data(hs_items):
    res = screen_respondents(hs_items, scale_min=None, scale_max=None)
    x = hs_items.to_numpy(float)
    mean = x.mean(axis=0)
    vi = np.linalg.inv(np.cov(x, rowvar=False))  # numpy covariance, divisor n - 1
    # Reference: scipy.spatial.distance.mahalanobis (returns the root) and chi2.sf.
    ref = np.array([mahalanobis(row, mean, vi) ** 2 for row in x])
    assert res.per_row["mahalanobis_d2"].to_numpy() == pytest.approx(ref, rel=1e-10)
    assert res.per_row["mahalanobis_p"].to_numpy() == pytest.approx(
        stats.chi2.sf(ref, 9), rel=1e-8, abs=1e-300
    )
    assert (res.per_row["mahalanobis_df"] == 9).all()
    assert list(res.per_row.index) == list(hs_items.index)


def test_mahalanobis_with_missing_uses_answered_subvector(hs_items):
    data = hs_items.copy()
    holes = {1: ["x1"], 2: ["x4", "x5"], 3: ["x9"], 10: ["x2", "x3", "x7"], 50: ["x1"]}
    for row, cols in holes.items():
        data.loc[row, cols] = np.nan
    res = screen_respondents(data, scale_min=None, scale_max=None)
    complete = data.dropna().to_numpy(float)
    mean = complete.mean(axis=0)
    cov = np.cov(complete, rowvar=False)
    for row in [1, 2, 3, 10, 50, 4, 301]:
        u = data.loc[row].to_numpy(float)
        ok = ~np.isnan(u)
        vi = np.linalg.inv(cov[np.ix_(ok, ok)])
        ref = mahalanobis(u[ok], mean[ok], vi) ** 2  # scipy reference on the sub-vector
        assert res.per_row.loc[row, "mahalanobis_d2"] == pytest.approx(ref, rel=1e-10)
        assert res.per_row.loc[row, "mahalanobis_df"] == ok.sum()
        assert res.per_row.loc[row, "mahalanobis_p"] == pytest.approx(
            stats.chi2.sf(ref, ok.sum()), rel=1e-8
        )


@pytest.mark.parametrize("holes", [False, True])
def test_blocks_of_rows_give_the_same_distances_and_irv(hs_items, monkeypatch, holes):
    """Rows measured a block at a time (as at a million rows) give what one pass gives:
    Mahalanobis distances still equal scipy's, IRV numpy's row SDs (references as above)."""
    import samesource.input.screening as screening

    data = hs_items.copy()
    if holes:
        for row, cols in {1: ["x1"], 7: ["x4", "x5"], 150: ["x1"], 300: ["x9"]}.items():
            data.loc[row, cols] = np.nan
    monkeypatch.setattr(screening, "ROW_BLOCK", 7)  # 301 rows: 43 blocks, the last one short
    res = screen_respondents(data, scale_min=None, scale_max=None)
    complete = data.dropna().to_numpy(float)
    mean, cov = complete.mean(axis=0), np.cov(complete, rowvar=False)
    for row in data.index:
        u = data.loc[row].to_numpy(float)
        ok = ~np.isnan(u)
        ref = mahalanobis(u[ok], mean[ok], np.linalg.inv(cov[np.ix_(ok, ok)])) ** 2  # scipy
        assert res.per_row.loc[row, "mahalanobis_d2"] == pytest.approx(ref, rel=1e-10)
    want = data.std(axis=1, ddof=1).to_numpy()  # pandas skips NaN, as IRV does
    assert res.per_row["irv"].to_numpy() == pytest.approx(want, rel=1e-12)
    # the raw answers in another column order, read a block at a time, as in one pass
    raw = data[list(data.columns)[::-1]]
    blocked = screen_respondents(data, raw, scale_min=1, scale_max=9).per_row
    monkeypatch.setattr(screening, "ROW_BLOCK", 10**6)
    whole = screen_respondents(data, raw, scale_min=1, scale_max=9).per_row
    pd.testing.assert_frame_equal(blocked, whole, check_exact=False, rtol=1e-12)


def _simulate(seed: int = 7, n: int = 400):
    """Three constructs of six 5-point items; items 2 and 5 of each reverse-keyed.

    Simulation with known truth: every item 0.7 * trait + error, cut into 5 categories.
    Returns keyed items, raw answers (questionnaire order) and the reversed columns.
    """
    rng = np.random.default_rng(seed)
    traits = rng.multivariate_normal(np.zeros(3), [[1, 0.3, 0.2], [0.3, 1, 0.3], [0.2, 0.3, 1]], n)
    cols, reversed_cols, keyed = [], [], []
    for c in range(3):
        for i in range(6):
            name = f"c{c}_{i}"
            y = 0.7 * traits[:, c] + math.sqrt(1 - 0.49) * rng.standard_normal(n)
            keyed.append(np.digitize(y, [-1.3, -0.45, 0.45, 1.3]) + 1)
            cols.append(name)
            if i in (1, 4):
                reversed_cols.append(name)
    keyed = pd.DataFrame(np.column_stack(keyed), columns=cols, index=np.arange(2, n + 2))
    raw = keyed.copy()
    raw[reversed_cols] = 6 - raw[reversed_cols]
    return keyed.astype(float), raw.astype(float), reversed_cols


def test_planted_straight_liner_and_outlier_are_flagged():
    keyed, raw, rev = _simulate()
    liner, outlier = 10, 20
    raw.loc[liner] = 4.0  # the same answer to every question as asked
    keyed.loc[liner] = raw.loc[liner]
    keyed.loc[liner, rev] = 6 - raw.loc[liner, rev]
    # Outlier: within each construct, alternate extreme answers on the keyed items,
    # contradicting the strong positive within-construct correlations.
    keyed.loc[outlier] = [1.0, 5.0] * 9
    raw.loc[outlier] = keyed.loc[outlier]
    raw.loc[outlier, rev] = 6 - keyed.loc[outlier, rev]

    res = screen_respondents(keyed, raw, scale_min=1, scale_max=5)
    pr = res.per_row
    assert {"longstring", "irv"} <= set(res.reasons[liner])
    assert pr.loc[liner, "longstring"] == 18 and pr.loc[liner, "irv"] == 0
    assert "mahalanobis" in res.reasons[outlier]
    assert pr.loc[outlier, "mahalanobis_p"] < 1e-6
    others = pr.drop(index=[liner, outlier])
    # Attentive simulated respondents: no straight-lining, few chance distance flags.
    assert not others["flag_longstring"].any() and not others["flag_irv"].any()
    assert others["flag_mahalanobis"].mean() < 0.02
    # Run on the keyed items instead, reverse-keying hides the straight-liner: its runs
    # break at each reversed item and its answers vary.
    keyed_only = screen_respondents(keyed, scale_min=1, scale_max=5).per_row
    assert keyed_only.loc[liner, "longstring"] < 10 and keyed_only.loc[liner, "irv"] > 0


def test_missing_values_do_not_leak_or_crash():
    keyed, raw, _ = _simulate(seed=11, n=200)
    keyed.loc[5, keyed.columns[:12]] = np.nan  # 12 of 18 missing
    raw.loc[5, raw.columns[:12]] = np.nan
    keyed.loc[6] = np.nan
    raw.loc[6] = np.nan
    res = screen_respondents(keyed, raw, scale_min=1, scale_max=5)
    pr = res.per_row
    assert pr.loc[5, "share_missing"] == pytest.approx(12 / 18)
    assert pr.loc[5, "mahalanobis_df"] == 6 and np.isfinite(pr.loc[5, "mahalanobis_d2"])
    assert np.isnan(pr.loc[6, "mahalanobis_d2"]) and not pr.loc[6, "flag_mahalanobis"]
    assert res.reasons[5][0] == "missing" and "missing" in res.reasons[6]
    assert pr["flagged"].dtype == bool
    assert res.counts["missing"] == 2


@pytest.mark.parametrize("k", [2, 7, 60, 65, 66, 90])
def test_longstring_equals_its_definition_by_itertools_groupby(k):
    """Longest run of equal answers per row (Johnson 2005), against the definition written with
    Python's itertools.groupby over each row (a gap breaks a run and counts for none): the
    64-bit-word way (2 to 65 items) and the column loop (more) alike, with gaps, straight-liners
    and rows without answers."""
    from itertools import groupby

    from samesource.input.screening import _longstring

    rng = np.random.default_rng(k)
    x = rng.integers(1, 4, size=(400, k)).astype(float)
    x[rng.random(x.shape) < 0.1] = np.nan
    x[:5] = 2.0
    x[5] = np.nan
    x[6, : k // 2] = 1.0
    x[7, 1::2] = np.nan

    def by_definition(row):
        runs = [len(list(g)) for v, g in groupby(row.tolist()) if v == v]  # NaN != NaN
        return max(runs, default=0)

    assert _longstring(x).tolist() == [by_definition(r) for r in x]


@pytest.mark.parametrize("alpha", [0.001, 0.05, 1e-12])
def test_the_mahalanobis_flag_is_scipy_p_value_below_alpha(alpha):
    """The flag decides p < alpha from the critical value of each row's degrees of freedom,
    computing p itself only near it: against scipy.stats.chi2.sf for every row, including
    distances placed on the critical values themselves and rows without answers."""
    from samesource.input.screening import _p_below

    rng = np.random.default_rng(1)
    df = rng.integers(0, 40, size=5000)
    d2 = rng.chisquare(np.maximum(df, 1)) * rng.choice([1.0, 3.0], size=df.size)
    d2[df == 0] = np.nan
    on = rng.random(df.size) < 0.2
    d2[on & (df > 0)] = stats.chi2.isf(alpha, df[on & (df > 0)])
    d2[:3] = np.nextafter(stats.chi2.isf(alpha, 5.0), [0, np.inf, np.inf][:3])
    df[:3] = 5
    with np.errstate(invalid="ignore"):
        p = stats.chi2.sf(d2, df)
    want = np.where(np.isnan(p), False, p < alpha)
    assert _p_below(d2, df, alpha).tolist() == want.tolist()
