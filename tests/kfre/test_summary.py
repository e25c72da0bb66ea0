"""Run-level summaries: KFRE at baseline, its summary table (small cells protected), and
the KDIGO grid counts the heat-map figure reads."""

from __future__ import annotations

import datetime as dt

import numpy as np
import polars as pl
import pytest

from kidneycohort.errors import ConfigError, InputDataError
from kidneycohort.kdigo import kdigo_grid_counts
from kidneycohort.kfre import KfreRule, kfre_at_baseline, kfre_summary_table
from kidneycohort.tables import TableRule


# Tangri et al. JAMA 2011, 4-variable KFRE (from memory), North American baseline
# survivals of Tangri 2016 (0.9750 at 2 years, 0.9240 at 5 years; from memory).
def _by_hand(age: float, male: int, egfr: float, acr: float) -> tuple[float, float]:
    eta = (
        -0.2201 * (age / 10 - 7.036)
        + 0.2467 * (male - 0.5642)
        - 0.5567 * (egfr / 5 - 7.222)
        + 0.4510 * (np.log(acr) - 5.137)
    )
    return 1 - 0.9750 ** np.exp(eta), 1 - 0.9240 ** np.exp(eta)


def _study() -> tuple[pl.DataFrame, pl.DataFrame, pl.DataFrame]:
    index = dt.date(2020, 1, 1)
    cohort = pl.DataFrame(
        {
            "patient_id": ["a", "b", "c", "d", "e"],
            "sex": ["male", "female", "male", "female", "male"],
            "age_at_index": [70.0, 55.0, 64.0, 16.0, 80.0],
            "index_date": [index] * 5,
            "group": ["x", "x", "y", "y", "y"],
            "kfrt_date": [None, None, None, None, dt.date(2019, 6, 1)],
        }
    )
    egfr = pl.DataFrame(
        {
            "patient_id": ["a", "a", "b", "c", "d", "e", "a"],
            "equation": ["eq"] * 7,
            # a: the latest value before index (30) is used, not the later one (20)
            "years_from_index": [-0.5, -0.1, -0.2, -0.3, -0.2, -0.1, 0.5],
            "egfr": [35.0, 30.0, 45.0, 75.0, 40.0, 12.0, 20.0],
        }
    )
    labs = pl.DataFrame(
        {
            "patient_id": ["a", "b", "c", "d", "e", "b"],
            "analyte": ["uacr"] * 6,
            "value": [300.0, 40.0, 10.0, 100.0, 900.0, 80.0],
            # b: the result two years before index is outside the look-back year
            "sample_date": [
                dt.date(2019, 11, 1),
                dt.date(2019, 12, 1),
                dt.date(2019, 10, 1),
                dt.date(2019, 9, 1),
                dt.date(2019, 12, 20),
                dt.date(2018, 1, 1),
            ],
        }
    )
    return egfr, labs, cohort


def test_kfre_at_baseline_values_and_applicability() -> None:
    egfr, labs, cohort = _study()
    out = kfre_at_baseline(egfr, labs, cohort, equation="eq")
    rows = {r["patient_id"]: r for r in out.to_dicts()}
    assert out["patient_id"].to_list() == ["a", "b", "c", "d", "e"]
    assert out["group"].to_list() == ["x", "x", "y", "y", "y"]
    two, five = _by_hand(70.0, 1, 30.0, 300.0)
    assert rows["a"]["kfre_2y"] == pytest.approx(two, rel=1e-12)
    assert rows["a"]["kfre_5y"] == pytest.approx(five, rel=1e-12)
    two, five = _by_hand(55.0, 0, 45.0, 40.0)
    assert rows["b"]["kfre_2y"] == pytest.approx(two, rel=1e-12)
    assert rows["b"]["uacr_mg_g"] == 40.0  # the 2018 result is outside the look-back
    assert rows["c"]["kfre_reason"] == "egfr_not_below_60"
    assert rows["d"]["kfre_reason"] == "not_adult"
    # already on kidney replacement therapy at index: the equation does not apply
    assert rows["e"]["kfre_reason"] == "on_kfrt_at_baseline" and rows["e"]["kfre_2y"] is None
    assert [rows[p]["kfre_applicable"] for p in "abcde"] == [True, True, False, False, False]


def test_kfre_at_baseline_partition_rule() -> None:
    egfr, labs, cohort = _study()
    whole = kfre_at_baseline(egfr, labs, cohort, equation="eq")
    parts = []
    for ids in (["a", "c"], ["b", "d", "e"]):
        keep = pl.col("patient_id").is_in(ids)
        parts.append(
            kfre_at_baseline(
                egfr.filter(keep), labs.filter(keep), cohort.filter(keep), equation="eq"
            )
        )
    merged = pl.concat(parts).sort("patient_id")
    assert merged.equals(whole.sort("patient_id"))


def _rows(n_ok: dict[str, int], n_high: dict[str, int], seed: int = 3) -> pl.DataFrame:
    """Per group: n_ok applicable patients (of them n_high with 2-year risk 0.2), the
    rest at 0.01; plus 30 patients per group with eGFR >= 60."""
    rng = np.random.default_rng(seed)
    frames = []
    for group, n in n_ok.items():
        risk2 = np.r_[np.full(n_high[group], 0.2), rng.uniform(0.001, 0.05, n - n_high[group])]
        frames.append(
            pl.DataFrame(
                {
                    "patient_id": [f"{group}{i}" for i in range(n + 30)],
                    "group": [group] * (n + 30),
                    "kfre_2y": [*risk2, *[None] * 30],
                    "kfre_5y": [*(risk2 * 2.5), *[None] * 30],
                    "kfre_reason": [*[None] * n, *["egfr_not_below_60"] * 30],
                },
                schema_overrides={"kfre_2y": pl.Float64, "kfre_5y": pl.Float64},
            )
        )
    return pl.concat(frames)


def _cell(table: pl.DataFrame, characteristic: str, column: str) -> str:
    return table.filter(pl.col("characteristic") == characteristic)[column][0]


def test_kfre_summary_counts_percentages_and_quartiles() -> None:
    rows = _rows({"x": 40, "y": 60}, {"x": 12, "y": 20})
    table = kfre_summary_table(rows)
    assert table.columns == ["characteristic", "statistic", "level", "x", "y", "Overall"]
    assert _cell(table, "N", "x") == "70" and _cell(table, "N", "Overall") == "160"
    assert _cell(table, "KFRE applicable", "y") == "60 (66.7%)"
    assert _cell(table, "KFRE not applicable", "Overall") == "60 (37.5%)"
    assert _cell(table, "2-year kidney failure risk >= 10 %", "x") == "12 (30.0%)"
    assert _cell(table, "2-year kidney failure risk >= 40 %", "Overall") == "0 (0.0%)"
    # median [Q1, Q3] in %, against numpy.percentile (linear interpolation)
    ok = rows.filter(pl.col("group") == "y")["kfre_2y"].drop_nulls().to_numpy() * 100
    q1, med, q3 = np.percentile(ok, [25, 50, 75])
    assert _cell(table, "2-year kidney failure risk, %", "y") == f"{med:.1f} [{q1:.1f}, {q3:.1f}]"


def test_kfre_summary_protects_small_cells_and_their_complements() -> None:
    # x: 5 applicable (a small count; its reason cell 30 would give it away as N - 30,
    # so that one is hidden too); 3 above 10 % in x, 20 in y
    rows = _rows({"x": 5, "y": 60}, {"x": 3, "y": 20})
    table = kfre_summary_table(rows)
    assert _cell(table, "KFRE applicable", "x") == "<11"
    assert _cell(table, "KFRE not applicable", "x") == "*"
    assert _cell(table, "2-year kidney failure risk, %", "x") == "<11"  # median of 5
    # the row of a hidden group cell: the other group's cell is hidden as well, since
    # Overall - y would reveal x
    assert _cell(table, "2-year kidney failure risk >= 10 %", "x") == "<11"
    assert _cell(table, "2-year kidney failure risk >= 10 %", "y") == "*"
    assert _cell(table, "2-year kidney failure risk >= 10 %", "Overall") == "23 (35.4%)"
    # no printed count from 1 to 10 anywhere
    counts = table.filter(pl.col("statistic") != "median [Q1, Q3]")
    for column in ("x", "y", "Overall"):
        numbers = counts[column].str.extract(r"^(\d+)", 1).cast(pl.Int64).drop_nulls()
        assert not numbers.is_between(1, 10).any()
    # suppression switched off prints everything
    plain = kfre_summary_table(rows, table_rule=TableRule(small_cell_threshold=0))
    assert _cell(plain, "KFRE applicable", "x") == "5 (14.3%)"


def test_kfre_summary_without_groups_and_bad_input() -> None:
    rows = _rows({"x": 40}, {"x": 12}).drop("group")
    table = kfre_summary_table(rows)
    assert table.columns == ["characteristic", "statistic", "level", "Overall"]
    with pytest.raises(ConfigError, match=r"KfreRule\.thresholds_2y: 10.0 is not a fraction"):
        KfreRule(thresholds_2y=[10])
    with pytest.raises(InputDataError, match="kfre_5y"):
        kfre_summary_table(rows.drop("kfre_5y"))
    with pytest.raises(InputDataError, match="unknown code 'egfr_high'"):
        kfre_summary_table(rows.with_columns(kfre_reason=pl.lit("egfr_high")))


def test_kdigo_grid_counts_every_cell_with_its_risk() -> None:
    categories = pl.DataFrame(
        {
            "patient_id": list("abcdef"),
            "g_category": ["G1", "G1", "G3a", "G4", None, "G2"],
            "a_category": ["A1", "A1", "A2", "A3", "A1", None],
        }
    )
    grid = kdigo_grid_counts(categories)
    assert grid.height == 18 and int(grid["n"].sum()) == 4  # both categories known
    cell = {(g, a): (n, r) for g, a, n, r in grid.rows()}
    # KDIGO 2012 Figure 2 colours: G1 A1 green, G3a A2 orange, G4 A3 red, G2 A2 yellow
    assert cell[("G1", "A1")] == (2, "low")
    assert cell[("G3a", "A2")] == (1, "high")
    assert cell[("G4", "A3")] == (1, "very_high")
    assert cell[("G2", "A2")] == (0, "moderately_increased")


def test_kfre_summary_protection_runs_without_polars_deprecations(
    capfd: pytest.CaptureFixture[str],
) -> None:
    # polars prints this deprecation from its engine (not as a Python warning), and a
    # run records it among the warnings a reader of the report sees
    kfre_summary_table(_rows({"x": 5, "y": 60}, {"x": 3, "y": 20}))
    assert "DeprecationWarning" not in capfd.readouterr().err
