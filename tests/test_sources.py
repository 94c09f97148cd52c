"""Second sources: the design fields, the id-matching rules on hand-made files, the command
line, and the cross-source estimate against known truth in simulated two-source data.

Id matching is checked on small files written out by hand here (what each row should join
to is visible in the test); the estimates against the truth of tests/two_sources.py, which
uses the simulator of sample_surveys/simulate.py (invented data with known truth).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from two_sources import TRUTH, two_source_survey

from samesource.errors import DataError, DesignError
from samesource.input.design import MAIN, parse_design
from samesource.input.loading import load_table
from samesource.input.sources import prepare_with_sources
from samesource.service.cli import main

MAIN_CSV = """respondent,a1,a2,a3,b1,b2,b3
E01,1,2,2,3,3,4
E02,2,2,3,3,4,4
E03,3,3,3,2,2,3
E04,4,4,5,1,2,1
 E05 ,5,4,5,2,1,2
E06,2,3,2,4,4,5
"""
# rows out of order, E04 missing, X99 not in the main file, own code 0 and scale 1 to 5
SOURCE_CSV = """emp,p1,p2
E03,3,3
E01,1,2
E06,0,4
E02,2,2
X99,5,5
E05,4,5
"""


def design(**source) -> dict:
    return {
        "constructs": {"alpha": {"items": ["a1", "a2", "a3"]}, "beta": {"items": ["b1", "b2", "b3"]},
                       "rated": {"items": ["p1", "p2"], "source": "boss"}},
        "paths": [{"outcome": "rated", "predictors": ["alpha"]}],
        "response_scale": {"min": 1, "max": 5}, "missing_codes": [-99], "id_column": "respondent",
        "sources": {"boss": {"id_column": "emp", "missing_codes": [0], **source}},
    }


def tables(main: str = MAIN_CSV, source: str = SOURCE_CSV):
    return load_table(main.encode(), name="staff.csv"), {"boss": load_table(source.encode(), name="boss.csv")}


def test_rows_join_on_ids_and_unmatched_rows_are_counted_not_dropped():
    main, srcs = tables()
    prepared = prepare_with_sources(main, parse_design(design()), srcs)
    items = prepared.items
    assert list(items.columns) == ["a1", "a2", "a3", "b1", "b2", "b3", "p1", "p2"]
    assert len(items) == 6  # every main-file row kept, in the main file's order
    # E01 -> (1, 2), E03 -> (3, 3); E04 has no rating: its source items are missing
    assert items.loc[2, ["p1", "p2"]].tolist() == [1.0, 2.0]
    assert items.loc[4, ["p1", "p2"]].tolist() == [3.0, 3.0]
    assert items.loc[5, ["p1", "p2"]].isna().all()
    # " E05 " matches "E05" (spaces around an id do not count); the source's own code 0 is missing
    assert items.loc[6, ["p1", "p2"]].tolist() == [4.0, 5.0]
    assert np.isnan(items.loc[7, "p1"]) and items.loc[7, "p2"] == 4.0
    (link,) = prepared.links
    d = link.to_dict()
    assert (d["rows"], d["matched"], d["main_without_match"], d["source_without_match"]) == (6, 5, 1, 1)
    assert d["examples"] == {"main_without_match": ["E04"], "source_without_match": ["X99"]}
    codes = {w["code"]: w["message"] for w in prepared.warnings}
    assert "'E04'" in codes["source_unmatched_rows"] and "'X99'" in codes["source_unused_rows"]


def test_a_repeated_id_in_a_source_is_an_error_naming_it_and_its_rows():
    main, srcs = tables(source=SOURCE_CSV + "E02,3,3\n")
    with pytest.raises(DataError) as e:
        prepare_with_sources(main, parse_design(design()), srcs)
    assert e.value.code == "duplicate_ids" and e.value.file == "boss.csv" and e.value.column == "emp"
    assert "'E02'" in e.value.message and "rows 5 and 8" in e.value.message and e.value.row == 8


def test_a_repeated_id_in_the_main_file_is_an_error_when_sources_join_to_it():
    main, srcs = tables(main=MAIN_CSV + "E03,1,1,1,1,1,1\n")
    with pytest.raises(DataError) as e:
        prepare_with_sources(main, parse_design(design()), srcs)
    assert e.value.file == "staff.csv" and "'E03'" in e.value.message and e.value.column == "respondent"


def test_no_id_in_common_is_an_error_with_examples_and_a_hint_on_leading_zeros():
    source = "emp,p1,p2\n" + "".join(f"E{i},{i},{4 - i}\n" for i in (1, 2, 3))
    main_t, srcs = tables(main=MAIN_CSV.replace("E0", "E00"), source=source)
    with pytest.raises(DataError) as e:
        prepare_with_sources(main_t, parse_design(design()), srcs)
    assert e.value.code == "no_matching_ids" and "'E1'" in e.value.message and "'E001'" in e.value.message
    assert "leading zeros" in e.value.message


def test_a_source_has_its_own_answer_range_and_errors_name_its_file():
    main, srcs = tables(source=SOURCE_CSV.replace("X99,5,5", "X99,5,7"))
    with pytest.raises(DataError) as e:
        prepare_with_sources(main, parse_design(design(response_scale={"min": 1, "max": 5})), srcs)
    assert e.value.file == "boss.csv" and e.value.column == "p2" and "1 to 5" in e.value.message
    # the same answer is fine on a source scale of 1 to 7, while the main file keeps 1 to 5;
    # without a response_scale of its own, the source's range is read from its answers
    for scale, source in (({"response_scale": {"min": 1, "max": 7}}, "design"), ({}, "data")):
        main, srcs = tables(source=SOURCE_CSV.replace("X99,5,5", "X99,5,7"))
        prepared = prepare_with_sources(main, parse_design(design(**scale)), srcs)
        assert prepared.links[0].response_scale == {"min": 1, "max": 7, "source": source}
        assert prepared.scale_max == 5


@pytest.mark.parametrize("change, field, words", [
    (lambda d: d.pop("sources"), "constructs.rated.source", "no 'sources'"),
    (lambda d: d["constructs"]["rated"].update(source="bos"), "constructs.rated.source", "did you mean 'boss'"),
    (lambda d: d["sources"]["boss"].pop("id_column"), "sources.boss.id_column", "is missing"),
    (lambda d: d.pop("id_column"), "id_column", "main file's id column"),
    (lambda d: d["sources"].update(spare={"id_column": "x"}), "sources.spare", "no construct comes from"),
    (lambda d: d["sources"].update(main={"id_column": "x"}), "sources.main", "other than 'main'"),
    (lambda d: d["sources"]["boss"].update(kind="peer"), "sources.boss.kind", "other_rater"),
    (lambda d: d["constructs"]["beta"].update(role="marker", source="boss"), "constructs.beta.source",
     "must come from the main file"),
    (lambda d: d["constructs"]["beta"].update(same_as="alpha"), "constructs.beta.same_as", "same source"),
    (lambda d: d["constructs"]["rated"].update(same_as="gamma"), "constructs.rated.same_as", "unknown construct"),
])
def test_design_refusals_name_the_field(change, field, words):
    d = design()
    change(d)
    with pytest.raises(DesignError) as e:
        parse_design(d)
    assert e.value.field == field and words in e.value.message


def test_a_source_file_must_match_the_design():
    main, srcs = tables()
    d = parse_design(design())
    with pytest.raises(DesignError) as e:
        prepare_with_sources(main, d, {})
    assert e.value.field == "sources.boss" and "--source boss=PATH" in e.value.message
    with pytest.raises(DesignError) as e:
        prepare_with_sources(main, d, {**srcs, "peer": srcs["boss"]})
    assert "'peer'" in e.value.message
    with pytest.raises(DesignError) as e:
        prepare_with_sources(main, d, {"boss": load_table(b"employee,p1,p2\nE01,1,1\n", name="boss.csv")})
    assert e.value.field == "sources.boss.id_column" and e.value.file == "boss.csv"


def test_the_design_round_trips_with_its_sources():
    d = parse_design(design(kind="records"))
    assert d.source_of("rated") == "boss" and d.source_of("alpha") == MAIN
    assert parse_design(d.to_dict()) == d
    assert d.main_part().items == ["a1", "a2", "a3", "b1", "b2", "b3"] and d.main_part().paths == ()


# ------------------------------------------------------------------ estimates, end to end

@pytest.fixture(scope="module")
def two_source_report(tmp_path_factory):
    """One analysis of simulated two-source data (n = 1500) through the command line."""
    staff, managers, des = two_source_survey(1500, seed=11)
    folder = tmp_path_factory.mktemp("two-sources")
    staff.to_csv(folder / "staff.csv", index=False)
    managers.to_csv(folder / "managers.csv", index=False)
    (folder / "design.json").write_text(json.dumps(des))
    code = main(["analyze", str(folder / "staff.csv"), "--design", str(folder / "design.json"), "--source",
                 f"manager={folder / 'managers.csv'}", "--out", str(folder / "out"), "--quiet"])
    assert code == 0
    return json.loads((folder / "out" / "report.json").read_text()), folder


def test_cross_source_estimates_recover_the_truth_and_say_they_are_free_of_same_rater_bias(two_source_report):
    report, _ = two_source_report
    paths = {(p["outcome"], p["predictor"]): p for p in report["paths"]}
    for key in (("engagement_seen", "support"), ("performance", "engagement")):
        p = paths[key]
        assert p["sources"]["kind"] == "cross_source" and p["sources"]["free_of_same_rater_bias"] is True
        assert "Free of same-rater bias" in p["sources"]["note"]
        est = p["estimates"]["method_factor_adjusted"]
        # truth of tests/two_sources.py; tolerance about two standard errors at n = 1500
        assert est["estimate"] == pytest.approx(TRUTH[key], abs=0.06), key
        assert est["ci"][0] <= TRUTH[key] <= est["ci"][1]
    same = paths[("engagement", "support")]
    assert same["sources"]["kind"] == "same_source" and same["sources"]["free_of_same_rater_bias"] is False
    # the same-source observed estimate carries the staff's shared method (+.08 here); the
    # cross-source observed one does not (it is only attenuated by unreliability)
    assert same["estimates"]["observed"]["estimate"] > TRUTH[("engagement", "support")] + 0.04
    assert paths[("engagement_seen", "support")]["estimates"]["observed"]["estimate"] < TRUTH[
        ("engagement_seen", "support")]


def test_a_same_source_path_is_set_beside_its_cross_source_counterpart(two_source_report):
    report, folder = two_source_report
    paths = {(p["outcome"], p["predictor"]): p for p in report["paths"]}
    check = paths[("engagement", "support")]["cross_source_check"]
    bench = paths[("engagement_seen", "support")]
    assert check["counterpart"]["outcome"] == "engagement_seen"
    assert check["benchmark"]["method"] == bench["preferred"]
    assert check["benchmark"]["estimate"] == bench["estimates"][bench["preferred"]]["estimate"]
    rows = check["by_estimate"]
    for r in rows.values():
        assert r["difference"] == pytest.approx(r["estimate"] - check["benchmark"]["estimate"])
    assert check["closest"] == min(rows, key=lambda m: abs(rows[m]["difference"]))
    # the method-corrected estimates come much closer than the observed one
    assert abs(rows["method_factor_adjusted"]["difference"]) < abs(rows["observed"]["difference"]) - 0.05
    assert bench["same_source_counterpart"] == {"outcome": "engagement", "predictor": "support"}
    link = report["data"]["sources"]["manager"]
    assert link["matched"] + link["unmatched_main_rows"] == 1500 and link["unused_source_rows"] == 0
    page = (folder / "out" / "report.html").read_text()
    assert 'id="cross-source"' in page and "beside" in page and "Free of same-rater bias" in page
    assert "How each second source was joined" in page


def test_the_command_line_refuses_a_source_without_its_file_and_a_bad_source_argument(two_source_report, capsys):
    _, folder = two_source_report
    args = ["analyze", str(folder / "staff.csv"), "--design", str(folder / "design.json"), "--out", str(folder / "x")]
    assert main(args) == 2
    err = capsys.readouterr().err
    assert "sources.manager" in err and "--source manager=PATH" in err
    assert main(args + ["--source", "manager"]) == 2 and "NAME=PATH" in capsys.readouterr().err
    assert main(args + ["--source", f"manager={folder / 'nowhere.csv'}"]) == 2
    assert "nowhere.csv: file not found" in capsys.readouterr().err
