"""The study design: every invalid design is refused with the offending field named."""

import json

import pytest

from samesource.errors import DesignError
from samesource.input.design import check_columns, draft_design, load_design, parse_design


def base() -> dict:
    return {
        "constructs": {
            "support": {"items": ["sup1", "sup2", "sup3", "sup4"], "reverse": ["sup4"]},
            "engagement": {"items": ["eng1", "eng2", "eng3"]},
            "intent": {"items": ["int1", "int2", "int3"]},
            "weather": {"items": ["wx1", "wx2", "wx3"], "role": "marker"},
            "impression": {"items": ["imp1", "imp2", "imp3"], "role": "method"},
        },
        "paths": [{"outcome": "engagement", "predictors": ["support"]},
                  {"outcome": "intent", "predictors": ["engagement", "support"]}],
        "response_scale": {"min": 1, "max": 5},
        "missing_codes": [-99],
        "id_column": "respondent",
        "group_column": "team",
    }


def test_valid_design_round_trips():
    d = parse_design(base())
    assert d.marker.name == "weather" and d.method.name == "impression"
    assert [c.name for c in d.substantive] == ["support", "engagement", "intent"]
    assert d.pair_key("intent", "support") == "support|intent"
    assert parse_design(d.to_dict()) == d
    assert d.items[:4] == ["sup1", "sup2", "sup3", "sup4"]


def mutate(fn):
    d = base()
    fn(d)
    return d


@pytest.mark.parametrize("change, field, words", [
    (lambda d: d["constructs"]["engagement"].update(items=["eng1"]), "constructs.engagement.items", "at least 2"),
    (lambda d: d["constructs"]["intent"].update(items=["int1", "eng2"]), "constructs.intent.items", "eng2"),
    (lambda d: d["constructs"]["support"].update(reverse=["eng1"]), "constructs.support.reverse", "eng1"),
    (lambda d: d["constructs"]["support"].update(role="trait"), "constructs.support.role", "trait"),
    (lambda d: d["paths"].append({"outcome": "morale", "predictors": ["support"]}), "paths[2].outcome", "morale"),
    (lambda d: d["paths"][0].update(predictors=["pay"]), "paths[0].predictors[0]", "pay"),
    (lambda d: d["paths"][0].update(predictors=["engagement"]), "paths[0].predictors[0]", "itself"),
    (lambda d: d["paths"].append({"outcome": "support", "predictors": ["intent"]}), "paths", "cycle"),
    (lambda d: d["paths"][0].update(predictors=["weather"]), "paths[0].predictors", "marker"),
    (lambda d: d.update(response_scale={"min": 5, "max": 1}), "response_scale", "below"),
    (lambda d: d.update(missing_codes=["n/a"]), "missing_codes", "numbers"),
    (lambda d: d.update(colour="red"), "colour", "unknown field"),
    (lambda d: d["constructs"]["support"].update(itemz=["a"]), "constructs.support.itemz", "unknown field"),
    (lambda d: d["constructs"]["engagement"]["items"].append("eng1"), "constructs.engagement.items", "more than once"),
    (lambda d: d["constructs"]["intent"].update(role="marker"), "constructs.weather.role", "more than one"),
    (lambda d: d.update(constructs={}), "constructs", "at least one"),
    (lambda d: d.update(group_column="sup1"), "group_column", "item"),
    # found by tests/test_fuzz_inputs.py: each raised TypeError or OverflowError instead
    (lambda d: d["paths"][0].update(outcome=["engagement"]), "paths[0].outcome", "construct name"),
    (lambda d: d["paths"][0].update(outcome={"a": 1}), "paths[0].outcome", "construct name"),
    (lambda d: d.update(response_scale={"min": 1, "max": 10**400}), "response_scale", "finite"),
    (lambda d: d.update(missing_codes=[10**400]), "missing_codes", "finite"),
    (lambda d: d.update(missing_codes=[10**5000]), "missing_codes", "finite"),
    # a lone UTF-16 surrogate ("\ud800" in JSON) is no character: it broke storing the report
    (lambda d: d["constructs"]["support"]["items"].__setitem__(1, "sup\ud8002"),
     "constructs.support.items[1]", "column name"),
    (lambda d: d["constructs"].update({"\udc00": {"items": ["a1", "a2"]}}), "constructs.\udc00",
     "construct name"),
    (lambda d: d.update(id_column="\ud800"), "id_column", "column name"),
])
def test_invalid_designs_name_the_field(change, field, words):
    with pytest.raises(DesignError) as e:
        parse_design(mutate(change))
    assert e.value.field == field
    assert words in str(e.value)


def test_cycle_through_three_constructs():
    d = base()
    d["paths"] = [{"outcome": "engagement", "predictors": ["support"]},
                  {"outcome": "intent", "predictors": ["engagement"]},
                  {"outcome": "support", "predictors": ["intent"]}]
    with pytest.raises(DesignError, match="cycle"):
        parse_design(d)


def test_unknown_item_against_columns_suggests_a_name():
    d = parse_design(base())
    cols = [i for i in d.items if i != "eng3"] + ["eng_3", "respondent", "team"]
    with pytest.raises(DesignError) as e:
        check_columns(d, cols, file="survey.csv")
    assert e.value.field == "constructs.engagement.items[2]"
    assert "eng3" in str(e.value) and "eng_3" in str(e.value) and "survey.csv" in str(e.value)


def test_load_design_reports_json_errors(tmp_path):
    p = tmp_path / "design.json"
    p.write_text('{"constructs": {', encoding="utf-8")
    with pytest.raises(DesignError, match="not valid JSON.*line 1"):
        load_design(p)
    p.write_text(json.dumps(mutate(lambda d: d["constructs"]["support"].update(role="x"))), encoding="utf-8")
    with pytest.raises(DesignError) as e:
        load_design(p)
    assert e.value.file == str(p)
    with pytest.raises(DesignError, match="not found"):
        load_design(tmp_path / "nope.json")


def test_design_files_json_cannot_hold_is_refused_naming_the_file(tmp_path):
    # Python's JSON reader raises RecursionError and ValueError (not JSONDecodeError) here.
    p = tmp_path / "design.json"
    p.write_text('{"constructs": ' + "[" * 100_000 + "]" * 100_000 + "}", encoding="utf-8")
    with pytest.raises(DesignError, match="nested too deeply") as e:
        load_design(p)
    assert e.value.file == str(p)
    p.write_text('{"response_scale": {"min": 1, "max": 1' + "0" * 5000 + "}}", encoding="utf-8")
    with pytest.raises(DesignError, match="too many digits") as e:
        load_design(p)
    assert e.value.file == str(p)


def test_draft_design_groups_stems_and_finds_reverse_items():
    cols = ["respondent", "team", "sup1", "sup2", "sup3", "sup4r", "eng_1", "eng_2", "eng_3",
            "age", "comment1"]
    draft = draft_design(cols, numeric=[c for c in cols if c != "comment1"])
    assert draft["constructs"] == {
        "sup": {"items": ["sup1", "sup2", "sup3", "sup4r"], "reverse": ["sup4r"]},
        "eng": {"items": ["eng_1", "eng_2", "eng_3"]},
    }
    assert draft["id_column"] == "respondent" and draft["group_column"] == "team"
    assert draft["paths"] == []
    parse_design(draft)  # a draft is a valid design
