"""Reading a run folder through its contract: tables by name, the manifest, study facts.

Figures, the report and users' own code read a finished run with :class:`RunFolder`
instead of opening files by literal name; the settings a reader needs (the small-cell
threshold, the spline knot, the rapid-decline rate) come from the resolved config held in
the manifest, validated by the same rule models the steps used.
"""

from __future__ import annotations

from functools import cached_property
from pathlib import Path
from typing import Final

import polars as pl

from kidneycohort.errors import InputDataError, did_you_mean
from kidneycohort.run_folder._layout import FILES
from kidneycohort.run_folder._manifest import Manifest, read_manifest

__all__ = ["FLOW_STEPS", "RunFolder"]

# Per-patient files that carry the group column a run adds, in the order they are tried.
_GROUPED = ("baseline", "slopes", "endpoints", "egfr")

FLOW_STEPS: Final = ("enrolled", "with lab results", "with eGFR", "with a baseline (analysed)")
"""Steps of the patient flow, each a subset of the one before."""


class RunFolder:
    """A finished (or partly written) run folder, read through its contract.

    Parameters
    ----------
    path
        The run folder.
    manifest
        The manifest of a run still being written (the runner hands it to the steps
        that read the folder, because ``manifest.json`` is written only at the end);
        by default the folder's ``manifest.json``.

    Raises
    ------
    InputDataError
        When ``path`` is not a folder, or its manifest is not valid.

    Examples
    --------
    >>> import tempfile
    >>> run = RunFolder(tempfile.mkdtemp())
    >>> run.has("egfr"), run.small_cell_threshold
    (False, 10)
    """

    def __init__(self, path: str | Path, *, manifest: Manifest | None = None) -> None:
        self.path = Path(path)
        if not self.path.is_dir():
            raise InputDataError(f"run_dir: '{self.path}' is not a folder; pass the run folder")
        self.manifest: Manifest = manifest or read_manifest(self.path) or Manifest()

    # ---- tables ------------------------------------------------------------------------
    def _data_file(self, name: str) -> Path:
        entry = FILES.get(name)
        if entry is None:
            raise InputDataError(
                f"run folder: no file is declared for table '{name}'{did_you_mean(name, FILES)}"
            )
        parquet = [f for f in entry.files if f.endswith(".parquet")]
        return self.path / (parquet[0] if parquet else entry.files[0])

    def has(self, name: str) -> bool:
        """Whether the run wrote table ``name``."""
        return name in FILES and self._data_file(name).is_file()

    def scan(self, name: str) -> pl.LazyFrame:
        """Table ``name`` as a lazy frame (CSV files are read as text, without the quote
        :func:`~kidneycohort.run_folder.csv_safe` puts before formula-like text)."""
        path = self._data_file(name)
        if not path.is_file():
            raise InputDataError(f"run folder: '{path.name}' was not written by this run")
        if path.suffix == ".parquet":
            return pl.scan_parquet(path)
        # text cells as written before the CSV writer's guard against formulas (a quote
        # before a leading = + - @): the report prints "-4.58 to -3.84", not "'-4.58 ..."
        return pl.scan_csv(path, infer_schema=False).with_columns(
            pl.all().str.replace(r"^'([=+\-@\t\r])", "$1")
        )

    def table(self, name: str, columns: list[str] | None = None) -> pl.DataFrame:
        """Table ``name`` (only ``columns`` when given)."""
        frame = self.scan(name)
        return (frame.select(columns) if columns else frame).collect()

    def table_or_none(self, name: str) -> pl.DataFrame | None:
        """Table ``name``, or None when the run did not write it."""
        return self.table(name) if self.has(name) else None

    # ---- study facts and settings --------------------------------------------------------
    @property
    def primary_equation(self) -> str | None:
        """The study's primary eGFR equation."""
        return self.manifest.study.primary_equation

    @property
    def seed(self) -> int:
        """The study seed (sampling of patients drawn in figures)."""
        return self.manifest.seed

    @cached_property
    def small_cell_threshold(self) -> int:
        """Counts of people from 1 to this are not shown (``tables.small_cell_threshold``)."""
        from kidneycohort.tables import TableRule

        return TableRule.model_validate(self.manifest.section("tables")).small_cell_threshold

    @cached_property
    def knot_years(self) -> float | None:
        """The slope model's knot, when the run fitted a two-slope model."""
        if "slope_model" not in self.manifest.config:
            return None
        from kidneycohort.models.mixed import SlopeModelRule

        return SlopeModelRule.model_validate(self.manifest.section("slope_model")).knot_years

    @cached_property
    def rapid_decline_slope(self) -> float:
        """The slope (negative, per year) below which decline is rapid (``slopes``)."""
        from kidneycohort.slopes import SlopeRule

        rule = SlopeRule.model_validate(self.manifest.section("slopes"))
        return -abs(float(rule.rapid_decline_per_year))

    # ---- derived views -------------------------------------------------------------------
    def patient_groups(self) -> pl.DataFrame | None:
        """``patient_id``, ``group`` from the first per-patient file that has both."""
        for name in _GROUPED:
            if not self.has(name):
                continue
            frame = self.scan(name)
            if "group" in frame.collect_schema().names():
                return (
                    frame.select(
                        pl.col("patient_id").cast(pl.String), pl.col("group").cast(pl.String)
                    )
                    .unique("patient_id", keep="first")
                    .collect()
                )
        return None

    def group_labels(self) -> set[str]:
        """Every group label the run's per-patient and model files use."""
        labels: set[str] = set()
        groups = self.patient_groups()
        if groups is not None:
            labels |= set(groups["group"].drop_nulls().to_list())
        for name in ("models/survival_curves", "models/trajectories"):
            if self.has(name):
                labels |= set(
                    self.table(name, ["group"])["group"].drop_nulls().cast(pl.String).to_list()
                )
        return labels

    def printed_patient_flow(self) -> dict[str, str]:
        """The patient flow as every shared output prints it: small counts, and counts
        whose difference from the step before is small, protected
        (:func:`kidneycohort.disclosure.protected_flow`); a step equal to the baseline
        table's overall N stays shown, as the table prints it."""
        from kidneycohort.disclosure import protected_flow

        flow = self.patient_flow(self.primary_equation)
        shown = []
        if self.has("tables/baseline_characteristics"):
            table = self.table("tables/baseline_characteristics")
            if {"characteristic", "Overall"} <= set(table.columns):
                n_row = table.filter(pl.col("characteristic") == "N")
                overall = n_row["Overall"][0] if n_row.height else None
                shown = [k for k, v in flow.items() if str(v) == overall]
        return protected_flow(flow, self.small_cell_threshold, shown_elsewhere=shown)

    def patient_flow(self, equation: str | None = None) -> dict[str, int]:
        """Patient counts of the attrition flow, from the patients enrolled (the patients
        table) to those analysed; lab rows of unknown patient ids are a data defect
        counted in the row accounting, not patients."""
        by_group = self.patient_flow_by_group(equation)
        if by_group.is_empty():
            return {}
        totals = by_group.group_by("step", maintain_order=True).agg(pl.col("n").sum())
        return dict(zip(totals["step"].to_list(), totals["n"].to_list(), strict=True))

    def patient_flow_by_group(self, equation: str | None = None) -> pl.DataFrame:
        """``group``, ``step``, ``n``: per group, the patients enrolled, with lab results,
        with eGFR (by ``equation``) and with a baseline eGFR (analysed), in that order.
        Empty when the run has no per-patient file with groups."""
        groups = self.patient_groups()
        if groups is None:
            for name in _GROUPED:
                if self.has(name):
                    groups = (
                        self.scan(name)
                        .select(pl.col("patient_id").cast(pl.String), group=pl.lit(None, pl.String))
                        .unique("patient_id")
                        .collect()
                    )
                    break
        if groups is None:
            return pl.DataFrame(schema={"group": pl.String, "step": pl.String, "n": pl.Int64})
        flags = [pl.lit(True).alias(FLOW_STEPS[0])]
        frame = groups.lazy()
        for step, name, value in (
            (FLOW_STEPS[1], "labs", None),
            (FLOW_STEPS[2], "egfr", "egfr"),
            (FLOW_STEPS[3], "baseline", "baseline_egfr"),
        ):
            if not self.has(name):
                continue
            scan = self.scan(name)
            if value is not None:
                scan = scan.filter(pl.col(value).is_not_null() & pl.col(value).is_not_nan())
                if equation is not None:
                    scan = scan.filter(pl.col("equation") == equation)
            ids = scan.select(pl.col("patient_id").cast(pl.String)).unique()
            frame = frame.join(
                ids.with_columns(**{step: pl.lit(True)}), on="patient_id", how="left"
            )
            flags.append(pl.col(step).fill_null(False))
        wide = (
            frame.select(pl.col("group").fill_null("no group"), *flags)
            .group_by("group")
            .agg(pl.all().sum())
            .sort("group")
            .collect()
        )
        return wide.unpivot(index="group", variable_name="step", value_name="n").with_columns(
            pl.col("n").cast(pl.Int64)
        )
