"""The design config: validation as one line naming the field, the shipped example, the
mapping onto the synthetic scenario, and the command line's exit codes."""

from __future__ import annotations

from pathlib import Path

import pytest
from click.testing import CliRunner

from kidneycohort.cli import cli
from kidneycohort.design import load_design
from kidneycohort.design._run import design_chunks
from kidneycohort.design._scenario import design_scenarios, true_effects
from kidneycohort.errors import ConfigError
from tests._fixtures import REPO_ROOT

EXAMPLE = REPO_ROOT / "configs" / "design_trial.yaml"
MINIMAL = {"design": {"seed": 1, "sample_sizes": [100], "trials": 2}}


def test_shipped_example_validates_and_maps_onto_the_generator() -> None:
    config, folder = load_design(EXAMPLE)
    scenarios = design_scenarios(config, folder)
    effect, null = scenarios["effect"], scenarios["null"]
    treated = {a.label: a for a in effect.groups.arms}["treatment"]
    assert treated.acute_dip == pytest.approx(2.5)  # acute_effect -2.5 is a dip of 2.5
    assert treated.slope_difference == pytest.approx(1.0)
    assert treated.slope_difference_sd == pytest.approx(0.5)
    assert effect.trajectory.intercept_mean == 48
    assert effect.events.loss_to_followup_per_year == pytest.approx(0.03)
    assert [v.day for v in effect.schedule.visits][:3] == [-14, 0, 14]  # type: ignore[union-attr]
    null_treated = {a.label: a for a in null.groups.arms}["treatment"]
    assert (null_treated.acute_dip, null_treated.slope_difference) == (0.0, 0.0)
    # the null scenario differs from the effect scenario in its arms only
    assert null.model_copy(update={"groups": effect.groups}) == effect


def test_true_effects_follow_the_mean_path() -> None:
    config, _ = load_design(
        {
            **MINIMAL,
            "scenario": {"treatment": {"acute_effect": -3.0, "chronic_effect": 1.0}},
        }
    )
    truth = true_effects(config)
    # dip of 3 complete by the 3-month knot; total slope over T: chronic + acute / T
    assert truth["acute_change"] == pytest.approx(-3.0)
    assert truth["chronic_slope"] == pytest.approx(1.0)
    assert truth["total_slope_2y"] == pytest.approx(1.0 - 3.0 / 2)
    assert truth["total_slope_3y"] == pytest.approx(0.0)


def test_chunks_and_seeds_depend_on_the_design_only() -> None:
    config, _ = load_design({"design": {**MINIMAL["design"], "trials": 45, "trials_per_chunk": 20}})
    chunks = design_chunks(config)
    assert [c.trials for c in chunks if c.scenario_label == "effect"] == [20, 20, 5]
    assert len({c.seed for c in chunks}) == len(chunks)  # every chunk its own stream
    assert design_chunks(config) == chunks
    other, _ = load_design(
        {"design": {**MINIMAL["design"], "trials": 45, "trials_per_chunk": 20, "seed": 2}}
    )
    assert {c.seed for c in design_chunks(other)}.isdisjoint({c.seed for c in chunks})


@pytest.mark.parametrize(
    ("change", "names"),
    [
        ({"design": {**MINIMAL["design"], "trials": 0}}, "design.trials"),
        ({"design": {**MINIMAL["design"], "alpha": 1.5}}, "design.alpha"),
        ({"design": {**MINIMAL["design"], "sample_sizes": [2]}}, "sample size"),
        ({**MINIMAL, "scenario": {"treatment": {"acute_efect": -1}}}, "acute_effect"),
        ({**MINIMAL, "scenario": {"visits": {"days": [14, 28]}}}, "scenario.visits"),
        ({**MINIMAL, "slope_model": {"knot_years": 0.5, "horizons_years": [0.25]}}, "horizons"),
        ({**MINIMAL, "endpoints": {"definitions": [{"kind": "egfr_declin"}]}}, "kind"),
        (
            {"design": {**MINIMAL["design"], "time_to_event_endpoints": ["decline_99"]}},
            "time_to_event_endpoints",
        ),
        ({"sample_sizes": [100]}, "design"),
    ],
)
def test_bad_config_is_one_line_naming_the_field(change: dict[str, object], names: str) -> None:
    with pytest.raises(ConfigError) as caught:
        load_design(change)
    message = str(caught.value)
    assert "\n" not in message
    assert names in message


def test_scenario_values_the_generator_refuses_name_the_scenario(tmp_path: Path) -> None:
    # an inclusion range below the GFR floor is the generator's rule, reported as one line
    bad = {**MINIMAL, "scenario": {"baseline_egfr": {"mean": 3, "sd": 1, "min": 2, "max": 5}}}
    config, folder = load_design(bad)
    with pytest.raises(ConfigError, match=r"^scenario .*gfr_floor"):
        design_scenarios(config, folder)


def test_command_line_bad_config_exits_2_with_one_line(tmp_path: Path) -> None:
    path = tmp_path / "design.yaml"
    path.write_text("design: {seed: 1, sample_sizes: [100], trials: 2, trails: 3}\n")
    result = CliRunner().invoke(cli, ["design", str(path), "--out", str(tmp_path / "out")])
    assert result.exit_code == 2
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and "unknown key 'trails'" in lines[0] and "did you mean" in lines[0]


def test_command_line_needs_an_output_folder(tmp_path: Path) -> None:
    path = tmp_path / "design.yaml"
    path.write_text("design: {seed: 1, sample_sizes: [100], trials: 2}\n")
    result = CliRunner().invoke(cli, ["design", str(path)])
    assert result.exit_code == 2
    assert "output.dir" in result.output


def test_committed_design_reference_is_current() -> None:
    # regenerate with: python -m kidneycohort.design._reference docs/design_config_reference.md
    from kidneycohort.design._config import DesignScenario, DesignSection
    from kidneycohort.design._reference import design_reference

    text = design_reference()
    assert (REPO_ROOT / "docs" / "design_config_reference.md").read_text(encoding="utf-8") == text
    for prefix, model in (("design", DesignSection), ("scenario", DesignScenario)):
        for field in model.model_fields:
            assert f"`{prefix}.{field}`" in text


def test_stated_distributions_replace_covariate_effects_and_close_date() -> None:
    config, folder = load_design(
        {
            **MINIMAL,
            "scenario": {
                "egfr_slope": {"mean": -3.0, "sd": 2.0},
                "accrual_years": 1.5,
                "followup_years": 2.0,
                "followup_until_close": True,
            },
        }
    )
    scenario = design_scenarios(config, folder)["effect"]
    # the stated slope is the population's: no covariate shifts it
    assert scenario.trajectory.slope_effects.model_dump() == {
        "age_per_10_years": 0.0,
        "female": 0.0,
        "diabetes": 0.0,
        "log2_uacr": 0.0,
    }
    assert scenario.trajectory.intercept_effects.log2_uacr != 0.0  # not stated: the base's
    # every patient followed until 1.5 + 2 years after the first randomisation
    calendar = scenario.calendar
    assert calendar.followup_years is None and calendar.end_date is not None
    assert (calendar.end_date - calendar.start_date).days == 1279  # ceil(3.5 * 365.25)
