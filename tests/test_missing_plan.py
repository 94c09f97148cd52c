"""The missing-data plan and the checks that read its rows a block at a time
(measurement/input/missing.py, statistics/scores.py, statistics/teams.py,
method_checks/assumptions.py): each sum over blocks equals the whole-array computation of a
library outside the project on the same answers, on a DataFrame's rows (FrameRows) and on the
same answers kept as codes (CodedRows), with blocks of 97 rows so that every sum spans many
blocks. References: pandas' ``DataFrame.corr`` (pairwise-complete), numpy's ``cov`` and
``var``, scipy.stats' ``skew``/``kurtosis`` (bias-corrected), ``np.unique``, pandas' groupby
mean."""

from __future__ import annotations

import warnings
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from samesource.engine.chunked_moments import pattern_sums
from samesource.engine.fiml import PatternData
from samesource.engine.fitting import Moments
from samesource.input.design import parse_design
from samesource.input.missing import plan_missing
from samesource.input.rows import CodedRows, FrameRows, ItemRows
from samesource.method_checks.assumptions import item_distribution
from samesource.options import AnalysisOptions
from samesource.statistics.scores import scale_scores, score_moments
from samesource.statistics.teams import group_item_variances, group_table, rwg_from_variance, rwg_j

SMALL = 97


class SmallBlocks(ItemRows):
    """Rows handed out 97 at a time, whatever block size the caller asks for."""

    def __init__(self, inner: ItemRows) -> None:
        self.inner, self.names = inner, inner.names

    def __len__(self):
        return len(self.inner)

    @property
    def labels(self):
        return self.inner.labels

    def blocks(self, columns=None, *, size=SMALL):
        return self.inner.blocks(columns, size=SMALL)

    def select(self, keep):
        return SmallBlocks(self.inner.select(keep))


NAMES = [f"q{j}" for j in range(9)]


def _answers(n=1500, gaps=0.06, seed=11):
    """Five-point answers of three correlated scales (three items each), some cells missing."""
    rng = np.random.default_rng(seed)
    f = rng.normal(size=(n, 3)) @ np.array([[1, .4, .3], [0, 1, .5], [0, 0, 1]])
    X = np.clip(np.round(3 + np.repeat(f, 3, axis=1) * 0.8 + rng.normal(size=(n, 9)) * 0.8), 1, 5)
    X[rng.random(X.shape) < gaps] = np.nan
    return X


def _rows(X, kind):
    labels = np.arange(2, 2 + len(X), dtype=np.int64)
    inner = FrameRows(pd.DataFrame(X, columns=NAMES, index=labels)) if kind == "frame" \
        else CodedRows.encode(X, NAMES, labels, 1.0)
    return SmallBlocks(inner)


def _design():
    return parse_design({
        "constructs": {"A": {"items": NAMES[:3]}, "B": {"items": NAMES[3:6]}, "C": {"items": NAMES[6:]}},
        "paths": [{"outcome": "C", "predictors": ["A", "B"]}]})


def _plan(X, kind, **options):
    return plan_missing(SimpleNamespace(rows=_rows(X, kind)), AnalysisOptions(**options))


KINDS = ["frame", "coded"]


@pytest.mark.parametrize("kind", KINDS)
def test_pairwise_correlations_are_pandas_corr(kind):
    # FIML keeps rows with gaps: the correlations are pairwise-complete, as DataFrame.corr's
    X = _answers()
    X[:40, 2] = 3.0          # a pair where one item is constant on the rows both answered
    X[:, 5] = np.where(np.arange(len(X)) < 700, np.nan, X[:, 5])   # an item many rows skipped
    plan = _plan(X, kind, missing="fiml")
    want = pd.DataFrame(X, columns=NAMES).corr()
    got = plan.corr(NAMES)
    np.testing.assert_allclose(got.to_numpy(), want.to_numpy(), rtol=0, atol=1e-12)
    sub = ["q7", "q1", "q5"]
    np.testing.assert_allclose(plan.corr(sub).to_numpy(), want.loc[sub, sub].to_numpy(), atol=1e-12)


def test_pairwise_correlations_of_a_constant_pair_are_nan_as_in_pandas():
    X = _answers(n=300)
    X[:, 4] = 2.0
    got = _plan(X, "coded", missing="fiml").corr(NAMES).to_numpy()
    want = pd.DataFrame(X, columns=NAMES).corr().to_numpy()
    assert np.array_equal(np.isnan(got), np.isnan(want))
    np.testing.assert_allclose(got[~np.isnan(want)], want[~np.isnan(want)], atol=1e-12)


@pytest.mark.parametrize("kind", KINDS)
def test_listwise_plan_moments_are_numpys_on_the_complete_rows(kind):
    X = _answers()
    plan = _plan(X, kind)
    complete = X[~np.isnan(X).any(axis=1)]
    assert plan.rows_analyzed == len(complete)
    assert plan.excluded_by_reason == {"missing_item": len(X) - len(complete)}
    m = plan.data_for(["q3", "q0"])
    assert isinstance(m, Moments) and m.n == len(complete)
    np.testing.assert_allclose(m.cov, np.cov(complete[:, [3, 0]], rowvar=False, ddof=0), atol=1e-12)
    np.testing.assert_allclose(m.mean, complete[:, [3, 0]].mean(axis=0), atol=1e-12)
    np.testing.assert_allclose(plan.corr(NAMES).to_numpy(), np.corrcoef(complete, rowvar=False), atol=1e-12)


@pytest.mark.parametrize("kind", KINDS)
def test_fiml_plan_gives_the_pattern_sums_of_the_rows(kind):
    X = _answers()
    X[5, :] = np.nan   # a row with no answer: FIML leaves it out
    plan = _plan(X, kind, missing="fiml")
    assert plan.excluded_by_reason == {"no_answers": 1} and plan.rows_analyzed == len(X) - 1
    items = ["q8", "q2", "q4"]
    data = plan.data_for(items)
    assert isinstance(data, PatternData) and data.names == tuple(items)
    sub = X[:, [8, 2, 4]]
    want = pattern_sums([sub[~np.isnan(sub).all(axis=1)]])   # the rows themselves, in one piece
    assert len(data.patterns) == len(want)
    for g, w in zip(data.patterns, want, strict=True):
        assert np.array_equal(g.observed, w.observed) and g.sums.n == w.sums.n
        np.testing.assert_allclose(g.sums.mean, w.sums.mean, atol=1e-12)
        np.testing.assert_allclose(g.sums.cross, w.sums.cross, atol=1e-9)


@pytest.mark.parametrize("kind", KINDS)
def test_complete_rows_on_a_scale_are_a_selection_and_their_moments_numpys(kind):
    X = _answers()
    plan = _plan(X, kind, missing="fiml")
    items = ["q3", "q4", "q5"]
    ok = ~np.isnan(X[:, 3:6]).any(axis=1)
    sel = plan.complete(items)
    assert len(sel) == ok.sum()
    np.testing.assert_array_equal(sel.labels, np.arange(2, 2 + len(X))[ok])
    m = plan.complete_moments(items)
    np.testing.assert_allclose(m.cov, np.cov(X[ok][:, 3:6], rowvar=False, ddof=0), atol=1e-12)


@pytest.mark.parametrize("kind", KINDS)
def test_flagged_rows_are_dropped_by_label(kind):
    X = _answers(gaps=0.0)
    plan = _plan(X, kind, drop_flagged=True)
    assert plan.rows_analyzed == len(X)
    rows = _rows(X, kind)
    plan = plan_missing(SimpleNamespace(rows=rows), AnalysisOptions(drop_flagged=True), flagged=[2, 10, 99999])
    assert plan.dropped_flagged == 2 and plan.rows_analyzed == len(X) - 2
    assert 10 not in plan.rows.labels and 2 not in plan.rows.labels
    np.testing.assert_array_equal(plan.frame.to_numpy(), np.delete(X, [0, 8], axis=0))


@pytest.mark.parametrize("kind", KINDS)
def test_answer_distributions_are_scipys_and_numpys(kind):
    X = _answers()
    X[:, 1] = np.where(np.arange(len(X)) % 2 == 0, 1.0, X[:, 1])   # skewed
    d = item_distribution(_rows(X, kind), NAMES)
    for j, it in enumerate(NAMES):
        x = X[~np.isnan(X[:, j]), j]
        assert d.loc[it, "categories"] == len(np.unique(x))
        assert d.loc[it, "skew"] == pytest.approx(stats.skew(x, bias=False), rel=1e-10, abs=1e-12)
        assert d.loc[it, "kurtosis"] == pytest.approx(stats.kurtosis(x, bias=False), rel=1e-10, abs=1e-12)
    # the DataFrame form, as the stage once called it, gives the same table
    frame = pd.DataFrame(X, columns=NAMES)
    pd.testing.assert_frame_equal(item_distribution(frame, NAMES), d, rtol=1e-12)


def test_answer_distribution_of_a_constant_item_or_few_answers_is_nan_as_in_scipy():
    X = np.full((50, 2), np.nan)
    X[:, 0] = 4.0
    X[:2, 1] = [1.0, 2.0]
    d = item_distribution(FrameRows(pd.DataFrame(X, columns=["a", "b"])), ["a", "b"])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")   # scipy warns of a constant sample
        assert np.isnan(stats.skew(X[:, 0], bias=False)) and np.isnan(d.loc["a", "skew"])
    assert d.loc["a", "categories"] == 1 and d.loc["b", "categories"] == 2
    assert np.isnan(d.loc["b", "skew"]) and np.isnan(d.loc["b", "kurtosis"])


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("missing", ["listwise", "fiml"])
def test_scale_score_moments_are_numpys_cov_of_the_scores(kind, missing):
    X = _answers()
    plan = _plan(X, kind, missing=missing)
    design = _design()
    names = ["A", "C", "B"]
    frame = pd.DataFrame(X, columns=NAMES, index=np.arange(2, 2 + len(X)))
    frame = frame.dropna() if missing == "listwise" else frame[~frame.isna().all(axis=1)]
    scores = scale_scores(frame, design, names)
    # the scores themselves: pandas' row mean over the answered items
    want_scores = pd.DataFrame({n: frame[list(design.constructs[n].items)].mean(axis=1) for n in names})
    np.testing.assert_allclose(scores.to_numpy(), want_scores.to_numpy(), atol=1e-12)
    np.testing.assert_allclose(scale_scores(plan.rows, design, names).to_numpy(), want_scores.to_numpy(),
                               atol=1e-12)
    S = want_scores.dropna().to_numpy()
    sums = score_moments(plan.rows, design, names)
    assert sums.n == len(S)
    np.testing.assert_allclose(sums.cross / sums.n, np.cov(S, rowvar=False, ddof=0), atol=1e-12)
    np.testing.assert_allclose(sums.mean, S.mean(axis=0), atol=1e-12)
    if missing == "listwise":   # complete rows: A S A' from the item moments, the same
        items = [it for n in names for it in design.constructs[n].items]
        fast = score_moments(plan.rows, design, names, plan.moments(items))
        assert fast.n == sums.n
        np.testing.assert_allclose(fast.cross, sums.cross, rtol=1e-10)


@pytest.mark.parametrize("kind", KINDS)
def test_group_variances_give_rwg_and_group_means_pandas(kind):
    X = _answers(n=800)
    rng = np.random.default_rng(4)
    codes = rng.integers(-1, 12, len(X))     # -1: no group
    codes[codes == 7] = 8                    # a group with no rows
    rows = _rows(X, kind)
    items = ["q0", "q1", "q2"]
    n, s2 = group_item_variances(rows, items, codes, 12)
    for t in range(12):
        members = X[codes == t][:, :3]
        complete = members[~np.isnan(members).any(axis=1)]
        assert n[t] == len(complete)
        if len(complete) >= 2:
            assert s2[t] == pytest.approx(np.mean(np.var(complete, axis=0, ddof=1)), rel=1e-12)
            assert rwg_from_variance(s2[t], 3, 5) == pytest.approx(rwg_j(members, 5), rel=1e-12)
    keep = codes >= 0
    scores = scale_scores(rows, _design(), ["A", "B"]).to_numpy()[keep]
    labels = np.array([f"team {t:02d}" for t in range(12)], dtype=object)
    table, withheld = group_table(scores, ["A", "B"], codes[keep], labels, min_size=60)
    df = pd.DataFrame(scores, columns=["A", "B"]).assign(_g=labels[codes[keep]])
    sizes, means = df.groupby("_g").size(), df.groupby("_g").mean()
    assert withheld == int((sizes < 60).sum())
    assert [r["group"] for r in table] == [g for g in sizes.index if sizes[g] >= 60]
    for r in table:
        assert r["n"] == sizes[r["group"]]
        assert r["A"] == pytest.approx(means.loc[r["group"], "A"], rel=1e-12)


# --- the stages on the sample survey: FrameRows and CodedRows of its answers, and the DataFrame
# computations the stages made before they read rows a block at a time ---------------------

def _sample(missing):
    import dataclasses
    import json
    from pathlib import Path

    from samesource.input.loading import load_table
    from samesource.input.prepare import prepare

    root = Path(__file__).resolve().parents[1] / "sample_surveys"
    design = parse_design(json.loads((root / "staff_survey_design.json").read_text(encoding="utf-8")))
    prepared = prepare(load_table(str(root / "staff_survey.csv")), design)
    items = prepared.items
    coded = dataclasses.replace(prepared, item_rows=CodedRows.encode(
        items.to_numpy(), list(items.columns), items.index.to_numpy(), prepared.scale_min))
    opts = AnalysisOptions(missing=missing)
    return design, opts, [(p, plan_missing(p, opts)) for p in (prepared, coded)]


def _close(a, b, path=""):
    """Equal nested results: numbers within 1e-10 relative (sums in another order)."""
    if isinstance(a, dict):
        assert set(a) == set(b), path
        for k in a:
            _close(a[k], b[k], f"{path}/{k}")
    elif isinstance(a, list | tuple):
        assert len(a) == len(b), path
        for i, (x, y) in enumerate(zip(a, b, strict=True)):
            _close(x, y, f"{path}/{i}")
    elif isinstance(a, float) and isinstance(b, float):
        assert (np.isnan(a) and np.isnan(b)) or a == pytest.approx(b, rel=1e-10, abs=1e-12), path
    else:
        assert a == b, path


@pytest.mark.parametrize("missing", ["listwise", "fiml"])
def test_method_checks_from_rows_equal_the_dataframe_computations(missing):
    from samesource.input.missing import moments_corr
    from samesource.method_checks.assumptions import items_continuous
    from samesource.method_checks.collinearity import full_collinearity_vif, vif_from_corr
    from samesource.method_checks.harman import harman_efa, harman_from_corr
    from samesource.method_checks.method_variance import (
        _score_sums,
        collinearity_section,
        marker_section,
    )

    design, _, runs = _sample(missing)
    (_, plan), (_, coded) = runs
    frame = plan.frame
    subst = [it for c in design.substantive for it in c.items]
    old = harman_efa(frame[subst].dropna())
    for p in (plan, coded):
        new = harman_from_corr(moments_corr(p.complete_moments(subst).cov))
        np.testing.assert_allclose(new.eigenvalues, old.eigenvalues, atol=1e-12)
    names = [c.name for c in design.substantive]
    old_vif = full_collinearity_vif(scale_scores(frame, design, names))
    for p in (plan, coded):
        new_vif = vif_from_corr(moments_corr(_score_sums(design, p, names).cross), names)
        _close(new_vif, old_vif)
    _close(collinearity_section(design, coded), collinearity_section(design, plan))
    if design.marker is not None:
        _close(marker_section(design, coded), marker_section(design, plan))
    a, b = items_continuous(plan.rows, design), items_continuous(coded.rows, design)
    assert a == b == items_continuous(frame, design)


@pytest.mark.parametrize("missing", ["listwise", "fiml"])
def test_reliability_and_teams_equal_on_frame_and_coded_rows(missing):
    from samesource.results import FitCache
    from samesource.statistics.reliability import cronbach_alpha, item_statistics
    from samesource.statistics.reliability_stage import construct_reliability
    from samesource.statistics.teams_stage import teams_section

    design, opts, runs = _sample(missing)
    (prepared, plan), (coded_prepared, coded) = runs
    rel = [construct_reliability(design, p, opts, FitCache()) for p in (plan, coded)]
    for c in design.constructs.values():
        a, b = rel[0].scales[c.name], rel[1].scales[c.name]
        old_alpha = cronbach_alpha(plan.frame[list(c.items)], confidence=opts.confidence)   # pandas' dropna, numpy's cov
        old_stats = item_statistics(plan.frame[list(c.items)])
        for r in (a, b):
            assert r.n == old_alpha.n and r.alpha == pytest.approx(old_alpha.alpha, rel=1e-12)
            for it in c.items:
                assert r.item_stats[it].item_rest_r == pytest.approx(old_stats.loc[it, "item_rest_r"], rel=1e-10)
                assert r.item_stats[it].sd == pytest.approx(old_stats.loc[it, "sd"], rel=1e-12)
        assert a.omega == pytest.approx(b.omega, rel=1e-8) if a.omega is not None else b.omega is None
    if design.group_column:
        t = [teams_section(design, p, pl, opts) for p, pl in ((prepared, plan), (coded_prepared, coded))]
        from samesource.results import thaw
        _close(thaw(t[1].section), thaw(t[0].section))


def test_each_blocks_answer_counts_are_numpys_unique_counts():
    # outside reference: numpy.unique(return_counts=True) per column, on blocks of whole-number
    # codes (complete or with gaps, negative codes); fractions and a range too wide for one
    # count are left to the power sums (None)
    from samesource.method_checks.assumptions import _block_counts

    rng = np.random.default_rng(11)
    codes = rng.integers(-3, 8, (500, 4)).astype(float)
    gappy = codes.copy()
    gappy[rng.random(gappy.shape) < 0.2] = np.nan
    gappy[:, 3] = np.nan  # a column with no answer in the block
    for X in (codes, gappy):
        answered = ~np.isnan(X)
        lo, counts = _block_counts(X, answered, bool(answered.all()))
        for j in range(X.shape[1]):
            values, n = np.unique(X[answered[:, j], j], return_counts=True)
            np.testing.assert_array_equal(lo + np.flatnonzero(counts[j]), values)
            np.testing.assert_array_equal(counts[j][counts[j] > 0], n)
    for X in (codes / 2, codes * 1e5):
        assert _block_counts(X, ~np.isnan(X), True) is None


def test_answer_distributions_over_counted_and_summed_blocks_are_scipys():
    # outside reference: scipy.stats.skew / kurtosis and numpy.unique over every answer, where
    # the first block of rows is whole numbers (counted) and the second has halves (summed)
    from samesource.input.rows import BLOCK_ROWS

    rng = np.random.default_rng(5)
    X = rng.integers(1, 8, (BLOCK_ROWS + 3000, 3)).astype(float)
    X[BLOCK_ROWS:, 1] += 0.5
    X[rng.random(X.shape) < 0.05] = np.nan
    X[:BLOCK_ROWS, 2] = np.where(np.arange(BLOCK_ROWS) % 3 == 0, 1.0, X[:BLOCK_ROWS, 2])  # skewed
    d = item_distribution(FrameRows(pd.DataFrame(X, columns=["a", "b", "c"])), ["a", "b", "c"])
    for j, it in enumerate(["a", "b", "c"]):
        x = X[~np.isnan(X[:, j]), j]
        assert d.loc[it, "categories"] == len(np.unique(x))
        assert d.loc[it, "skew"] == pytest.approx(stats.skew(x, bias=False), rel=1e-10, abs=1e-12)
        assert d.loc[it, "kurtosis"] == pytest.approx(stats.kurtosis(x, bias=False), rel=1e-10, abs=1e-12)
