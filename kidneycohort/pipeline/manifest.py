"""``manifest.json``: what was run, on what, with which software, and where rows went."""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import platform
from collections.abc import Iterable, Mapping, Sequence
from importlib import metadata
from pathlib import Path
from typing import Any

from kidneycohort.schemas import SCHEMA_VERSION

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


def build_manifest(
    *,
    config: Mapping[str, Any],
    overrides: Sequence[str],
    inputs: Sequence[Mapping[str, Any]],
    seed: int,
    accounting: Sequence[Mapping[str, Any]],
    accounting_by_reason: Sequence[Mapping[str, Any]],
    merged_by_reason: Sequence[Mapping[str, Any]] = (),
    steps: Sequence[Mapping[str, Any]],
    warnings: Sequence[str],
    study: Mapping[str, Any],
    created_utc: dt.datetime | None = None,
    run_id: str = "",
) -> dict[str, Any]:
    """Assemble the manifest mapping in the run-folder contract's key order.

    ``accounting_by_reason`` lists rejected rows only (they add up to ``rows_rejected``);
    ``merged_by_reason`` lists rows merged into another (they add up to ``rows_merged``).
    ``outputs`` is left empty here; the runner fills it from :func:`output_records` once
    every file is written. ``run_id`` identifies the run (e.g. in a results database).
    """
    created = created_utc or dt.datetime.now(dt.UTC)
    return {
        "schema_version": SCHEMA_VERSION,
        "kidneycohort_version": _own_version(),
        "created_utc": created.strftime("%Y-%m-%dT%H:%M:%SZ"),
        "run_id": run_id,
        "config": dict(config),
        "overrides": list(overrides),
        "inputs": [dict(i) for i in inputs],
        "packages": package_versions(),
        "seed": seed,
        "accounting": [dict(a) for a in accounting],
        "accounting_by_reason": [dict(a) for a in accounting_by_reason],
        "merged_by_reason": [dict(a) for a in merged_by_reason],
        "steps": [dict(s) for s in steps],
        "warnings": list(warnings),
        "study": dict(study),
        "outputs": [],
    }


# Files of a run folder that are not outputs: the manifest itself and the log.
_NOT_OUTPUTS = ("manifest.json", "run.log")


def output_records(run_dir: Path) -> list[dict[str, Any]]:
    """Manifest ``outputs``: every file of the run folder, with rows and SHA-256 of data.

    Parquet and CSV files (the data, byte-identical for the same inputs) get ``rows``
    and ``sha256``; figures, the report and the workbook are listed by name and size.
    """
    import polars as pl

    run = Path(run_dir)
    records: list[dict[str, Any]] = []
    for path in sorted(p for p in run.rglob("*") if p.is_file()):
        rel = path.relative_to(run).as_posix()
        if rel in _NOT_OUTPUTS or path.name.startswith("."):
            continue
        record: dict[str, Any] = {"file": rel, "bytes": path.stat().st_size}
        if path.suffix == ".parquet":
            record["rows"] = int(pl.scan_parquet(path).select(pl.len()).collect().item())
            record["sha256"] = sha256_of(path)
        elif path.suffix == ".csv":
            scan = pl.scan_csv(path, infer_schema=False)
            record["rows"] = int(scan.select(pl.len()).collect().item())
            record["sha256"] = sha256_of(path)
        records.append(record)
    return records


def write_manifest(run_dir: Path, manifest: Mapping[str, Any]) -> Path:
    """Write ``manifest.json`` (sorted nowhere: the contract order is the reading order)."""
    path = Path(run_dir) / "manifest.json"
    path.write_text(json.dumps(manifest, indent=2, default=str) + "\n", encoding="utf-8")
    return path


def _own_version() -> str:
    try:
        return metadata.version("kidneycohort")
    except metadata.PackageNotFoundError:  # running from a source tree without install
        from kidneycohort import __version__

        return __version__
