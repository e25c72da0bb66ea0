"""The input contract in words: ``docs/data_contract.md``, written from the code.

Every column, type and note comes from :mod:`kidneycohort.schemas`; accepted codes and
units from :mod:`kidneycohort.vocabulary`, :mod:`kidneycohort.units` and the harmonise
rules; only what an optional column changes is said here (:data:`OPTIONAL_EFFECTS`, each
key checked against the schemas by a test). Regenerate after changing any of them::

    python -m kidneycohort.data_contract docs/data_contract.md
"""

from __future__ import annotations

import inspect
import io
import sys
import tokenize
from collections.abc import Mapping
from pathlib import Path
from typing import Final

import polars as pl

from kidneycohort import schemas, units
from kidneycohort.harmonize import REASON_CODES
from kidneycohort.value_filter import KNOWN_SETTINGS
from kidneycohort.vocabulary import SEX_CODES

__all__ = ["INPUT_TABLES", "OPTIONAL_EFFECTS", "column_notes", "main", "render_data_contract"]

INPUT_TABLES: Final[dict[str, tuple[str, tuple[str, ...]]]] = {
    "patients": ("PATIENTS", schemas.PATIENTS_REQUIRED),
    "labs": ("RAW_LABS", schemas.RAW_LABS_REQUIRED),
    "events": ("EVENTS", schemas.EVENTS_REQUIRED),
}
"""Input table -> (schema name in :mod:`kidneycohort.schemas`, required columns)."""

OPTIONAL_EFFECTS: Final[dict[tuple[str, str], str]] = {
    ("patients", "sex"): "Needed by every equation with a sex term; unknown codes are an "
    "error naming them.",
    ("patients", "birth_date"): "Ages at every sample and at the index date are computed "
    "from it (exact, in years); preferred over age_at_index.",
    ("patients", "age_at_index"): "Used only without birth_date: ages at later samples are "
    "age_at_index plus the time since the index date.",
    ("patients", "index_date"): "Time zero of baselines, slopes and endpoints; patients "
    "without one get no baseline or slope (with a reason) and no endpoint.",
    ("patients", "group"): "The study's group column (study.group_column may name another "
    "column); without one every analysis is of the whole cohort.",
    ("patients", "height_cm"): "Read by the equations with a height term (paediatric) and "
    "the body-surface-area helpers.",
    ("patients", "weight_kg"): "Read by Cockcroft-Gault clearance and the body-surface-area "
    "helpers.",
    ("patients", "black_race"): "Read only by equations that have a race coefficient "
    "(kept for reproducing older analyses).",
    ("patients", "death_date"): "Death as an endpoint and as a competing event.",
    ("patients", "kfrt_date"): "Onset of kidney-failure replacement therapy: eGFR values on "
    "or after it are not used for decline endpoints; KFRE leaves out patients already on "
    "it at the index date; ADSL takes it when no kidney-failure event is counted.",
    ("patients", "end_of_followup"): "Follow-up ends at the earliest of the data cut, this "
    "date and death.",
    ("labs", "setting"): "outpatient / inpatient / emergency: value_filter.exclude_settings "
    "leaves inpatient and emergency results out of baselines, slopes and stages.",
    ("events", "end_date"): "End of a dialysis episode: with it, an episode counts as "
    "kidney failure only when it lasted endpoints.rule.min_dialysis_days or ended by death "
    "or transplant.",
}
"""What each optional input column changes (the columns themselves come from the schemas)."""


def column_notes(schema_name: str) -> dict[str, str]:
    """The end-of-line comments of one schema's columns in :mod:`kidneycohort.schemas`."""
    source = inspect.getsource(schemas)
    notes: dict[str, str] = {}
    inside = False
    last_key: str | None = None
    for token in tokenize.generate_tokens(io.StringIO(source).readline):
        if token.type == tokenize.NAME and token.string == schema_name and token.start[1] == 0:
            inside = True
        elif inside and token.type == tokenize.OP and token.string == "}":
            break
        elif inside and token.type == tokenize.STRING and token.line.lstrip().startswith('"'):
            last_key = token.string.strip('"')
        elif inside and token.type == tokenize.COMMENT and last_key is not None:
            notes[last_key] = token.string.lstrip("# ").strip()
    return notes


def _type_name(dtype: pl.DataType) -> str:
    names = {
        pl.String: "text",
        pl.Float64: "number",
        pl.Int64: "integer",
        pl.Int32: "integer",
        pl.Int8: "integer",
        pl.Boolean: "true/false",
        pl.Date: "date (YYYY-MM-DD)",
    }
    for kind, name in names.items():
        if dtype == kind:
            return name
    if isinstance(dtype, pl.Datetime):
        return "date or date-time"
    return str(dtype)


def _table_section(
    name: str, schema: Mapping[str, pl.DataType], required: tuple[str, ...]
) -> list[str]:
    schema_name = INPUT_TABLES[name][0]
    notes = column_notes(schema_name)
    lines = [
        f"## `{name}`",
        "",
        f"Columns of `kidneycohort.schemas.{schema_name}`; required: "
        + ", ".join(f"`{c}`" for c in required)
        + ". Any other column is kept and may be used as a covariate.",
        "",
        "| column | type | required | meaning | what it changes |",
        "|---|---|---|---|---|",
    ]
    for column, dtype in schema.items():
        effect = OPTIONAL_EFFECTS.get((name, column), "")
        lines.append(
            f"| `{column}` | {_type_name(dtype)} | {'yes' if column in required else 'no'} | "
            f"{notes.get(column, '')} | {effect} |"
        )
    return [*lines, ""]


def _codes_section() -> list[str]:
    by_sex: dict[str, list[str]] = {}
    for spelling, code in SEX_CODES.items():
        by_sex.setdefault(code, []).append(f"`{spelling}`")
    lines = [
        "## Accepted codes and units",
        "",
        "Codes are matched after folding (case, surrounding spaces, `_`/`-`/space runs); a "
        "config's `values` map translates other codes.",
        "",
        "- **sex**: "
        + "; ".join(f"{code}: {', '.join(s)}" for code, s in by_sex.items())
        + ". Anything else is an error naming the code.",
        "- **analyte**: " + ", ".join(f"`{a}`" for a in units.ANALYTES) + ".",
        "- **setting**: " + ", ".join(f"`{s}`" for s in KNOWN_SETTINGS) + ".",
        "- **event**: " + ", ".join(f"`{e}`" for e in schemas.CANONICAL_EVENTS) + ".",
        "- **value**: a number as reported (decimal point; a decimal comma when the source "
        "says so), optionally with `<`, `<=` or `>` (a limit: `qualifier`), or text such as "
        "`not done` (rejected with a reason).",
        "",
        "| analyte | standard unit | accepted units (converted) |",
        "|---|---|---|",
    ]
    factors = units.unit_factor_table()
    for analyte in units.ANALYTES:
        accepted = factors.filter(pl.col("analyte") == analyte)["unit_key"].to_list()
        lines.append(
            f"| `{analyte}` | {units.STANDARD_UNIT[analyte]} | "
            + ", ".join(f"`{u}`" for u in accepted)
            + " |"
        )
    return [*lines, ""]


def _reasons_section() -> list[str]:
    lines = [
        "## Rejected rows",
        "",
        "No input row is dropped silently: each is used, merged with a duplicate, or listed "
        "in `rejected_rows.csv` with one of these reason codes.",
        "",
        "| reason | meaning |",
        "|---|---|",
    ]
    lines += [f"| `{code}` | {text} |" for code, text in REASON_CODES.items()]
    return [*lines, ""]


def render_data_contract() -> str:
    """The whole ``docs/data_contract.md``."""
    lines = [
        "# Input data contract",
        "",
        "<!-- generated by `python -m kidneycohort.data_contract docs/data_contract.md`; "
        "a test keeps it equal to the code -->",
        "",
        "The tables a study gives kidneycohort, in its own canonical names. Your own column "
        "names and codes map onto these in the study config (`data.<table>.columns` and "
        "`values`; see config_reference.md and your_own_data.md). Sources in a standard "
        "layout (OMOP CDM, CDISC SDTM) are mapped onto the same tables by the readers.",
        "",
    ]
    for name, (schema_name, required) in INPUT_TABLES.items():
        lines += _table_section(name, getattr(schemas, schema_name), required)
    lines += _codes_section()
    lines += _reasons_section()
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    """Write the contract to the path given (stdout without one)."""
    args = sys.argv[1:] if argv is None else argv
    text = render_data_contract()
    if args:
        Path(args[0]).write_text(text, encoding="utf-8")
    else:
        sys.stdout.write(text)
    return 0


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
