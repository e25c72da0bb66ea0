"""Unit spellings and conversion factors.

Factors: creatinine 1 mg/dL = 88.4 umol/L (re-read: the KDIGO 2012 AKI guideline prints
4.0 mg/dl as 353.6 umol/l); UACR 1 mg/mmol = 8.84 mg/g (derived: 88.4 / 10, since 1 mmol
creatinine = 113.12 mg); cystatin C 1 mg/dL = 10 mg/L (SI prefixes). The parametrised
conversions below type expected values with those factors: arithmetic re-checks of the
conversion code, with the factors themselves checked in ``test_published_factors``.
"""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from kidneycohort import units
from kidneycohort.errors import UnknownUnitError


def test_published_factors() -> None:
    # Independent of the constant: KDIGO clinical practice guideline for AKI (Kidney Int
    # Suppl 2012;2:19-36), Table 2 (staging of AKI) prints serum creatinine 4.0 mg/dl as
    # 353.6 umol/l and the 0.3 mg/dl rise as 26.5 umol/l (one decimal).
    assert units.to_standard(353.6, "creatinine", "umol/L") == pytest.approx(4.0, rel=1e-9)
    assert units.to_standard(26.5, "creatinine", "umol/L") == pytest.approx(0.3, abs=0.0005)
    # the UACR factor is derived from the creatinine one: mg/mmol -> mg/g is x 88.4 / 10
    assert units.UACR_MG_G_PER_MG_MMOL == pytest.approx(
        units.CREATININE_UMOL_PER_MG_DL / 10, rel=1e-12
    )


@pytest.mark.parametrize(
    ("analyte", "value", "unit", "expected"),
    [
        ("creatinine", 88.4, "umol/L", 1.0),
        ("creatinine", 176.8, "µmol/L", 2.0),  # micro sign U+00B5
        ("creatinine", 61.88, "μmol/l", 0.7),  # Greek small mu U+03BC
        ("creatinine", 0.0884, "mmol/L", 1.0),
        ("creatinine", 1.3, "mg/dL", 1.3),
        ("creatinine", 13.0, "mg/L", 1.3),
        ("cystatin_c", 0.1, "mg/dL", 1.0),
        ("cystatin_c", 1.1, "mg/L", 1.1),
        ("uacr", 3.0, "mg/mmol", 26.52),  # KDIGO A1/A2 boundary, ~30 mg/g
        ("uacr", 30.0, "mg/mmol{creat}", 265.2),  # UCUM annotation in braces
        ("uacr", 0.3, "g/g", 300.0),
        ("uacr", 30.0, "mg/g{creat}", 30.0),
    ],
)
def test_to_standard(analyte: str, value: float, unit: str, expected: float) -> None:
    got = units.to_standard(value, analyte, unit)
    assert isinstance(got, float)
    assert got == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize(
    ("spelling", "key"),
    [
        ("µmol/L", "umol/l"),
        ("μmol/L", "umol/l"),
        (" umol / L ", "umol/l"),
        ("UMOL/L", "umol/l"),
        ("micromol/L", "umol/l"),
        ("mg/dL", "mg/dl"),
        ("mg/100mL", "mg/dl"),
        ("mg/mmol{creat}", "mg/mmol"),
        ("mg/g{creat}", "mg/g"),
        ("ug/mg{creat}", "ug/mg"),
    ],
)
def test_spellings_are_normalised(spelling: str, key: str) -> None:
    assert units.normalize_unit(spelling) == key


def test_round_trips_and_array_conversion() -> None:
    values = np.array([0.5, 1.0, 4.2])
    np.testing.assert_allclose(
        units.creatinine_umol_to_mg_dl(units.creatinine_mg_dl_to_umol(values)), values
    )
    np.testing.assert_allclose(units.creatinine_mg_dl_to_umol(values), values * 88.4)
    np.testing.assert_allclose(units.uacr_mg_mmol_to_mg_g([3.0, 30.0]), [26.52, 265.2])
    np.testing.assert_allclose(units.to_standard([88.4, 176.8], "creatinine", "umol/L"), [1, 2])


def test_unknown_unit_names_it_and_suggests() -> None:
    with pytest.raises(UnknownUnitError, match=r"unknown unit 'mmol/dl'"):
        units.normalize_unit("mmol/dl")
    with pytest.raises(UnknownUnitError, match=r"did you mean 'umol/l'"):
        units.normalize_unit("umo/l")


def test_unit_of_another_analyte_is_rejected() -> None:
    with pytest.raises(UnknownUnitError, match=r"'mg/mmol' is not a unit of creatinine"):
        units.conversion_factor("creatinine", "mg/mmol")
    with pytest.raises(UnknownUnitError, match=r"unknown analyte 'creatinin'.*did you mean"):
        units.conversion_factor("creatinin", "mg/dL")


def test_factor_table_and_folding_expression_agree_with_the_scalar_path() -> None:
    table = units.unit_factor_table()
    spellings = pl.DataFrame({"unit": ["µmol/L", "μmol/L", " mg / dL", "mg/mmol{creat}"]})
    folded = spellings.select(units.fold_unit_expr("unit").alias("unit_key"))
    assert folded["unit_key"].to_list() == ["umol/l", "umol/l", "mg/dl", "mg/mmolcreat"]
    joined = (
        folded.with_columns(analyte=pl.Series(["creatinine", "creatinine", "creatinine", "uacr"]))
        .join(table, on=["analyte", "unit_key"], how="left")
        .get_column("unit_factor")
        .to_list()
    )
    assert joined == pytest.approx([1 / 88.4, 1 / 88.4, 1.0, 8.84])
