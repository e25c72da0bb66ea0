"""The shared rule base: one-line ConfigErrors naming field, value got and closest name."""

from __future__ import annotations

from typing import Annotated, Literal

import pytest
from pydantic import BaseModel, Field, ValidationError, model_validator

from kidneycohort._rules import (
    RuleModel,
    error_facts,
    resolve_rules,
    rule_error_message,
    validate_config,
)
from kidneycohort.egfr import AgeBand, EgfrRule
from kidneycohort.errors import ConfigError
from kidneycohort.harmonize import HarmonizeRule
from kidneycohort.models.survival import SurvivalRule
from kidneycohort.tables import TableRule


class Window(RuleModel):
    days: int = Field(default=90, ge=0)


class Plan(RuleModel):
    windows: list[Window] = Field(default_factory=list)
    label: str = "plan"


def test_bad_value_is_one_line_with_field_and_value():
    with pytest.raises(
        ConfigError, match=r"^Window\.days: .*greater than or equal to 0 \(got -1\)$"
    ):
        Window(days=-1)


def test_misspelt_key_suggests_the_field():
    with pytest.raises(
        ConfigError, match=r"^Window: unknown key 'dayz' \(did you mean 'days'\?\)$"
    ):
        Window(dayz=3)
    with pytest.raises(ConfigError, match=r"; known: days$"):
        Window(zzzzzz=3)


def test_nested_error_keeps_the_full_path_and_the_sub_model_fields():
    with pytest.raises(ConfigError, match=r"^Plan\.windows\.1\.days: .*\(got -5\)$"):
        Plan(windows=[{"days": 1}, {"days": -5}])
    with pytest.raises(
        ConfigError, match=r"^Plan\.windows\.0: unknown key 'dais' \(did you mean 'days'"
    ):
        Plan(windows=[{"dais": 1}])


def test_model_validate_leaves_the_pydantic_error_to_the_caller():
    with pytest.raises(ValidationError) as info:
        Plan.model_validate({"windows": [{"days": -5}]})
    # pydantic's own location of the error, unchanged by the nested custom __init__
    assert info.value.errors()[0]["loc"] == ("windows", 0, "days")
    with pytest.raises(ConfigError, match=r"^plan\.windows\.0\.days: "):
        validate_config(Plan.model_validate, {"windows": [{"days": -5}]}, "plan")


def test_rules_are_frozen():
    with pytest.raises(ValidationError):
        Window().days = 3  # type: ignore[misc]
    with pytest.raises(ValidationError):
        TableRule().decimals = 2  # type: ignore[misc]


def test_resolve_rules_names_unknown_and_bad_overrides():
    assert resolve_rules(Window, None, {"days": 30}, "window").days == 30
    with pytest.raises(ConfigError, match=r"^window: unknown rule 'dayz' \(did you mean 'days'"):
        resolve_rules(Window, None, {"dayz": 30}, "window")
    with pytest.raises(ConfigError, match=r"^window\.days: .*\(got -2\)$"):
        resolve_rules(Window, Window(days=5), {"days": -2}, "window")


@pytest.mark.parametrize(
    ("build", "match"),
    [
        (lambda: TableRule(decimals=9), r"^TableRule\.decimals: .*less than or equal to 6"),
        (lambda: SurvivalRule(group_colum="arm"), r"did you mean 'group_column'"),
        (lambda: HarmonizeRule(same_day_rule="avg"), r"^HarmonizeRule\.same_day_rule: "),
        (lambda: AgeBand(equations=["ckd_epi_2021"]), r"did you mean 'ckd_epi_2021_cr'"),
        (
            lambda: EgfrRule(by_age=[{"equations": ["ckd_epi_2021_cr"], "max_agee": 18}]),
            r"^EgfrRule\.by_age\.0: unknown key 'max_agee' \(did you mean 'max_age'",
        ),
    ],
)
def test_stage_options_built_in_python_raise_config_errors(build, match):
    with pytest.raises(ConfigError, match=match):
        build()


def test_message_from_text_location_has_no_suggestion_list():
    with pytest.raises(ValidationError) as info:
        Window.model_validate({"other": 1})
    assert rule_error_message("cfg", info.value) == ("cfg: unknown key 'other'")


class Visits(RuleModel):
    kind: Literal["visits"] = "visits"
    visits: list[Window] = Field(default_factory=list)
    every_days: int = 30


class Care(RuleModel):
    kind: Literal["care"] = "care"
    tests_per_year: float = 1.0


class Tagged(RuleModel):
    schedule: Annotated[Visits | Care, Field(discriminator="kind")] = Visits()


class Untagged(RuleModel):
    schedule: Visits | Care = Visits()


def test_misspelt_key_in_a_tagged_union_suggests_the_chosen_members_fields():
    # pydantic puts the tag in the location ('schedule', 'visits', key); here the tag
    # 'visits' is also a field name of Visits, which must not be followed into Window
    with pytest.raises(ValidationError) as info:
        Tagged.model_validate({"schedule": {"kind": "visits", "evry_days": 7}})
    assert info.value.errors()[0]["loc"] == ("schedule", "visits", "evry_days")
    facts = error_facts(Tagged, info.value)
    assert facts.known == ("kind", "visits", "every_days")
    assert facts.suggestion == " (did you mean 'every_days'?)"
    with pytest.raises(
        ConfigError, match=r"^Tagged\.schedule\.care: unknown key 'tests_per_yer' \(did you"
    ):
        Tagged(schedule={"kind": "care", "tests_per_yer": 2})


def test_plain_union_location_names_the_member_class():
    with pytest.raises(ValidationError) as info:
        Untagged.model_validate({"schedule": {"kind": "care", "tests_per_yr": 2}})
    # pydantic reports one error per member tried, each under the member's class name
    care = [e for e in info.value.errors() if e["loc"][1] == "Care"]
    assert care and care[0]["loc"] == ("schedule", "Care", "tests_per_yr")
    facts = error_facts(Untagged, info.value)
    assert facts.kind == "extra_forbidden"
    # the known names are those of the member the reported error sits in, not both
    member = {"Visits": Visits, "Care": Care}[facts.loc[1]]
    assert facts.known == tuple(member.model_fields)


def test_error_facts_report_the_misspelt_key_before_the_missing_field_it_causes():
    class Needs(BaseModel):
        model_config = {"extra": "forbid"}
        name: str

    with pytest.raises(ValidationError) as info:
        Needs.model_validate({"nmae": "x"})
    # pydantic lists 'missing' first; the misspelling is the useful one to report
    assert info.value.errors()[0]["type"] == "missing"
    facts = error_facts(Needs, info.value)
    assert (facts.kind, facts.path, facts.got, facts.count) == ("extra_forbidden", "nmae", "x", 2)
    assert facts.suggestion == " (did you mean 'name'?)"


def test_error_facts_drop_the_value_error_prefix_of_own_validators():
    class Checked(RuleModel):
        low: int = 0
        high: int = 1

        @model_validator(mode="after")
        def _ordered(self) -> Checked:
            if self.low > self.high:
                raise ValueError("low must not exceed high")
            return self

    with pytest.raises(ValidationError) as info:
        Checked.model_validate({"low": 3})
    facts = error_facts(Checked, info.value)
    assert (facts.path, facts.message, facts.suggestion) == ("", "low must not exceed high", "")
    assert "Value error" in info.value.errors()[0]["msg"]
