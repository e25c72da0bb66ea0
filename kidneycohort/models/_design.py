"""Shared pieces of the model fits: covariate encoding, complete cases, warning capture."""

from __future__ import annotations

import sys
import warnings
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field

import polars as pl

from kidneycohort._frames import FrameLike, require_columns, to_polars
from kidneycohort.errors import InputDataError, did_you_mean

__all__ = [
    "WHOLE_COHORT",
    "CapturedWarnings",
    "capture_warnings",
    "encode_covariates",
    "one_equation",
    "split_complete_cases",
    "with_group",
]

_CONVERGENCE_WORDS = ("converge", "boundary", "hessian", "singular", "positive definite", "delta")


def encode_covariates(
    frame: pl.DataFrame, covariates: Sequence[str], table: str
) -> tuple[pl.DataFrame, list[str]]:
    """Numeric model columns for ``covariates``: numbers as they are, booleans as 0/1,
    text or categorical columns as 0/1 indicators of each level but the first (sorted),
    named ``column=level``. Returns the encoded frame and the term names in order."""
    columns: list[pl.Series] = []
    names: list[str] = []
    for name in covariates:
        if name not in frame.columns:
            raise InputDataError(
                f"{table}: covariate '{name}' is not a column{did_you_mean(name, frame.columns)}; "
                "name a column of the patients table"
            )
        dtype = frame.schema[name]
        series = frame[name]
        if dtype.is_numeric():
            columns.append(series.cast(pl.Float64).alias(name))
            names.append(name)
        elif dtype == pl.Boolean:
            columns.append(series.cast(pl.Float64).alias(name))
            names.append(name)
        elif dtype in (pl.String, pl.Categorical) or isinstance(dtype, pl.Enum):
            levels = sorted(series.drop_nulls().cast(pl.String).unique().to_list())
            text = series.cast(pl.String)
            for level in levels[1:]:
                term = f"{name}={level}"
                columns.append((text == level).cast(pl.Float64).alias(term))
                names.append(term)
        else:
            raise InputDataError(
                f"{table}: covariate '{name}' has type {dtype}; use a number, boolean or text column"
            )
    return pl.DataFrame(columns) if columns else pl.DataFrame(), names


def split_complete_cases(
    frame: pl.DataFrame, columns: Sequence[str]
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Rows with every ``columns`` value present, and the others with a reason code
    ``missing_<column>`` (first missing column) for the model's exclusion report."""
    if not columns:
        return frame, pl.DataFrame(schema={"patient_id": pl.String, "reason": pl.String})
    reason = pl.lit(None, dtype=pl.String)
    for name in reversed(columns):
        missing = pl.col(name).is_null()
        if frame.schema[name].is_float():
            missing = missing | pl.col(name).is_nan()
        reason = pl.when(missing).then(pl.lit(f"missing_{name}")).otherwise(reason)
    marked = frame.with_columns(reason.alias("_reason"))
    kept = marked.filter(pl.col("_reason").is_null()).drop("_reason")
    dropped = marked.filter(pl.col("_reason").is_not_null()).select(
        pl.col("patient_id").cast(pl.String), pl.col("_reason").alias("reason")
    )
    return kept, dropped


@dataclass
class CapturedWarnings:
    """Warnings raised inside :func:`capture_warnings`: convergence messages are kept for
    the caller to act on; every other warning is re-issued unchanged on exit."""

    convergence: list[str] = field(default_factory=list)


def _is_convergence(record: warnings.WarningMessage) -> bool:
    category = record.category.__name__.lower()
    if "convergence" in category:
        return True
    if category in ("statisticalwarning", "approximationwarning"):
        return any(word in str(record.message).lower() for word in _CONVERGENCE_WORDS)
    return False


def _module_of(filename: str) -> str | None:
    for name, module in list(sys.modules.items()):
        if getattr(module, "__file__", None) == filename:
            return name
    return None


def _first_statement(message: str) -> str:
    """The first line of a library's warning, without a trailing sentence that
    introduces code it goes on to show (``"For example, try the following code:"``)."""
    line = message.strip().splitlines()[0].strip() if message.strip() else ""
    if line.endswith(":"):
        head, _, _ = line.rpartition(". ")
        line = f"{head}." if head else line.rstrip(":")
    return line


@contextmanager
def capture_warnings() -> Iterator[CapturedWarnings]:
    """Record warnings of a statsmodels / lifelines fit so that convergence problems are
    turned into our own :class:`~kidneycohort.errors.StatisticalWarning` deliberately."""
    captured = CapturedWarnings()
    with warnings.catch_warnings(record=True) as records:
        warnings.simplefilter("always")
        yield captured
    for record in records:
        if _is_convergence(record):
            captured.convergence.append(_first_statement(str(record.message)))
        else:
            warnings.warn_explicit(
                record.message,
                record.category,
                record.filename,
                record.lineno,
                module=_module_of(record.filename),
            )


WHOLE_COHORT = "all"
"""The one group of an analysis without a group column."""


def with_group(
    endpoints: FrameLike, patients: FrameLike | None, group_column: str | None
) -> pl.DataFrame:
    """Validated endpoint rows with a ``group`` column (``"all"`` without a group column):
    the group of the endpoints table, else of the patients table."""
    frame = to_polars(endpoints, "endpoints")
    require_columns(frame, ("patient_id", "endpoint", "years", "event"), "endpoints")
    if group_column is None:
        frame = frame.with_columns(pl.lit(WHOLE_COHORT).alias("group"))
    elif group_column in frame.columns:
        frame = frame.with_columns(pl.col(group_column).cast(pl.String).alias("group"))
    elif patients is not None:
        people = to_polars(patients, "patients")
        require_columns(people, ("patient_id", group_column), "patients")
        duplicated = people.filter(pl.col("patient_id").is_duplicated())
        if duplicated.height:
            raise InputDataError(
                f"patients: patient_id '{duplicated['patient_id'][0]}' appears more than once; "
                "give one row per patient"
            )
        frame = frame.drop("group", strict=False).join(
            people.select(
                pl.col("patient_id").cast(frame.schema["patient_id"]),
                pl.col(group_column).cast(pl.String).alias("group"),
            ),
            on="patient_id",
            how="left",
        )
    else:
        frame = frame.with_columns(pl.lit(WHOLE_COHORT).alias("group"))
    missing_group = frame.filter(pl.col("group").is_null())
    if missing_group.height:
        raise InputDataError(
            f"endpoints: patient '{missing_group['patient_id'][0]}' has no '{group_column}' "
            f"({missing_group.height} rows); add the patient to patients or fill its group"
        )
    bad_years = frame.filter(
        pl.col("years").is_null() | ~pl.col("years").is_finite() | (pl.col("years") < 0)
    )
    if bad_years.height:
        raise InputDataError(
            f"endpoints: column 'years' of patient '{bad_years['patient_id'][0]}' is "
            f"{bad_years['years'][0]} ({bad_years.height} rows); follow-up must be a "
            "non-negative number of years"
        )
    bad_event = frame.filter(
        ~pl.col("event").cast(pl.Int64, strict=False).is_in([0, 1]) | pl.col("event").is_null()
    )
    if bad_event.height:
        raise InputDataError(
            f"endpoints: column 'event' of patient '{bad_event['patient_id'][0]}' is "
            f"{bad_event['event'][0]!r}; expected 1 (event) or 0 (censored)"
        )
    return frame.with_columns(pl.col("event").cast(pl.Int8))


def one_equation(values: pl.DataFrame, equation: str | None) -> pl.DataFrame:
    """The eGFR rows of ``equation`` (needed when the table holds several)."""
    require_columns(values, ("patient_id", "years_from_index", "egfr"), "egfr")
    if "equation" not in values.columns:
        return values
    equations = sorted(values["equation"].drop_nulls().unique().to_list())
    if equation is not None:
        if equation not in equations:
            raise InputDataError(
                f"egfr: equation '{equation}' is not in the table (equations: "
                f"{equations}){did_you_mean(equation, equations)}"
            )
        return values.filter(pl.col("equation") == equation)
    if len(equations) > 1:
        raise InputDataError(
            f"egfr: the table holds {len(equations)} equations {equations}; pass "
            "equation=... to model one"
        )
    return values
