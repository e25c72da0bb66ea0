"""Baseline KDIGO categories per patient: hand-built cases on the KDIGO 2012 boundaries,
the prognosis grid, reasons for missing categories, partitions and bad input."""

from __future__ import annotations

import pandas as pd
import polars as pl
import pytest
from polars.testing import assert_frame_equal

from kidneycohort.errors import InputDataError
from kidneycohort.kdigo import BASELINE_CATEGORIES, baseline_categories

# KDIGO 2012 CKD guideline, Table 5 (GFR categories, mL/min/1.73 m2): G1 >= 90,
# G2 60-89, G3a 45-59, G3b 30-44, G4 15-29, G5 < 15 -- applied as thresholds to the
# unrounded value (59.5 is below 60, so G3a).
G_CASES = [
    (120.0, "G1"),
    (90.0, "G1"),
    (89.99, "G2"),
    (60.0, "G2"),
    (59.5, "G3a"),
    (45.0, "G3a"),
    (44.9, "G3b"),
    (30.0, "G3b"),
    (29.99, "G4"),
    (15.0, "G4"),
    (14.9, "G5"),
    (0.0, "G5"),
]
# KDIGO 2012 Table 6 (albuminuria categories, mg/g): A1 < 30, A2 30-300, A3 > 300.
A_CASES = [(0.5, "A1"), (29.9, "A1"), (30.0, "A2"), (300.0, "A2"), (300.1, "A3"), (2500.0, "A3")]
# KDIGO 2012 Figure 2, re-typed here from the guideline's heat map (rows G1..G5,
# columns A1..A3): green = low, yellow = moderately increased, orange = high, red = very high.
HEAT_MAP = {
    "G1": ("low", "moderately increased", "high"),
    "G2": ("low", "moderately increased", "high"),
    "G3a": ("moderately increased", "high", "very high"),
    "G3b": ("high", "very high", "very high"),
    "G4": ("very high", "very high", "very high"),
    "G5": ("very high", "very high", "very high"),
}


def _baseline(values: list[float | None], equation: str = "eq", **extra: list) -> pl.DataFrame:
    return pl.DataFrame(
        {
            "patient_id": [f"p{i:02d}" for i in range(len(values))],
            "equation": [equation] * len(values),
            "baseline_egfr": values,
            **extra,
        },
        schema_overrides={"baseline_egfr": pl.Float64},
    )


def test_g_category_at_each_kdigo_boundary() -> None:
    base = _baseline([v for v, _ in G_CASES])
    out = baseline_categories(base)
    assert out["g_category"].to_list() == [c for _, c in G_CASES]
    assert out["g_reason"].null_count() == out.height
    # no UACR table: every A category missing with its reason, never a guessed A1
    assert out["a_category"].null_count() == out.height
    assert set(out["a_reason"].to_list()) == {"no_uacr_baseline"}
    assert out.schema == pl.Schema(BASELINE_CATEGORIES)


def test_a_category_at_each_kdigo_boundary() -> None:
    base = _baseline([50.0] * len(A_CASES))
    uacr = pl.DataFrame(
        {"patient_id": base["patient_id"], "baseline_uacr_mg_g": [v for v, _ in A_CASES]}
    )
    out = baseline_categories(base, uacr)
    assert out["a_category"].to_list() == [c for _, c in A_CASES]


def test_risk_follows_the_kdigo_heat_map_in_every_cell() -> None:
    # one patient per cell: an eGFR inside each G range and a UACR inside each A range
    g_value = {"G1": 100.0, "G2": 70.0, "G3a": 50.0, "G3b": 35.0, "G4": 20.0, "G5": 10.0}
    a_value = {"A1": 10.0, "A2": 100.0, "A3": 500.0}
    cells = [(g, a) for g in g_value for a in a_value]
    base = _baseline([g_value[g] for g, _ in cells])
    uacr = pl.DataFrame(
        {"patient_id": base["patient_id"], "baseline_uacr_mg_g": [a_value[a] for _, a in cells]}
    )
    out = baseline_categories(base, uacr)
    assert list(zip(out["g_category"], out["a_category"], strict=True)) == cells
    expected = [HEAT_MAP[g][("A1", "A2", "A3").index(a)] for g, a in cells]
    assert out["risk"].to_list() == expected


def test_missing_categories_carry_a_reason_and_no_patient_is_dropped() -> None:
    base = pl.DataFrame(
        {
            "patient_id": ["a", "b", "c", "d"],
            "equation": ["eq"] * 4,
            "baseline_egfr": [59.5, 90.0, None, -1.0],
            "baseline_reason": [None, None, "no_values_in_window", None],
        }
    )
    uacr = pl.DataFrame(
        {
            "patient_id": ["a", "c", "z"],
            "baseline_uacr_mg_g": [30.0, None, 301.0],
            "baseline_reason": [None, "no_values_in_window", None],
        }
    )
    out = baseline_categories(base, uacr)
    # patients of the eGFR baseline first, then the one only in the UACR table
    assert out["patient_id"].to_list() == ["a", "b", "c", "d", "z"]
    rows = {r["patient_id"]: r for r in out.to_dicts()}
    assert (rows["a"]["g_category"], rows["a"]["a_category"], rows["a"]["risk"]) == (
        "G3a",
        "A2",
        "high",
    )
    assert rows["b"]["a_reason"] == "no_baseline_row" and rows["b"]["risk"] is None
    assert rows["c"]["g_reason"] == "no_values_in_window"
    assert rows["c"]["a_reason"] == "no_values_in_window"
    assert rows["d"]["g_category"] is None and rows["d"]["g_reason"] == "not_classifiable"
    assert rows["z"]["g_reason"] == "no_baseline_row" and rows["z"]["a_category"] == "A3"
    assert rows["z"]["equation"] == "eq"


def test_chosen_equation_among_several() -> None:
    base = pl.concat(
        [_baseline([59.0, 91.0], equation="first"), _baseline([61.0, 89.0], equation="second")]
    )
    assert baseline_categories(base, equation="second")["g_category"].to_list() == ["G2", "G2"]
    assert baseline_categories(base, equation="first")["g_category"].to_list() == ["G3a", "G1"]
    with pytest.raises(InputDataError, match="pass equation="):
        baseline_categories(base)
    with pytest.raises(InputDataError, match="did you mean 'second'"):
        baseline_categories(base, equation="secnd")


def test_same_answer_on_any_partition_of_patients() -> None:
    values = [v for v, _ in G_CASES]
    base = _baseline(values)
    uacr = pl.DataFrame(
        {
            "patient_id": base["patient_id"],
            "baseline_uacr_mg_g": [(i * 37.0) % 420 for i in range(len(values))],
        }
    )
    whole = baseline_categories(base, uacr)
    parts = []
    for chunk in (slice(0, 5), slice(5, 12)):
        ids = base["patient_id"][chunk]
        parts.append(
            baseline_categories(
                base.filter(pl.col("patient_id").is_in(ids.implode())),
                uacr.filter(pl.col("patient_id").is_in(ids.implode())),
            )
        )
    assert_frame_equal(pl.concat(parts), whole)


def test_pandas_input_gives_pandas() -> None:
    base = pd.DataFrame({"patient_id": ["x"], "equation": ["eq"], "baseline_egfr": [44.0]})
    uacr = pd.DataFrame({"patient_id": ["x"], "baseline_uacr_mg_g": [31.0]})
    out = baseline_categories(base, uacr)
    assert isinstance(out, pd.DataFrame)  # tables in, the same kind out
    assert out.iloc[0]["risk"] == "very high"  # G3b A2 (KDIGO 2012 Figure 2)


def test_bad_input_names_the_table_and_column() -> None:
    base = _baseline([50.0, 60.0])
    with pytest.raises(InputDataError, match="baseline_egfr"):
        baseline_categories(base.drop("baseline_egfr"))
    twice = pl.concat([base, base])
    with pytest.raises(InputDataError, match="patient 'p00' has more than one row"):
        baseline_categories(twice)
    with pytest.raises(InputDataError, match="uacr_baseline"):
        baseline_categories(base, pl.DataFrame({"patient_id": ["p00"], "uacr": [1.0]}))
