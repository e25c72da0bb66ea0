"""The generated config reference is current and documents every key."""

from __future__ import annotations

from kidneycohort.pipeline import default_registry
from kidneycohort.pipeline.config._sections import STUDY_FACTS
from kidneycohort.pipeline.reference import config_reference
from tests._fixtures import REPO_ROOT

DOC = REPO_ROOT / "docs" / "config_reference.md"


def test_committed_reference_is_current() -> None:
    # regenerate with: python -m kidneycohort.pipeline.reference docs/config_reference.md
    assert DOC.read_text(encoding="utf-8") == config_reference()


def test_every_section_and_key_is_documented() -> None:
    text = config_reference()
    for name, model in default_registry().sections().items():
        assert f"## `{name}`" in text
        for field, info in model.model_fields.items() if model else []:
            if field in STUDY_FACTS:  # set once under study, never in a stage section
                assert f"`{name}.{field}`" not in text and f"`study.{STUDY_FACTS[field]}`" in text
                continue
            assert f"`{name}.{info.alias or field}`" in text


def test_every_step_is_listed() -> None:
    text = config_reference()
    for step in default_registry():
        assert f"| `{step.name}` |" in text
