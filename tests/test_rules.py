"""The shared rule base: one-line ConfigErrors naming field, value got and closest name."""

from __future__ import annotations

import pytest
from pydantic import Field, ValidationError

from kidneycohort._rules import RuleModel, resolve_rules, rule_error_message, validate_config
from kidneycohort.egfr import AgeBand, EgfrRules
from kidneycohort.errors import ConfigError
from kidneycohort.harmonize import HarmonizeRules
from kidneycohort.models.survival import SurvivalSpec
from kidneycohort.tables import TableSpec


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
    with pytest.raises(ConfigError, match=r"Window\.dayz: Extra inputs.*did you mean 'days'"):
        Window(dayz=3)
    with pytest.raises(ConfigError, match=r"; known: days$"):
        Window(zzzzzz=3)


def test_nested_error_keeps_the_full_path_and_the_sub_model_fields():
    with pytest.raises(ConfigError, match=r"^Plan\.windows\.1\.days: .*\(got -5\)$"):
        Plan(windows=[{"days": 1}, {"days": -5}])
    with pytest.raises(ConfigError, match=r"Plan\.windows\.0\.dais: .*did you mean 'days'"):
        Plan(windows=[{"dais": 1}])


def test_model_validate_leaves_the_pydantic_error_to_the_caller():
    with pytest.raises(ValidationError) as info:
        Plan.model_validate({"windows": [{"days": -5}]})
    # pydantic's own location of the error, unchanged by the nested custom __init__
    assert info.value.errors()[0]["loc"] == ("windows", 0, "days")
    with pytest.raises(ConfigError, match=r"^plan\.windows\.0\.days: "):
        validate_config(Plan.model_validate, {"windows": [{"days": -5}]}, "plan")


def test_rules_are_frozen_unless_a_model_says_otherwise():
    with pytest.raises(ValidationError):
        Window().days = 3  # type: ignore[misc]
    spec = TableSpec()
    spec.decimals = 2
    assert spec.decimals == 2


def test_resolve_rules_names_unknown_and_bad_overrides():
    assert resolve_rules(Window, None, {"days": 30}, "window").days == 30
    with pytest.raises(ConfigError, match=r"^window: unknown rule 'dayz' \(did you mean 'days'"):
        resolve_rules(Window, None, {"dayz": 30}, "window")
    with pytest.raises(ConfigError, match=r"^window\.days: .*\(got -2\)$"):
        resolve_rules(Window, Window(days=5), {"days": -2}, "window")


@pytest.mark.parametrize(
    ("build", "match"),
    [
        (lambda: TableSpec(decimals=9), r"^TableSpec\.decimals: .*less than or equal to 6"),
        (lambda: SurvivalSpec(group_colum="arm"), r"did you mean 'group_column'"),
        (lambda: HarmonizeRules(same_day_rule="avg"), r"^HarmonizeRules\.same_day_rule: "),
        (lambda: AgeBand(equations=["ckd_epi_2021"]), r"did you mean 'ckd_epi_2021_cr'"),
        (
            lambda: EgfrRules(by_age=[{"equations": ["ckd_epi_2021_cr"], "max_agee": 18}]),
            r"^EgfrRules\.by_age\.0\.max_agee: .*did you mean 'max_age'",
        ),
    ],
)
def test_stage_options_built_in_python_raise_config_errors(build, match):
    with pytest.raises(ConfigError, match=match):
        build()


def test_message_from_text_location_has_no_suggestion_list():
    with pytest.raises(ValidationError) as info:
        Window.model_validate({"other": 1})
    assert rule_error_message("cfg", info.value) == (
        "cfg.other: Extra inputs are not permitted (got 1)"
    )
