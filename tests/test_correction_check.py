"""The correction check (measurement/corrections/correction_check.py) and the planning advice
(measurement/method_checks/planning.py).

Outside references: the simulator of sample_surveys/simulate.py (its Likert item correlations
come from Mehler's expansion, not from draws; its surveys are drawn by its own code) for the
check's generator and for a direct simulation of the fitted scenario; scipy's noncentral
chi-square and the textbook value that a 1-df test at the .05 level has 80% power at
noncentrality 7.85 (Cohen 1988's tables, from memory) for the power calculation, and a direct
simulation of the test itself. The rules (bias, coverage, which estimate to lean on) on
numbers worked by hand. The long version (every scenario, hundreds of surveys) is
tests/benchmarks/correction_check_study.py.
"""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest
from conftest import small_survey

from samesource.corrections.correction_check import (
    ESTIMATES,
    Population,
    _Chunk,
    _run_chunk,
    dependable,
    draw_survey,
    lean_on,
    replicate_rng,
    scenarios,
    summarize,
    with_method_shares,
)
from samesource.engine.builders import method_factor_model, without_method_factor
from samesource.engine.fitting import Moments, fit_model
from samesource.executor import StopRequested, stop_when
from samesource.input.design import parse_design
from samesource.method_checks.planning import power_at, smallest_n
from simulate import (
    ConstructSpec,
    SurveySpec,
    design_for,
    likert_category_probabilities,
    population_item_correlation,
    simulate_survey,
)

SPEC = SurveySpec(constructs=[ConstructSpec("support", 3, 0.70, 0.35), ConstructSpec("engagement", 3, 0.70, 0.35),
                              ConstructSpec("weather", 3, 0.70, 0.35, role="marker", prefix="wth")],
                  paths={"engagement": {"support": 0.30}}, n=300, seed=4, scale_points=5)


def population_of(spec: SurveySpec, n: int) -> Population:
    """The check's population for a simulate.py spec: the same loadings, paths and symmetric
    5-point thresholds (each item's answers in the Likert category shares)."""
    design = parse_design(design_for(spec))
    shares = likert_category_probabilities(5)
    answers = np.repeat(np.arange(1.0, 6.0), np.round(shares * 100_000).astype(int))
    lam, m, trait_of = [], [], []
    for t, c in enumerate(spec.constructs):
        lam += c.loadings()
        m += c.method_loadings()
        trait_of += [t] * c.n_items
    beta = spec.paths["engagement"]["support"]
    corr = np.array([[1, beta, 0], [beta, 1, 0], [0, 0, 1.0]])
    p = len(lam)
    return Population(items=tuple(design.items), item_source=("main",) * p, traits=("support", "engagement", "weather"),
                      trait_of=tuple(trait_of), trait_corr=corr, loadings=np.array(lam), method=np.array(m),
                      method_trait=np.zeros(3), answers=(answers,) * p, raw_scale=((1.0, 5.0),) * p,
                      reverse=(False,) * p, missing=np.zeros((10, p), dtype=bool), n=n,
                      truth={("engagement", "support"): beta})


def test_drawn_answers_have_the_likert_correlations_of_the_simulator():
    pop = population_of(SPEC, 40_000)
    design = parse_design(design_for(SPEC))
    main, _ = draw_survey(pop, design, replicate_rng(1, 0, 0))
    got = main.frame[list(design.items)].astype(float).corr().to_numpy()
    want = population_item_correlation(SPEC, discrete=True).to_numpy()  # Mehler's expansion (simulate.py)
    assert np.abs(got - want).max() < 0.025
    # answers in the client's categories and shares
    shares = main.frame["sup1"].value_counts(normalize=True).sort_index().to_numpy()
    assert shares == pytest.approx(likert_category_probabilities(5), abs=0.01)


def test_each_replicate_has_its_own_seed_and_the_client_pattern_of_missing_answers():
    pop = population_of(SPEC, 300)
    holes = np.zeros((300, 9), dtype=bool)
    holes[::3, 0] = True  # a third of the client's rows miss sup1
    pop = dataclasses.replace(pop, missing=holes)
    design = parse_design(design_for(SPEC))
    a, _ = draw_survey(pop, design, replicate_rng(5, 1, 7))
    b, _ = draw_survey(pop, design, replicate_rng(5, 1, 7))
    c, _ = draw_survey(pop, design, replicate_rng(5, 1, 8))
    assert a.frame.equals(b.frame) and not a.frame.equals(c.frame)
    assert a.frame["sup1"].isna().mean() == pytest.approx(1 / 3, abs=0.08)
    assert a.frame["sup2"].notna().all()


def test_departures_change_only_the_method():
    pop = population_of(SPEC, 300)
    design = parse_design(design_for(SPEC))
    by_id = {s.id: s for s in scenarios(design, pop)}
    marker = by_id["marker_without_method"].population
    assert np.all(marker.method[6:] == 0) and marker.method[0] == pytest.approx(0.35)
    upper = by_id["published_upper_share"].population
    assert upper.main_share() == pytest.approx(0.41)
    # each item keeps its split of the rest: trait / error as before (0.49 / 0.3875)
    lam2, err = upper.loadings[0] ** 2, 1 - upper.loadings[0] ** 2 - upper.method[0] ** 2
    assert lam2 / err == pytest.approx(0.49 / (1 - 0.49 - 0.1225))
    unequal = by_id["unequal_method_loadings"].population
    assert unequal.method[0] ** 2 < unequal.method[3] ** 2 < unequal.method[6] ** 2
    corr = by_id["method_trait_correlated"].population
    assert corr.method_trait[0] == pytest.approx(0.30) and corr.method_trait[1] == pytest.approx(0.30 * 0.30)
    assert all(np.allclose(s.population.trait_corr, pop.trait_corr) for s in by_id.values())
    assert with_method_shares(pop, {}).main_share() == pytest.approx(pop.main_share())


def test_the_observed_bias_matches_a_direct_simulation():
    """The fitted scenario's drawn surveys against surveys drawn by simulate.py from the same
    model: the observed estimate (correlation of the scale means) averages alike."""
    pop = population_of(SPEC, 300)
    design = parse_design(design_for(SPEC))

    def observed(frame) -> float:
        frame = frame[design.items].astype(float)
        s = frame[["sup1", "sup2", "sup3"]].mean(axis=1)
        e = frame[["eng1", "eng2", "eng3"]].mean(axis=1)
        return float(np.corrcoef(s, e)[0, 1])

    ours = [observed(draw_survey(pop, design, replicate_rng(0, 0, r))[0].frame) for r in range(60)]
    direct = [observed(simulate_survey(dataclasses.replace(SPEC, seed=100 + r))[0]) for r in range(60)]
    se = np.sqrt(np.var(ours) / 60 + np.var(direct) / 60)
    assert abs(np.mean(ours) - np.mean(direct)) < 3 * se + 0.01
    assert np.mean(ours) > 0.30  # the shared method outweighs unreliability here (truth .30)


def test_summary_and_rules_on_hand_worked_numbers():
    v = np.array([[0.30, 0.20, 0.40], [0.40, 0.35, 0.45], [np.nan, np.nan, np.nan], [0.35, 0.25, 0.45]])
    s = summarize(v, 0.30)
    assert (s["n"], s["n_failed"]) == (3, 1)
    assert s["bias"] == pytest.approx(0.05) and s["rmse"] == pytest.approx(np.sqrt((0 + 0.01 + 0.0025) / 3))
    assert s["coverage"] == pytest.approx(2 / 3) and s["mean_ci_width"] == pytest.approx((0.2 + 0.1 + 0.2) / 3)
    good = {"n": 100, "bias": 0.01, "coverage": 0.93, "rmse": 0.05}
    assert dependable(good, 100)
    assert not dependable({**good, "bias": 0.06}, 100)
    assert not dependable({**good, "coverage": 0.83}, 100)  # below .90 - 2 x .03
    assert not dependable({**good, "n": 70}, 100)
    per = {"fitted": {m: {**good, "rmse": 0.10} for m in ("observed", "latent", "method_factor_adjusted")},
           "published_upper_share": {m: {**good, "bias": 0.2} for m in ("observed", "latent")}}
    per["fitted"]["method_factor_adjusted"]["rmse"] = 0.06
    per["published_upper_share"]["method_factor_adjusted"] = good
    from samesource.corrections.paths import METHODS

    for d in per.values():
        for m in METHODS:
            d.setdefault(m, {"n": 0, "bias": None, "coverage": None, "rmse": None})
    best, why = lean_on(per, 100)
    assert best == "method_factor_adjusted" and "1 of 1 departures" in why


def test_power_of_the_method_test_matches_the_textbook_value_and_a_direct_simulation():
    assert power_at(785, 0.01, 1) == pytest.approx(0.80, abs=0.005)  # noncentrality 7.85, 1 df (Cohen 1988)
    pop = with_method_shares(population_of(SPEC, 300), {i: 0.06 for i in range(9)})
    design = parse_design(design_for(SPEC))
    cov = pop.implied_corr()
    spec = method_factor_model(design, use_marker=True, equal_loadings=True)
    without = without_method_factor(spec)
    m = Moments(names=pop.items, cov=cov, n=1000)
    f0 = fit_model(without, m, time_limit=30).fmin - fit_model(spec, m, time_limit=30).fmin
    n = smallest_n(f0, 1)
    assert power_at(n, f0, 1) >= 0.80 > power_at(n - 2, f0, 1)
    rng = np.random.default_rng(3)
    hits = 0
    reps = 40
    for _ in range(reps):  # the test itself on continuous normal data of that size
        x = rng.multivariate_normal(np.zeros(len(cov)), cov, size=n)
        d = Moments.from_data(x, names=pop.items)
        g, r = fit_model(spec, d, time_limit=30, n_starts=1), fit_model(without, d, time_limit=30, n_starts=1)
        hits += (r.chi2 - g.chi2) > 3.841
    assert abs(hits / reps - 0.80) < 0.16  # binomial sd at 40 draws: .063


def test_the_command_line_runs_the_check_and_writes_it_into_every_output(tmp_path, capsys):
    """End to end, one simulated survey per scenario (about 10 s: six analyses)."""
    from samesource.service.cli import main

    data, design = small_survey(200, 3)
    (tmp_path / "s.csv").write_bytes(data)
    (tmp_path / "d.json").write_text(json.dumps(design))
    assert main(["analyze", str(tmp_path / "s.csv"), "--design", str(tmp_path / "d.json"), "--bootstrap", "0",
                 "--check-corrections", "1", "--out", str(tmp_path / "out")]) == 0
    out = capsys.readouterr()
    report = json.loads((tmp_path / "out" / "report.json").read_text())
    check = report["correction_check"]
    assert report["options"]["check_corrections"] == 1 and check["replicates"] == 1
    assert [s["id"] for s in check["scenarios"] if s["run"]] == ["fitted", "marker_without_method",
                                                                 "unequal_method_loadings", "method_trait_correlated",
                                                                 "published_upper_share"]
    assert "timings" in report and "check_corrections" in report["timings"]
    assert report["next_time"]["status"] == "ok" and report["next_time"]["advice"]
    assert "correction check 5/5 simulated surveys" in out.err and "next time:" in out.out
    (p,) = check["paths"]
    for sid in ("fitted", "published_upper_share"):
        obs = p["scenarios"][sid]["observed"]
        assert obs["n"] == 1 and obs["bias"] == pytest.approx(obs["mean"] - p["truth"])
        assert {"rmse", "coverage", "bias_mc_se", "coverage_mc_se"} <= set(obs)
    # more shared method, more inflation of the uncorrected estimate
    assert p["scenarios"]["published_upper_share"]["observed"]["bias"] > p["scenarios"]["fitted"]["observed"]["bias"]
    page = (tmp_path / "out" / "report.html").read_text()
    assert 'id="correction-check"' in page and 'id="next-time"' in page and "Correction check:" in page


def test_a_stopped_run_ends_its_chunk_before_the_next_survey():
    # a chunk of simulated surveys is minutes of work; a stopped run (the service's stop flag on a
    # cluster worker) must not analyse another survey: a stop asked at once ends it before the first
    pop = population_of(SPEC, 300)
    design = design_for(SPEC)
    chunk = _Chunk(0, pop, design, {}, (("engagement", "support"),), 0, 3, 1)
    with stop_when(lambda: True), pytest.raises(StopRequested):
        _run_chunk(chunk)
    # and without a stop the same chunk analyses its surveys
    one = _run_chunk(dataclasses.replace(chunk, stop=1))
    assert one.values.shape == (1, 1, len(ESTIMATES), 3) and not one.failures
    assert np.isfinite(one.values[0, 0, ESTIMATES.index("observed"), 0])


def test_the_population_reads_the_answers_a_block_at_a_time_as_in_memory(tmp_path):
    """The client's answers and gaps, read through the rows, equal pandas' reading of the
    prepared DataFrame (sorted answers without NaN; isna), and a survey read a block at a time
    gives the same population without forming its DataFrame of answers."""
    from samesource.corrections.correction_check import _client_answers, fit_population
    from samesource.input.streamed import prepare_streamed
    from samesource.options import AnalysisOptions
    from samesource.pipeline import analyze

    data, design = small_survey(200, 3)
    (tmp_path / "s.csv").write_bytes(data)
    design["response_scale"] = {"min": 1, "max": 7}
    a = analyze(str(tmp_path / "s.csv"), design, {"missing": "fiml"})
    items = list(a.prepared.items.columns)
    answers, missing = _client_answers(a.prepared.rows, items)
    for it, got in zip(items, answers, strict=True):
        np.testing.assert_array_equal(got, np.sort(a.prepared.items[it].dropna().to_numpy(dtype=float)))
    np.testing.assert_array_equal(missing, a.prepared.items[items].isna().to_numpy())

    dsg = parse_design(design)
    streamed = prepare_streamed(tmp_path / "s.csv", dsg)
    opts = AnalysisOptions.from_dict({"missing": "fiml"})
    mv = a.report["method_variance"]
    want, _ = fit_population(dsg, a.prepared, a.plan, mv, opts)
    got, _ = fit_population(dsg, streamed, a.plan, mv, opts)
    assert all(np.array_equal(x, y) for x, y in zip(got.answers, want.answers, strict=True))
    np.testing.assert_array_equal(got.missing, want.missing)
    assert streamed._frame is None  # the DataFrame of answers was never formed


def test_a_survey_too_large_for_the_check_is_refused_before_the_analysis(tmp_path, monkeypatch):
    import samesource.corrections.correction_check as cc
    from samesource.errors import InputError
    from samesource.pipeline import analyze

    data, design = small_survey(200, 3)
    (tmp_path / "s.csv").write_bytes(data)
    monkeypatch.setattr(cc, "MAX_ROWS", 150)
    seen = []
    with pytest.raises(InputError) as e:
        analyze(str(tmp_path / "s.csv"), design, {"check_corrections": 20},
                progress=lambda stage, done, total: seen.append(stage))
    assert e.value.field == "options.check_corrections" and e.value.code == "bad_options"
    assert "200 rows" in e.value.message and "up to 150 rows" in e.value.message
    assert "100 in all" in e.value.message  # 20 surveys in each of the marker design's 5 scenarios
    assert set(seen) == {"load"}  # refused before the screen
    analyze(str(tmp_path / "s.csv"), design, {"check_corrections": 0})  # without the check it runs
