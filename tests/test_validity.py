"""Discriminant validity: HTMT and the Fornell-Larcker criterion."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from samesource.statistics.validity import HTMT_LIBERAL, HTMT_STRICT, fornell_larcker, htmt, htmt2


def _corr(names: list[str], pairs: dict[tuple[str, str], float]) -> pd.DataFrame:
    m = pd.DataFrame(np.eye(len(names)), index=names, columns=names)
    for (a, b), r in pairs.items():
        m.loc[a, b] = m.loc[b, a] = r
    return m


@pytest.fixture
def small_corr() -> pd.DataFrame:
    names = ["a1", "a2", "b1", "b2", "b3", "c1", "c2"]
    pairs = {
        ("a1", "a2"): 0.6,
        ("b1", "b2"): 0.5, ("b1", "b3"): 0.4, ("b2", "b3"): 0.6,
        ("c1", "c2"): 0.8,
        ("a1", "b1"): 0.3, ("a1", "b2"): -0.2, ("a1", "b3"): 0.1,
        ("a2", "b1"): 0.2, ("a2", "b2"): 0.3, ("a2", "b3"): 0.1,
    }  # fmt: skip
    for a in ("a1", "a2"):
        for c in ("c1", "c2"):
            pairs[(a, c)] = 0.5
    for b in ("b1", "b2", "b3"):
        for c in ("c1", "c2"):
            pairs[(b, c)] = 0.4
    return _corr(names, pairs)


BLOCKS = {"A": ["a1", "a2"], "B": ["b1", "b2", "b3"], "C": ["c1", "c2"]}


def test_htmt_hand_worked(small_corr):
    # Henseler, Ringle & Sarstedt (2015) formula, worked by hand:
    # A-B: heterotrait r = .3 -.2 .1 .2 .3 .1 (signed, as in the paper) -> mean .8 / 6;
    #      monotrait A = .6, B = (.5 + .4 + .6) / 3 = .5 -> (.8 / 6) / sqrt(.6 * .5).
    # A-C: .5 / sqrt(.6 * .8).   B-C: .4 / sqrt(.5 * .8).
    res = htmt(small_corr, BLOCKS)
    assert list(res) == [("A", "B"), ("A", "C"), ("B", "C")]
    assert res[("A", "B")] == pytest.approx((0.8 / 6) / math.sqrt(0.30), abs=1e-12)
    assert res[("A", "C")] == pytest.approx(0.5 / math.sqrt(0.48), abs=1e-12)
    assert res[("B", "C")] == pytest.approx(0.4 / math.sqrt(0.40), abs=1e-12)


def test_htmt_equals_factor_correlation_under_tau_equivalence():
    # From the formula (Henseler et al. 2015): with equal loadings l on both constructs and
    # factor correlation phi, within-block r = l^2 and between-block r = phi * l^2, so
    # HTMT = phi * l^2 / sqrt(l^2 * l^2) = phi.
    lam, phi = 0.7, 0.45
    names = ["x1", "x2", "x3", "y1", "y2", "y3", "y4"]
    pairs = {}
    for i, a in enumerate(names):
        for b in names[i + 1 :]:
            same = a[0] == b[0]
            pairs[(a, b)] = lam**2 if same else phi * lam**2
    res = htmt(_corr(names, pairs), {"X": names[:3], "Y": names[3:]})
    assert res[("X", "Y")] == pytest.approx(phi, abs=1e-12)


def test_htmt_undefined_pairs_are_none(small_corr):
    bad = small_corr.copy()
    bad.loc["c1", "c2"] = bad.loc["c2", "c1"] = -0.2  # monotrait mean of C <= 0
    res = htmt(bad, BLOCKS)
    assert res[("A", "C")] is None and res[("B", "C")] is None
    assert res[("A", "B")] == pytest.approx((0.8 / 6) / math.sqrt(0.30), abs=1e-12)
    # A single-item construct has no monotrait correlation.
    single = htmt(small_corr, {"A": ["a1", "a2"], "D": ["c1"]})
    assert single[("A", "D")] is None
    # A missing correlation leaves the pair undefined rather than leaking NaN.
    nan = small_corr.copy()
    nan.loc["a1", "b1"] = nan.loc["b1", "a1"] = np.nan
    assert htmt(nan, BLOCKS)[("A", "B")] is None
    with pytest.raises(KeyError):
        htmt(small_corr, {"A": ["a1", "zz"], "B": ["b1", "b2"]})


def test_htmt_thresholds():
    assert (HTMT_STRICT, HTMT_LIBERAL) == (0.85, 0.90)  # Henseler et al. (2015)


def test_fornell_larcker_hand_worked():
    # Fornell & Larcker (1981): each AVE must exceed the squared factor correlation.
    ave = {"A": 0.50, "B": 0.60, "C": None, "A2": 0.55}
    corr = {("A", "B"): 0.70, ("B", "A2"): 0.10, ("A", "C"): 0.30, ("B", "D"): np.nan}
    res = fornell_larcker(ave, {("A", "B"): 0.70})
    # .70^2 = .49 < .50 and < .60 -> holds.
    assert res[("A", "B")]["r_squared"] == pytest.approx(0.49)
    assert res[("A", "B")]["holds"] is True
    assert res[("A", "B")]["ave_a"] == 0.50 and res[("A", "B")]["ave_b"] == 0.60
    # -.75^2 = .5625 > .50 (A) though < .60 (B) -> fails.
    res = fornell_larcker(ave, {("A", "B"): -0.75})
    assert res[("A", "B")]["r_squared"] == pytest.approx(0.5625)
    assert res[("A", "B")]["holds"] is False
    # Missing AVE or correlation -> undecided, no NaN.
    res = fornell_larcker(ave, corr)
    assert list(res) == list(corr)
    assert res[("A", "C")]["holds"] is None and res[("A", "C")]["ave_b"] is None
    assert res[("B", "D")]["holds"] is None and res[("B", "D")]["r_squared"] is None
    assert res[("B", "A2")]["holds"] is True


def test_htmt_sign_of_the_association_is_dropped(small_corr):
    # A negative association (every heterotrait correlation reversed) gives the same HTMT.
    neg = small_corr.copy()
    for a in BLOCKS["A"]:
        for c in BLOCKS["C"]:
            neg.loc[a, c] = neg.loc[c, a] = -neg.loc[a, c]
    assert htmt(neg, BLOCKS)[("A", "C")] == pytest.approx(htmt(small_corr, BLOCKS)[("A", "C")])


def test_htmt2_hand_worked(small_corr):
    # Roemer, Schuberth & Henseler (2021) formula, worked by hand with geometric means:
    # A-C: every heterotrait r .5 -> .5 / sqrt(.6 * .8) (= HTMT when all correlations are equal);
    # B-C: .4 / sqrt(geomean(.5, .4, .6) * .8); A-B has heterotrait correlations of both signs: None.
    res = htmt2(small_corr, BLOCKS)
    assert res[("A", "C")] == pytest.approx(0.5 / math.sqrt(0.6 * 0.8), abs=1e-12)
    gb = (0.5 * 0.4 * 0.6) ** (1 / 3)
    assert res[("B", "C")] == pytest.approx(0.4 / math.sqrt(gb * 0.8), abs=1e-12)
    assert res[("A", "B")] is None
