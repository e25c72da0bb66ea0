"""The compact reasons (one byte per element) name the same codes as the text reasons."""

from __future__ import annotations

import numpy as np
import pytest

from kidneycohort import equations as eq


@pytest.mark.parametrize("equation_id", eq.equation_ids())
def test_index_names_the_same_reasons_and_values(equation_id) -> None:
    rng = np.random.default_rng(3)
    n = 400
    inputs = {
        "creatinine_mg_dl": rng.choice([np.nan, -1.0, 0.0, 0.4, 0.9, 1.7, 6.0], n),
        "cystatin_c_mg_l": rng.choice([np.nan, 0.0, 0.7, 1.2, 3.5], n),
        "age": rng.choice([np.nan, -2.0, 1.0, 10.0, 17.5, 40.0, 70.0, 130.0, 150.0], n),
        "sex": rng.choice(["female", "male", None], n),
        "height_cm": rng.choice([np.nan, 60.0, 150.0, 180.0], n),
        "weight_kg": rng.choice([np.nan, 8.0, 60.0, 95.0], n),
    }
    spec = eq.get_equation(equation_id)
    given = {k: v for k, v in inputs.items() if k in spec.inputs}
    text = eq.evaluate_with_reason(equation_id, **given)
    compact = eq.evaluate_with_reason_index(equation_id, **given)
    labels = np.array([*compact.codes, eq.OK], dtype=object)
    assert labels[compact.reason_index].tolist() == np.asarray(text.reasons).tolist()
    np.testing.assert_array_equal(compact.values, text.values)
    assert set(np.asarray(text.reasons).tolist()) - {eq.OK}  # some inputs were refused


def test_unknown_input_is_refused() -> None:
    with pytest.raises(TypeError, match="creatinine"):
        eq.evaluate_with_reason_index("ckd_epi_2021_cr", creatinine=[1.0])
