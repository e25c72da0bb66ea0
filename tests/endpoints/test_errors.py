"""Bad input and bad config for kidney endpoints: our error classes, one-line messages."""

from __future__ import annotations

from typing import Any

import polars as pl
import pytest

from kidneycohort.endpoints import (
    Composite,
    EgfrBelow,
    EgfrDecline,
    EndpointRule,
    KidneyFailure,
    derive_endpoints,
    parse_endpoint_definitions,
    usual_kidney_composite,
)
from kidneycohort.errors import ConfigError, InputDataError
from tests._fixtures.endpoints import DATA_CUT, EQUATION, Timeline, build

TABLES = build([Timeline("e01", [(180, 55), (210, 55)], events=[(300, "dialysis", None)])])


def _derive(**overrides: Any) -> pl.DataFrame:
    args: dict[str, Any] = {
        "egfr": TABLES["egfr"],
        "baseline": TABLES["baseline"],
        "patients": TABLES["patients"],
        "events": TABLES["events"],
        "definitions": usual_kidney_composite(),
        "equation": EQUATION,
        "data_cut": DATA_CUT,
    }
    args.update(overrides)
    return derive_endpoints(**args)


def test_unknown_event_code_suggests_the_canonical_one() -> None:
    events = TABLES["events"].with_columns(pl.lit("dialysys").alias("event"))
    with pytest.raises(
        InputDataError, match=r"events: column 'event'.*'dialysys'.*did you mean 'dialysis'"
    ):
        _derive(events=events)


def test_undated_event() -> None:
    events = TABLES["events"].with_columns(pl.lit(None, dtype=pl.Date).alias("event_date"))
    with pytest.raises(InputDataError, match=r"events: column 'event_date' is missing on 1 rows"):
        _derive(events=events)


def test_missing_patient_column_is_named() -> None:
    patients = TABLES["patients"].rename({"index_date": "indexdate"})
    with pytest.raises(
        InputDataError,
        match=r"patients: missing required column 'index_date' \(did you mean 'indexdate'",
    ):
        _derive(patients=patients)


def test_unknown_equation_suggests_the_closest() -> None:
    with pytest.raises(
        InputDataError,
        match=r"egfr: no rows for equation 'ckd_epi_2021'.*did you mean 'ckd_epi_2021_cr'",
    ):
        _derive(equation="ckd_epi_2021")


def test_duplicated_patients() -> None:
    patients = pl.concat([TABLES["patients"], TABLES["patients"]])
    with pytest.raises(InputDataError, match=r"patients: patient_id must be unique.*'e01'"):
        _derive(patients=patients)


def test_two_baselines_for_one_patient() -> None:
    baseline = pl.concat([TABLES["baseline"], TABLES["baseline"]])
    with pytest.raises(InputDataError, match=r"baseline: more than one row per patient.*'e01'"):
        _derive(baseline=baseline)


def test_non_positive_baseline() -> None:
    baseline = TABLES["baseline"].with_columns(pl.lit(0.0).alias("baseline_egfr"))
    with pytest.raises(
        InputDataError, match=r"baseline: baseline_egfr must be positive, got 0.0 for patient 'e01'"
    ):
        _derive(baseline=baseline)


def test_unreadable_date_strings() -> None:
    patients = TABLES["patients"].with_columns(pl.lit("31/12/2019").alias("index_date"))
    with pytest.raises(
        InputDataError,
        match=r"patients: column 'index_date' has 1 values that are not dates.*'31/12/2019'",
    ):
        _derive(patients=patients)


def test_iso_date_strings_are_read() -> None:
    patients = TABLES["patients"].with_columns(pl.col("index_date").cast(pl.String))
    assert _derive(patients=patients).equals(_derive())


def test_not_a_table() -> None:
    with pytest.raises(
        InputDataError, match=r"egfr: expected a polars or pandas DataFrame, got list"
    ):
        _derive(egfr=[1, 2, 3])


def test_bad_data_cut() -> None:
    with pytest.raises(
        ConfigError, match=r"data_cut: expected a date \(YYYY-MM-DD\), got '31/12/2024'"
    ):
        _derive(data_cut="31/12/2024")


def test_no_definitions() -> None:
    with pytest.raises(ConfigError, match=r"no endpoint definitions"):
        _derive(definitions=[])


@pytest.mark.parametrize(
    ("item", "pattern"),
    [
        (
            {"kind": "egfr_declin", "percent": 40},
            r"endpoints\.0\.kind: .*'egfr_declin'.*did you mean 'egfr_decline'",
        ),
        ({"percent": 40}, r"endpoints\.0\.kind: unknown or missing kind"),
        (
            {"kind": "egfr_decline", "percent": 120},
            r"endpoints\.0\.egfr_decline\.percent: .*less than 100 \(got 120\)",
        ),
        (
            {"kind": "egfr_decline", "percnt": 40},
            r"unknown key 'percnt' \(did you mean 'percent'\?\)$",
        ),
        (
            {"kind": "egfr_decline", "percent": 40, "rule": {"confirm_after_day": 30}},
            r"rule: unknown key 'confirm_after_day' \(did you mean 'confirm_after_days'",
        ),
        ({"kind": "egfr_below", "threshold": -1}, r"threshold: .*greater than 0 \(got -1\)"),
        ({"kind": "composite", "components": []}, r"components: .*at least 1"),
    ],
)
def test_bad_config_items(item: dict[str, Any], pattern: str) -> None:
    with pytest.raises(ConfigError, match=pattern):
        parse_endpoint_definitions([item])


def test_models_built_in_python_raise_config_error() -> None:
    with pytest.raises(ConfigError, match=r"EgfrDecline\.percent: .*greater than 0 \(got 0\)"):
        EgfrDecline(percent=0)
    with pytest.raises(
        ConfigError, match=r"EndpointRule\.confirm_after_days: .*greater than or equal to 1"
    ):
        EndpointRule(confirm_after_days=0)
    with pytest.raises(
        ConfigError, match=r"confirm_within_days \(10\) must be at least confirm_after_days \(28\)"
    ):
        EndpointRule(confirm_within_days=10)
    with pytest.raises(ConfigError, match=r"paramcd 'TOOLONGCODE' must be 1-8"):
        EgfrDecline(percent=40, paramcd="TOOLONGCODE")
    with pytest.raises(ConfigError, match=r"unconfirmed_last_value"):
        EndpointRule(unconfirmed_last_value="maybe")


def test_rules_mapping_with_typo() -> None:
    with pytest.raises(
        ConfigError, match=r"rule: unknown key 'grace_days' \(did you mean 'grace_period_days'"
    ):
        _derive(rule={"grace_days": 30})


def test_unknown_composite_component() -> None:
    defs = [
        EgfrDecline(percent=40),
        KidneyFailure(),
        Composite(components=["egfr_decline_4", "kidney_failure"]),
    ]
    with pytest.raises(
        ConfigError,
        match=r"composite\.components: unknown endpoint 'egfr_decline_4'.*did you mean 'egfr_decline_40'",
    ):
        _derive(definitions=defs)


def test_duplicate_names_and_codes() -> None:
    with pytest.raises(ConfigError, match=r"name 'egfr_decline_40' is used twice"):
        _derive(definitions=[EgfrDecline(percent=40), EgfrDecline(percent=40)])
    with pytest.raises(ConfigError, match=r"paramcd 'LT15' is used by more than one"):
        _derive(definitions=[EgfrBelow(threshold=15), EgfrBelow(threshold=15, name="other_below")])


def test_composite_cycle() -> None:
    defs = [
        EgfrDecline(percent=40),
        Composite(name="a", paramcd="A", components=["egfr_decline_40", "b"]),
        Composite(name="b", paramcd="B", components=["a"]),
    ]
    with pytest.raises(ConfigError, match=r"cycle: a -> b -> a"):
        _derive(definitions=defs)


def test_definition_defaults_are_self_describing() -> None:
    d = EgfrDecline(percent=57)
    assert (d.name, d.paramcd) == ("egfr_decline_57", "DEC57")
    assert EgfrDecline(percent=57.5).paramcd == "DEC57P5"
    b = EgfrBelow(threshold=15, and_decline_percent=40)
    assert (b.name, b.paramcd) == ("egfr_below_15_and_decline_40", "LT15D40")
    assert "40%" in b.label
    for model in (EndpointRule, EgfrDecline, EgfrBelow, KidneyFailure, Composite):
        for name, info in model.model_fields.items():
            assert info.description, f"{model.__name__}.{name} has no description"


def test_a_fraction_given_as_percent_is_refused() -> None:
    # 0.4 typed for 40 %: no published decline endpoint is below 1 % (common practice:
    # 30, 40, 57 % - Levey 2014); the message names the field and suggests 40
    with pytest.raises(ConfigError, match=r"EgfrDecline\.percent: 0\.4 .*did you mean 40"):
        EgfrDecline(percent=0.4)
    with pytest.raises(ConfigError, match="and_decline_percent"):
        EgfrBelow(threshold=15, and_decline_percent=0.5)
    assert EgfrDecline(percent=40).percent == 40
