"""docs/data_contract.md is written from the code and cannot drift from it."""

from __future__ import annotations

from kidneycohort import schemas
from kidneycohort.data_contract import INPUT_TABLES, OPTIONAL_EFFECTS, render_data_contract
from tests._fixtures import REPO_ROOT


def test_committed_contract_is_current() -> None:
    committed = (REPO_ROOT / "docs" / "data_contract.md").read_text(encoding="utf-8")
    assert committed == render_data_contract(), (
        "regenerate: python -m kidneycohort.data_contract docs/data_contract.md"
    )


def test_every_input_column_and_effect_is_a_schema_column() -> None:
    text = render_data_contract()
    for table, (schema_name, required) in INPUT_TABLES.items():
        schema = getattr(schemas, schema_name)
        assert set(required) <= set(schema)
        for column in schema:
            assert f"| `{column}` |" in text, (table, column)
    for table, column in OPTIONAL_EFFECTS:
        schema = getattr(schemas, INPUT_TABLES[table][0])
        assert column in schema, (table, column)
        assert column not in INPUT_TABLES[table][1], "an effect is for optional columns"


def test_codes_come_from_the_vocabulary() -> None:
    from kidneycohort.harmonize import REASON_CODES
    from kidneycohort.vocabulary import SEX_CODES

    text = render_data_contract()
    assert all(f"`{spelling}`" in text for spelling in SEX_CODES)
    assert all(f"| `{code}` |" in text for code in REASON_CODES)
