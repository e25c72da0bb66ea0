"""Incidence rates, exact Poisson limits and rate contrasts."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest
from polars.testing import assert_frame_equal

from kidneycohort.errors import InputDataError
from kidneycohort.models.rates import (
    exact_poisson_interval,
    incidence_rates,
    rate_difference,
    rate_ratio,
)


@pytest.mark.parametrize(
    ("events", "lower", "upper"),
    [
        # Exact (Garwood) 95 % limits of a Poisson count, as tabulated in e.g. Ulm K,
        # Am J Epidemiol 1990;131:373-375 and the Documenta Geigy tables (from memory;
        # the 0-event upper limit 3.689 is the familiar "rule of 3.7").
        (0, 0.0, 3.689),
        (1, 0.0253, 5.572),
        (2, 0.242, 7.225),
        (5, 1.623, 11.668),
        (10, 4.795, 18.390),
    ],
)
def test_exact_poisson_limits_match_published_table(
    events: int, lower: float, upper: float
) -> None:
    low, upp = exact_poisson_interval(events, 1.0, per=1.0)
    assert low[0] == pytest.approx(lower, abs=6e-4)
    assert upp[0] == pytest.approx(upper, abs=6e-4)


def test_exact_limits_scale_with_person_years() -> None:
    # 0 events in 200 person-years: upper 95 % limit 3.689 / 200 per year = 1.84 per 100 PY
    low, upp = exact_poisson_interval([0], [200.0])
    assert low[0] == 0.0
    assert upp[0] == pytest.approx(100 * 3.689 / 200, abs=1e-3)


def _endpoints() -> pl.DataFrame:
    return pl.DataFrame(
        {
            "patient_id": ["a", "b", "c", "d", "e", "f"],
            "endpoint": ["kidney_composite"] * 6,
            "years": [1.0, 2.0, 3.0, 1.5, 2.5, 4.0],
            "event": [1, 0, 1, 0, 0, 1],
        }
    )


def _patients() -> pl.DataFrame:
    return pl.DataFrame(
        {"patient_id": ["a", "b", "c", "d", "e", "f"], "group": ["placebo"] * 3 + ["active"] * 3}
    )


def test_incidence_rates_by_group() -> None:
    result = incidence_rates(_endpoints(), _patients())
    # by hand: placebo 2 events / 6 PY, active 1 event / 8 PY
    low_p, upp_p = exact_poisson_interval(2, 6.0)
    low_a, upp_a = exact_poisson_interval(1, 8.0)
    expected = pl.DataFrame(
        {
            "endpoint": ["kidney_composite", "kidney_composite"],
            "group": ["active", "placebo"],
            "events": [1, 2],
            "person_years": [8.0, 6.0],
            "rate_per_100py": [100 / 8, 200 / 6],
            "lower": [low_a[0], low_p[0]],
            "upper": [upp_a[0], upp_p[0]],
        }
    )
    assert_frame_equal(result, expected)


def test_rate_ratio_exact_conditional_limits() -> None:
    rates = incidence_rates(_endpoints(), _patients())
    result = rate_ratio(rates, reference_group="placebo")
    # RR = (1/8)/(2/6) = 0.375. Conditional on 3 events, active's count is binomial(3, pi);
    # Clopper–Pearson limits of pi for 1 of 3 by hand: lower solves 1 - (1 - p)^3 = 0.025,
    # i.e. 1 - 0.975^(1/3); upper solves P(X <= 1) = (1 - p)^2 (1 + 2p) = 0.025 (bisection).
    pi_lower = 1 - 0.975 ** (1 / 3)
    low, high = 0.0, 1.0
    for _ in range(60):
        mid = (low + high) / 2
        low, high = (mid, high) if (1 - mid) ** 2 * (1 + 2 * mid) > 0.025 else (low, mid)
    pi_upper = (low + high) / 2
    assert result["rate_ratio"][0] == pytest.approx(0.375)
    assert result["lower"][0] == pytest.approx(pi_lower / (1 - pi_lower) * 6 / 8, rel=1e-6)
    assert result["upper"][0] == pytest.approx(pi_upper / (1 - pi_upper) * 6 / 8, rel=1e-6)
    assert 0.0 < result["p"][0] <= 1.0


def test_rate_difference_wald() -> None:
    rates = incidence_rates(_endpoints(), _patients())
    result = rate_difference(rates, reference_group="placebo")
    difference = 1 / 8 - 2 / 6
    se = np.sqrt(1 / 8**2 + 2 / 6**2)  # Wald variance d1/PY1^2 + d0/PY0^2
    assert result["rate_difference_per_100py"][0] == pytest.approx(100 * difference)
    assert result["lower"][0] == pytest.approx(100 * (difference - 1.959964 * se), rel=1e-4)
    assert result["upper"][0] == pytest.approx(100 * (difference + 1.959964 * se), rel=1e-4)


def test_unknown_reference_group_suggests() -> None:
    rates = incidence_rates(_endpoints(), _patients())
    with pytest.raises(InputDataError, match="did you mean 'placebo'"):
        rate_ratio(rates, reference_group="placebos")


def test_negative_follow_up_is_refused() -> None:
    bad = _endpoints().with_columns(
        pl.when(pl.col("patient_id") == "b").then(-1.0).otherwise(pl.col("years")).alias("years")
    )
    with pytest.raises(InputDataError, match="column 'years' of patient 'b'"):
        incidence_rates(bad, _patients())


def test_patient_without_group_is_refused() -> None:
    with pytest.raises(InputDataError, match="patient 'f' has no 'group'"):
        incidence_rates(_endpoints(), _patients().head(5))


def test_bad_event_code_is_refused() -> None:
    bad = _endpoints().with_columns(pl.lit(2).alias("event"))
    with pytest.raises(InputDataError, match="expected 1 \\(event\\) or 0"):
        incidence_rates(bad, _patients())


def test_no_person_time_is_refused() -> None:
    with pytest.raises(InputDataError, match="person_years"):
        exact_poisson_interval(1, 0.0)


def test_pandas_input_gives_the_same_table() -> None:
    expected = incidence_rates(_endpoints(), _patients())
    result = incidence_rates(_endpoints().to_pandas(), _patients().to_pandas())
    assert type(result).__module__.startswith("pandas")  # pandas in, pandas out
    assert_frame_equal(pl.from_pandas(result), expected, check_dtypes=False)


def test_person_years_are_the_same_bits_whatever_the_row_order() -> None:
    # floating-point addition is not associative (common practice: sum in a fixed order
    # so that a rerun on the same data gives a byte-identical run folder)
    import numpy as np
    import polars as pl

    from kidneycohort.models.rates import incidence_rates

    rng = np.random.default_rng(4)
    n = 5_000
    endpoints = pl.DataFrame(
        {
            "patient_id": [f"p{i}" for i in range(n)],
            "endpoint": ["death"] * n,
            "years": rng.uniform(0.01, 3.0, n) / 3.0,
            "event": rng.integers(0, 2, n),
            "group": rng.choice(["a", "b"], n),
        }
    )
    first = incidence_rates(endpoints, group_column="group")
    for seed in range(5):
        shuffled = endpoints.sample(fraction=1.0, shuffle=True, seed=seed)
        assert incidence_rates(shuffled, group_column="group").equals(first)
