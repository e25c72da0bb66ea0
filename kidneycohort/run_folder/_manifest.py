"""``manifest.json``: what was run, on what, with which software, and where rows went.

:class:`Manifest` is the typed description of the file; the runner builds one, the
reader validates what it reads back, and figures and the report take their facts from
its fields instead of searching an untyped mapping.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import platform
from collections.abc import Iterable
from importlib import metadata
from pathlib import Path
from typing import Any

from pydantic import BaseModel, ConfigDict, Field, ValidationError

from kidneycohort.errors import InputDataError
from kidneycohort.schemas import SCHEMA_VERSION

__all__ = [
    "RECORDED_PACKAGES",
    "AccountingRecord",
    "ExecutionRecord",
    "InputRecord",
    "Manifest",
    "OutputRecord",
    "ReasonCount",
    "StepRecord",
    "StudyFacts",
    "output_records",
    "package_versions",
    "read_manifest",
    "sha256_of",
    "write_manifest",
]

# The packages whose versions can change a result; recorded in every manifest.
RECORDED_PACKAGES = (
    "kidneycohort",
    "polars",
    "pandas",
    "numpy",
    "scipy",
    "statsmodels",
    "lifelines",
    "plotnine",
    "matplotlib",
    "pydantic",
    "pyyaml",
    "pyarrow",
    "duckdb",
    "xlsxwriter",
    "jinja2",
)


class _Record(BaseModel):
    # records written by newer versions may carry more fields; they are kept
    model_config = ConfigDict(extra="allow", frozen=True)


class InputRecord(_Record):
    """One input: the config table it fed, its path (none for a database), SHA-256, rows.

    A database source records its engine, schemas and the name of the variable or
    service holding the connection (never the connection itself) as further fields.
    """

    table: str
    path: str | None = None
    sha256: str | None = None
    rows: int | None = None


class AccountingRecord(_Record):
    """Row accounting of one input table: read = used + rejected + merged."""

    table: str
    rows_read: int
    rows_used: int
    rows_rejected: int
    rows_merged: int


class ReasonCount(_Record):
    """Rows of one input table rejected (or merged) for one reason code."""

    table: str
    reason: str
    rows: int


class StepRecord(_Record):
    """One step of the run: its time, the rows it made and the memory peak while it ran.

    ``seconds`` is wall time; ``cpu_seconds`` the processor time of the whole process
    over the step (every thread, user and system), which a busy machine does not inflate.
    """

    name: str
    seconds: float
    rows_out: int | None = None
    peak_rss_mib: float | None = None
    cpu_seconds: float | None = None
    executor_seconds: float | None = Field(
        None,
        description="Spark engine: the step's per-patient part, seconds summed over the "
        "partition tasks (the driver's own time is `seconds`).",
    )
    executor_peak_rss_mib: float | None = Field(
        None, description="Spark engine: the highest peak of a task's Python worker process."
    )


class ExecutionRecord(_Record):
    """How the steps ran: the engine and, for Spark, the master and partition count."""

    engine: str = "polars"
    master: str | None = None
    partitions: int | None = None
    spark_version: str | None = None


class OutputRecord(_Record):
    """One file of the run folder: size, and rows and SHA-256 for data files."""

    file: str
    bytes: int
    rows: int | None = None
    sha256: str | None = None


class StudyFacts(_Record):
    """The study-wide facts every step read."""

    name: str = ""
    description: str | None = None
    recipe: str | None = None
    primary_equation: str | None = None
    equations: list[str] = Field(default_factory=list)


class Manifest(BaseModel):
    """The content of ``manifest.json`` (keys in the order they are written)."""

    model_config = ConfigDict(extra="allow")

    schema_version: str = SCHEMA_VERSION
    kidneycohort_version: str = ""
    created_utc: str = ""
    run_id: str = ""
    config: dict[str, Any] = Field(default_factory=dict)
    overrides: list[str] = Field(default_factory=list)
    inputs: list[InputRecord] = Field(default_factory=list)
    packages: dict[str, str] = Field(default_factory=dict)
    seed: int = 0
    accounting: list[AccountingRecord] = Field(default_factory=list)
    accounting_by_reason: list[ReasonCount] = Field(default_factory=list)
    merged_by_reason: list[ReasonCount] = Field(default_factory=list)
    steps: list[StepRecord] = Field(default_factory=list)
    warnings: list[str] = Field(default_factory=list)
    study: StudyFacts = Field(default_factory=StudyFacts)
    execution: ExecutionRecord = Field(default_factory=ExecutionRecord)
    outputs: list[OutputRecord] = Field(default_factory=list)

    def section(self, name: str) -> dict[str, Any]:
        """The resolved config section ``name`` ({} when the run had none)."""
        value = self.config.get(name)
        return dict(value) if isinstance(value, dict) else {}


def sha256_of(path: Path, chunk: int = 1 << 20) -> str:
    """Hex SHA-256 of a file, read in chunks (inputs can be large)."""
    digest = hashlib.sha256()
    with Path(path).open("rb") as handle:
        while block := handle.read(chunk):
            digest.update(block)
    return digest.hexdigest()


def package_versions(names: Iterable[str] = RECORDED_PACKAGES) -> dict[str, str]:
    """Installed versions of ``names`` (missing ones recorded as ``"not installed"``)."""
    out = {"python": platform.python_version()}
    for name in names:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out


def own_version() -> str:
    """The installed kidneycohort version (the source tree's when not installed)."""
    try:
        return metadata.version("kidneycohort")
    except metadata.PackageNotFoundError:  # running from a source tree without install
        from kidneycohort import __version__

        return __version__


def utc_now_text(now: dt.datetime | None = None) -> str:
    """``YYYY-MM-DDTHH:MM:SSZ`` of ``now`` (default: the current time)."""
    return (now or dt.datetime.now(dt.UTC)).strftime("%Y-%m-%dT%H:%M:%SZ")


# Files of a run folder that are not outputs: the manifest itself and the log.
_NOT_OUTPUTS = ("manifest.json", "run.log")


def output_records(run_dir: Path) -> list[OutputRecord]:
    """Manifest ``outputs``: every file of the run folder, with rows and SHA-256 of data.

    Parquet and CSV files (the data, byte-identical for the same inputs) get ``rows``
    and ``sha256``; figures, the report and the workbook are listed by name and size.
    """
    import polars as pl

    run = Path(run_dir)
    records: list[OutputRecord] = []
    for path in sorted(p for p in run.rglob("*") if p.is_file()):
        rel = path.relative_to(run).as_posix()
        if rel in _NOT_OUTPUTS or path.name.startswith("."):
            continue
        rows = sha = None
        if path.suffix == ".parquet":
            rows = int(pl.scan_parquet(path).select(pl.len()).collect().item())
            sha = sha256_of(path)
        elif path.suffix == ".csv":
            rows = int(pl.scan_csv(path, infer_schema=False).select(pl.len()).collect().item())
            sha = sha256_of(path)
        records.append(OutputRecord(file=rel, bytes=path.stat().st_size, rows=rows, sha256=sha))
    return records


def write_manifest(run_dir: Path, manifest: Manifest) -> Path:
    """Write ``manifest.json`` in the model's key order (the reading order)."""
    path = Path(run_dir) / "manifest.json"
    text = json.dumps(manifest.model_dump(mode="json"), indent=2, default=str)
    path.write_text(text + "\n", encoding="utf-8")
    return path


def read_manifest(run_dir: str | Path) -> Manifest | None:
    """The run folder's manifest, validated; None when the folder has none.

    Raises
    ------
    InputDataError
        When the file is not valid JSON or not a manifest.
    """
    path = Path(run_dir) / "manifest.json"
    if not path.is_file():
        return None
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
        return Manifest.model_validate(data)
    except json.JSONDecodeError as exc:
        raise InputDataError(
            f"{path.name}: not valid JSON ({exc.msg} at line {exc.lineno}); "
            "re-run the pipeline to rewrite it"
        ) from None
    except ValidationError as exc:
        where = ".".join(str(p) for p in exc.errors()[0]["loc"])
        raise InputDataError(
            f"{path.name}: not a kidneycohort manifest ({where}: {exc.errors()[0]['msg']})"
        ) from None
