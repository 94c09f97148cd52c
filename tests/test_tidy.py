"""The one-function-per-statistic helpers (samesource.alpha, omega, htmt, ...).

Outside references: pingouin's cronbach_alpha (a general-purpose reference library) for
alpha and its interval; numpy's eigenvalues for Harman's shares; and for every other number
report.json of the same simulated survey, whose statistics are themselves checked against
outside references in test_reliability.py, test_validity.py and test_method_formulas.py.
"""

from __future__ import annotations

import io

import numpy as np
import pandas as pd
import pingouin as pg
import pytest
from conftest import small_survey

import samesource
from samesource.errors import DataError
from samesource.executor import SerialExecutor


@pytest.fixture(scope="module")
def survey():
    data, design = small_survey()
    raw = pd.read_csv(io.BytesIO(data))
    report = samesource.analyze(raw, design, executor=SerialExecutor()).to_dict()
    df = raw.copy()
    lo, hi = design["response_scale"]["min"], design["response_scale"]["max"]
    for c in design["constructs"].values():
        for it in c.get("reverse", []):
            df[it] = lo + hi - df[it]
    constructs = {n: c["items"] for n, c in design["constructs"].items()}
    assert report["data"]["rows_analyzed"] == len(df.dropna())  # the same rows
    return df, constructs, report


def test_alpha_is_pingouins_and_the_reports(survey):
    df, constructs, report = survey
    table = samesource.alpha(df, constructs).set_index("construct")
    for name, items in constructs.items():
        a, ci = pg.cronbach_alpha(df[items])
        assert table.loc[name, "alpha"] == pytest.approx(a)
        assert [table.loc[name, "ci_low"], table.loc[name, "ci_high"]] == pytest.approx(ci, abs=1e-3)
        assert table.loc[name, "alpha"] == pytest.approx(report["constructs"][name]["alpha"])


def test_item_stats_omega_htmt_vif_marker_are_the_reports(survey):
    df, constructs, report = survey
    items = samesource.item_stats(df, constructs)
    for _, row in items.iterrows():
        want = report["constructs"][row.construct]["item_stats"][row["item"]]
        assert row.item_rest_r == pytest.approx(want["item_rest_r"])
        assert row.alpha_if_deleted == pytest.approx(want["alpha_if_deleted"])
    omega = samesource.omega(df, constructs).set_index("construct")
    for name in constructs:
        assert omega.loc[name, "omega"] == pytest.approx(report["constructs"][name]["omega"], abs=1e-6)
    htmt = samesource.htmt(df, constructs)
    for _, row in htmt.iterrows():
        assert row.htmt == pytest.approx(report["measurement_model"]["htmt"][f"{row.construct_a}|{row.construct_b}"])
    vif = samesource.vif(df, {n: i for n, i in constructs.items() if n != "weather"})
    assert dict(zip(vif.construct, vif.vif, strict=True)) == pytest.approx(
        report["method_variance"]["collinearity_vif"]["values"])
    marker = samesource.marker_adjusted(df, constructs, "weather")
    chosen = marker[marker.chosen]
    want = report["method_variance"]["marker"]
    assert chosen.r_m.iloc[0] == pytest.approx(want["r_m"])
    for _, row in chosen.iterrows():
        assert row.r_adjusted == pytest.approx(want["pairs"][f"{row.construct_a}|{row.construct_b}"]["r_adjusted"])


def test_harman_shares_are_the_eigenvalues_over_the_items(survey):
    df, constructs, report = survey
    substantive = {n: i for n, i in constructs.items() if n != "weather"}  # the analysis leaves markers out
    table = samesource.harman(df, substantive)
    ev = np.sort(np.linalg.eigvalsh(df[[i for its in substantive.values() for i in its]].corr()))[::-1]
    assert table.eigenvalue.to_numpy() == pytest.approx(ev)
    assert table.cumulative_share.iloc[-1] == pytest.approx(1.0)
    assert table.share.iloc[0] == pytest.approx(report["method_variance"]["harman"]["first_factor_share"])


def test_bad_input_names_what_is_wrong(survey):
    df, constructs, _ = survey
    with pytest.raises(DataError, match="'nope'"):
        samesource.alpha(df, {"x": ["sup1", "nope"]})
    with pytest.raises(DataError, match="DataFrame"):
        samesource.htmt(df.to_numpy(), constructs)
    with pytest.raises(DataError, match="marker"):
        samesource.marker_adjusted(df, constructs, "stargazing")
    with pytest.raises(DataError, match="numbers"):
        samesource.alpha(df.assign(sup1="x"), constructs)
