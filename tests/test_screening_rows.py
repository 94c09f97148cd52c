"""The respondent screen read a block of rows at a time: the same measures from a DataFrame,
FrameRows and CodedRows of the same answers, and the same as before it read ItemRows.

Outside references: the measures' published definitions as tests/test_screening.py checks
them (longstring: Johnson 2005; IRV: Dunn et al. 2018, here numpy's row SD with divisor
m - 1; Mahalanobis distance: scipy.spatial.distance.mahalanobis against numpy's covariance
of the complete rows, Mahalanobis 1936), and pandas' median. The regression pin
tests/data/screening_before.npz holds what the DataFrame implementation gave on this
module's survey before the screen read ItemRows (``python tests/test_screening_rows.py``
rewrote it then); it is a pin of our own behaviour, not an outside check.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from scipy.spatial.distance import mahalanobis

PIN = Path(__file__).resolve().parent / "data" / "screening_before.npz"
COLUMNS = ("longstring", "irv", "mahalanobis_d2", "mahalanobis_df", "mahalanobis_p",
           "share_missing", "n_out_of_range", "flag_longstring", "flag_irv", "flag_mahalanobis",
           "flag_missing", "flag_out_of_range", "flagged")


def survey(seed: int = 3, n: int = 1500):
    """Invented answers (a simulation, not a check of a statistic): four constructs of six
    5-point items, items 2 and 5 of each stored reverse-keyed; 3% of cells blank at random,
    planted straight-liners, rows with no or one answer, answers outside the scale.
    Returns (keyed items, answers as given in questionnaire order, reversed items)."""
    rng = np.random.default_rng(seed)
    traits = rng.multivariate_normal(np.zeros(4), 0.3 + 0.7 * np.eye(4), n)
    names, rev, cols = [], [], []
    for c in range(4):
        for i in range(6):
            y = 0.7 * traits[:, c] + np.sqrt(0.51) * rng.standard_normal(n)
            cols.append(np.digitize(y, [-1.3, -0.45, 0.45, 1.3]) + 1.0)
            names.append(f"t{c}_{i}")
            if i in (1, 4):
                rev.append(names[-1])
    keyed = np.column_stack(cols)
    keyed[rng.random(keyed.shape) < 0.03] = np.nan
    order = list(rng.permutation(names))  # the questionnaire's order, not the design's
    raw = pd.DataFrame(keyed.copy(), columns=names)
    raw[rev] = 6.0 - raw[rev]
    raw = raw[order].to_numpy()
    for r in rng.choice(n, 12, replace=False):  # straight-liners, answers as given
        raw[r] = rng.integers(1, 6)
    raw[20] = np.nan                 # no answer at all
    raw[21] = np.nan
    raw[21, 3] = 2.0                 # one answer
    raw[30, 5] = 7.0                 # outside the 1-5 scale
    raw[31, [0, 9]] = [0.0, 9.0]
    back = pd.DataFrame(raw, columns=order)
    keyed = back[names].copy()
    keyed[rev] = 6.0 - keyed[rev]
    index = np.arange(2, n + 2)      # the file's row numbers
    keyed.index = back.index = index
    return keyed, back, rev


def _equal(got: pd.DataFrame, want: pd.DataFrame, rel: float = 0.0) -> None:
    assert list(got.columns) == list(want.columns)
    assert list(got.index) == list(want.index)
    for c in want.columns:
        g, w = got[c].to_numpy(), want[c].to_numpy()
        assert g.dtype == w.dtype, c
        if w.dtype.kind == "f":
            np.testing.assert_allclose(g, w, rtol=rel, atol=0, equal_nan=True, err_msg=c)
        else:
            assert np.array_equal(g, w), c


@pytest.fixture(scope="module")
def answers():
    return survey()


def test_the_same_as_before_it_read_rows(answers):
    """The DataFrame call of before gives the pinned per-row measures: counts and flags
    exactly, IRV and distances to 1e-12 (the complete rows' sums are now merged a block at a
    time, and a row's SD no longer depends on the other rows of its block)."""
    from samesource.input.screening import screen_respondents

    keyed, raw, _ = answers
    pin = np.load(PIN)
    want = pd.DataFrame({c: pin[c] for c in COLUMNS}, index=pin["index"])
    _equal(screen_respondents(keyed, raw, scale_min=1, scale_max=5).per_row, want, rel=1e-12)


@pytest.mark.parametrize("block", [97, 65_536])
def test_frame_rows_and_coded_rows_give_the_same_measures(answers, monkeypatch, block):
    """A DataFrame, FrameRows and CodedRows of the same answers, the answers as given handed
    in whole (raw_items) or undone a block at a time (order, reversed_items): every measure the
    same, whatever the blocks."""
    import samesource.input.screening as screening
    from samesource.input.rows import CodedRows, FrameRows

    monkeypatch.setattr(screening, "ROW_BLOCK", block)
    keyed, raw, rev = answers
    order = list(raw.columns)
    want = screening.screen_respondents(keyed, raw, scale_min=1, scale_max=5)
    on_frame = screening.screen_respondents(FrameRows(keyed), scale_min=1, scale_max=5,
                                            order=order, reversed_items=rev)
    coded = CodedRows.encode(keyed.to_numpy() + 1.0, keyed.columns, keyed.index, 0.0)
    on_codes = screening.screen_respondents(coded, scale_min=2, scale_max=6, order=order,
                                            reversed_items=rev)
    for got in (on_frame, on_codes):
        _equal(got.per_row.drop(columns=["irv", "mahalanobis_d2", "mahalanobis_p"]),
               want.per_row.drop(columns=["irv", "mahalanobis_d2", "mahalanobis_p"]))
        _equal(got.per_row, want.per_row, rel=1e-12)  # answers + 1 (codes): the same SDs, distances
        assert got.flagged_rows == want.flagged_rows and got.reasons == want.reasons
        assert got.counts == want.counts and got.rules == want.rules and got.notes == want.notes
    # On the same stored answers, FrameRows and CodedRows agree to the last bit.
    same_codes = CodedRows.encode(keyed.to_numpy() - 0.0, keyed.columns, keyed.index, -1.0)
    _equal(screening.screen_respondents(same_codes, scale_min=1, scale_max=5, order=order,
                                        reversed_items=rev).per_row, on_frame.per_row)


def test_a_selection_of_coded_rows_reads_as_those_rows_alone(answers, monkeypatch):
    """CodedRows.select hands out blocks of another size (the kept rows of each stored block):
    the same measures as a DataFrame of the kept rows."""
    import samesource.input.screening as screening
    from samesource.input.rows import CodedRows

    monkeypatch.setattr(screening, "ROW_BLOCK", 101)
    keyed, raw, rev = answers
    keep = np.random.default_rng(5).random(len(keyed)) < 0.7
    coded = CodedRows.encode(keyed.to_numpy(), keyed.columns, keyed.index, -1.0).select(keep)
    got = screening.screen_respondents(coded, scale_min=1, scale_max=5, order=list(raw.columns),
                                       reversed_items=rev)
    want = screening.screen_respondents(keyed[keep], raw[keep], scale_min=1, scale_max=5)
    _equal(got.per_row, want.per_row, rel=1e-12)
    assert got.flagged_rows == want.flagged_rows and got.reasons == want.reasons


def test_measures_against_outside_references(answers):
    """IRV: numpy's SD (divisor m - 1) of each row's answers as given; longstring worked
    from its definition (Johnson 2005) by a plain loop; Mahalanobis distance:
    scipy.spatial.distance.mahalanobis against numpy's mean and covariance of the complete
    rows, on each row's answered items (Mahalanobis 1936), p from scipy's chi-square."""
    from samesource.input.rows import FrameRows
    from samesource.input.screening import screen_respondents

    keyed, raw, rev = answers
    res = screen_respondents(FrameRows(keyed), scale_min=1, scale_max=5, order=list(raw.columns),
                             reversed_items=rev)
    pr = res.per_row
    R = raw.to_numpy()
    for i in range(len(R)):
        a = R[i][~np.isnan(R[i])]
        want_irv = np.std(a, ddof=1) if a.size >= 2 else np.nan
        np.testing.assert_allclose(pr["irv"].iloc[i], want_irv, rtol=1e-12, equal_nan=True)
    best = []
    for row in R:
        run = top = 0
        for j, v in enumerate(row):
            run = 0 if np.isnan(v) else run + 1 if j and row[j - 1] == v else 1
            top = max(top, run)
        best.append(top)
    assert pr["longstring"].tolist() == best
    complete = keyed.dropna().to_numpy()
    mean, cov = complete.mean(axis=0), np.cov(complete, rowvar=False)
    X = keyed.to_numpy()
    for i in [0, 1, 2, 3, 4, 5, 20, 21, 30, 31, 777, len(X) - 1]:
        ok = ~np.isnan(X[i])
        if not ok.any():
            assert np.isnan(pr["mahalanobis_d2"].iloc[i])
            continue
        ref = mahalanobis(X[i][ok], mean[ok], np.linalg.inv(cov[np.ix_(ok, ok)])) ** 2
        assert pr["mahalanobis_d2"].iloc[i] == pytest.approx(ref, rel=1e-10)
        assert pr["mahalanobis_df"].iloc[i] == ok.sum()
        assert pr["mahalanobis_p"].iloc[i] == pytest.approx(stats.chi2.sf(ref, ok.sum()), rel=1e-8)
    assert pr["share_missing"].to_numpy() == pytest.approx(np.isnan(X).mean(axis=1), abs=1e-15)
    assert pr["n_out_of_range"].to_numpy().tolist() == ((X < 1) | (X > 5)).sum(axis=1).tolist()


def test_spread_is_pandas_median_and_max(answers):
    """The report's median and maximum per measure, from the compact columns: pandas'
    Series.median() and max() of the per-row frame (skipping NaN), exactly."""
    from samesource.input.screening import screen_respondents

    keyed, raw, _ = answers
    res = screen_respondents(keyed, raw, scale_min=1, scale_max=5)
    for col in ("longstring", "irv", "mahalanobis_d2", "share_missing"):
        s = res.per_row[col]
        assert res.measures.spread(col) == (float(s.median()), float(s.max())), col
    few = screen_respondents(keyed.iloc[:3], raw.iloc[:3], scale_min=1, scale_max=5)
    assert all(np.isnan(v) for v in few.measures.spread("mahalanobis_d2"))  # none defined


def test_moments_handed_in_and_whiteners_factored_again(answers, monkeypatch):
    """The complete rows' sums handed in (as a streamed reader has them: chunked_moments'
    MomentSums) give the same distances; so does a cache too small to keep any pattern's
    whitener between blocks (each factored again where needed)."""
    import samesource.input.screening as screening
    from samesource.engine.chunked_moments import MomentSums

    keyed, raw, _ = answers
    want = screening.screen_respondents(keyed, raw, scale_min=1, scale_max=5).per_row
    sums = MomentSums.of(keyed.dropna().to_numpy())
    got = screening.screen_respondents(keyed, raw, scale_min=1, scale_max=5, moments=sums).per_row
    _equal(got, want, rel=1e-12)
    monkeypatch.setattr(screening, "ROW_BLOCK", 50)
    monkeypatch.setattr(screening, "WHITENERS_BYTES", 0)
    _equal(screening.screen_respondents(keyed, raw, scale_min=1, scale_max=5).per_row, want, rel=1e-12)
    with pytest.raises(ValueError, match="moments are of 3 items"):
        screening.screen_respondents(keyed, raw, scale_min=1, scale_max=5,
                                     moments=MomentSums.of(np.ones((4, 3))))


def test_how_the_answers_as_given_are_named(answers):
    from samesource.input.rows import FrameRows
    from samesource.input.screening import screen_respondents

    keyed, raw, rev = answers
    rows = FrameRows(keyed)
    with pytest.raises(ValueError, match="order names 'nope'"):
        screen_respondents(rows, scale_min=1, scale_max=5, order=["nope"])
    with pytest.raises(ValueError, match="columns names 'nope'"):
        screen_respondents(rows, scale_min=1, scale_max=5, columns=["nope"])
    with pytest.raises(ValueError, match="not both"):
        screen_respondents(keyed, raw, scale_min=1, scale_max=5, order=list(raw.columns))
    with pytest.raises(ValueError, match="needs order"):
        screen_respondents(rows, scale_min=1, scale_max=5, reversed_items=rev)
    # A subset screened, the questionnaire order naming items beyond it: the longstring share
    # counts the questionnaire, the distances only the screened items.
    sub = screen_respondents(rows, scale_min=1, scale_max=5, columns=list(keyed.columns[:12]),
                             order=list(raw.columns), reversed_items=rev)
    assert "24 items" in sub.rules["longstring"]
    assert sub.per_row["mahalanobis_df"].max() == 12


def test_packed_patterns_are_numpys_unique_rows():
    """Patterns from packed rows: numpy's np.unique(axis=0) of the boolean rows (reference)."""
    from samesource.engine.patterns import packed_patterns

    rng = np.random.default_rng(2)
    for k in (5, 8, 20, 70):
        obs = rng.random((300, k)) < 0.9
        pats, inv = packed_patterns(np.packbits(obs, axis=1), k)
        want, want_inv = np.unique(obs, axis=0, return_inverse=True)
        assert np.array_equal(pats, want) and np.array_equal(inv, want_inv.reshape(-1))


def _pin() -> None:
    from samesource.input.screening import screen_respondents

    keyed, raw, _ = survey()
    res = screen_respondents(keyed, raw, scale_min=1, scale_max=5)
    pr = res.per_row
    np.savez_compressed(PIN, index=pr.index.to_numpy(), **{c: pr[c].to_numpy() for c in COLUMNS})


if __name__ == "__main__":
    sys.exit(_pin())
