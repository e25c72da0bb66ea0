"""Subject-level facts every ADaM dataset carries: treatment, its number, population flags.

One place states the rules, so ADSL, the eGFR dataset and ADTTE agree:

* planned treatment is the patient's ``group`` (the randomised arm); actual treatment is
  ``actual_group`` when the patients table has it, else the planned one ("as randomised");
* treatment numbers follow ``arm_order`` (default: the arms in text order), from 1;
* ``ITTFL`` is "Y" for a subject with an arm and an index (randomisation) date;
* ``SAFFL`` is "Y" for a randomised subject with a ``first_dose_date`` when the patients
  table has that column (e.g. from SDTM EX); without dosing data every randomised subject
  is counted as treated, and the spec sheet says so.

Population flags follow the ADaM IG v1.3 flag convention ("Y"/"N", ADSL section 3.1).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Final

import polars as pl

from kidneycohort._frames import FrameLike, require_columns, to_polars
from kidneycohort.errors import InputDataError, did_you_mean

__all__ = ["subject_facts"]

SUBJECT_COLUMNS: Final = (
    "USUBJID",
    "TRTP",
    "TRTPN",
    "TRTA",
    "TRTAN",
    "ITTFL",
    "SAFFL",
    "RANDDT",
    "TRTSDT",
)

SAFFL_RULE_WITH_DOSING: Final = "Y when randomised and first_dose_date is present (EX)"
SAFFL_RULE_WITHOUT_DOSING: Final = "Y when randomised (no dosing data: treated as randomised)"


def subject_facts(
    patients: FrameLike, arm_order: Sequence[str] | None = None
) -> tuple[pl.DataFrame, str]:
    """Treatment, treatment numbers and population flags per subject.

    Parameters
    ----------
    patients
        Harmonised patients (``patient_id``, ``group``, ``index_date``; optional
        ``actual_group``, ``first_dose_date``).
    arm_order
        Arms in numbering order (``TRTPN`` 1, 2, ...); default the arms in text order.
        Every arm in the data must be listed.

    Returns
    -------
    (polars.DataFrame, str)
        :data:`SUBJECT_COLUMNS` (``USUBJID`` = ``patient_id``) and the ``SAFFL`` rule used.

    Raises
    ------
    InputDataError
        A missing column, or an arm absent from ``arm_order``.
    """
    df = to_polars(patients, "patients")
    require_columns(df, ("patient_id", "group", "index_date"), "patients")
    arms = df["group"].drop_nulls().cast(pl.String).unique().sort().to_list()
    actual = "actual_group" if "actual_group" in df.columns else "group"
    arms_actual = df[actual].drop_nulls().cast(pl.String).unique().to_list()
    order = list(arm_order) if arm_order is not None else arms
    for arm in sorted(set(arms) | set(arms_actual)):
        if arm not in order:
            raise InputDataError(
                f"patients.group: arm {arm!r} is not in the arm order {order}"
                f"{did_you_mean(arm, order)}; list every arm"
            )
    numbers = {arm: i for i, arm in enumerate(order, start=1)}
    randomised = pl.col("group").is_not_null() & pl.col("index_date").is_not_null()
    if "first_dose_date" in df.columns:
        treated = randomised & pl.col("first_dose_date").is_not_null()
        first_dose = pl.col("first_dose_date").cast(pl.Date)
        rule = SAFFL_RULE_WITH_DOSING
    else:
        treated = randomised
        first_dose = pl.lit(None, pl.Date)
        rule = SAFFL_RULE_WITHOUT_DOSING
    out = df.select(
        pl.col("patient_id").cast(pl.String).alias("USUBJID"),
        pl.col("group").cast(pl.String).alias("TRTP"),
        pl.col("group").cast(pl.String).replace_strict(numbers, default=None).alias("TRTPN"),
        pl.col(actual).cast(pl.String).alias("TRTA"),
        pl.col(actual).cast(pl.String).replace_strict(numbers, default=None).alias("TRTAN"),
        pl.when(randomised).then(pl.lit("Y")).otherwise(pl.lit("N")).alias("ITTFL"),
        pl.when(treated).then(pl.lit("Y")).otherwise(pl.lit("N")).alias("SAFFL"),
        pl.col("index_date").cast(pl.Date).alias("RANDDT"),
        first_dose.alias("TRTSDT"),
    ).with_columns(pl.col("TRTPN").cast(pl.Int64), pl.col("TRTAN").cast(pl.Int64))
    return out, rule
