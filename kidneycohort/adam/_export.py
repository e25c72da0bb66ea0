"""Write ADaM datasets as SAS transport v5 and Dataset-JSON v1.1, with a spec sheet.

``write_adam(datasets, folder)`` writes ``<name>.xpt`` and ``<name>.json`` per dataset
(lower-case names, as submissions do) and ``spec.csv``, the variable-level
specification (:func:`kidneycohort.adam.spec_sheet`). Each XPT file is read back with
``pandas.read_sas`` and compared with the dataset before the export counts as done.
"""

from __future__ import annotations

import datetime as dt
import logging
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import polars as pl

from kidneycohort.adam._metadata import AdamDataset, spec_sheet
from kidneycohort.errors import InputDataError
from kidneycohort.io.cdisc_files import sas_date, write_dataset_json, write_xpt
from kidneycohort.run_folder import write_csv

__all__ = ["check_xpt_round_trip", "read_back_xpt", "write_adam"]

logger = logging.getLogger(__name__)

# pandas reads an IBM-format zero as 5.397605e-79 (pandas issue #50670); values this
# small are read back as the zero they are.
_IBM_ZERO_AS_READ = 1e-78


def read_back_xpt(path: Path, dataset: AdamDataset) -> pl.DataFrame:
    """The XPT file as pandas reads it, typed like ``dataset`` (dates from SAS numbers)."""
    import pandas as pd

    data = pl.from_pandas(pd.read_sas(path, format="xport", encoding="utf-8"))
    exprs = []
    for v in dataset.variables:
        column = pl.col(v.name)
        if v.kind == "text":
            exprs.append(pl.when(column.str.strip_chars() != "").then(column).alias(v.name))
            continue
        number = pl.when(column.abs() < _IBM_ZERO_AS_READ).then(0.0).otherwise(column)
        if v.kind == "date":
            exprs.append(sas_date(number).alias(v.name))
        elif v.kind == "integer":
            exprs.append(number.round(0).cast(pl.Int64).alias(v.name))
        else:
            exprs.append(number.alias(v.name))
    return data.select(exprs)


def check_xpt_round_trip(path: Path, dataset: AdamDataset) -> None:
    """Raise :class:`InputDataError` when pandas reads ``path`` back differently.

    Text must match exactly up to trailing blanks (SAS pads text with blanks and stores
    missing text as blank, read back as missing); numbers to a relative 1e-12 (IBM
    hexadecimal floating point keeps 53-56 bits).
    """
    got = read_back_xpt(path, dataset)
    texts = [v.name for v in dataset.variables if v.kind == "text"]
    want = dataset.data.with_columns(
        pl.when(pl.col(c).str.strip_chars_end() != "").then(pl.col(c).str.strip_chars_end())
        for c in texts
    )
    if got.height != want.height or got.columns != want.columns:
        raise InputDataError(
            f"{path.name}: read back {got.height} rows x {got.width} columns, wrote "
            f"{want.height} x {want.width}"
        )
    for v in dataset.variables:
        a, b = got[v.name], want[v.name]
        if v.kind == "float":
            x, y = a.to_numpy(), b.to_numpy()
            same = np.isclose(x, y, rtol=1e-12, atol=0.0, equal_nan=True)
        else:
            same = ((a == b) | (a.is_null() & b.is_null())).fill_null(False).to_numpy()
        if not same.all():
            row = int(np.flatnonzero(~same)[0])
            raise InputDataError(
                f"{path.name}: {v.name} row {row + 1} reads back as {a[row]!r}, written {b[row]!r}"
            )


def write_adam(
    datasets: Sequence[AdamDataset],
    folder: Path,
    *,
    study_oid: str = "",
    created: dt.datetime | None = None,
    source_version: str = "",
) -> list[Path]:
    """Write each dataset as XPT and Dataset-JSON plus ``spec.csv``; returns the files."""
    folder.mkdir(parents=True, exist_ok=True)
    files: list[Path] = []
    for ds in datasets:
        xpt = folder / f"{ds.name.lower()}.xpt"
        write_xpt(ds.data, xpt, name=ds.name, label=ds.label, variables=ds.variables)
        check_xpt_round_trip(xpt, ds)
        files.append(xpt)
        files.append(
            write_dataset_json(
                ds.data,
                folder / f"{ds.name.lower()}.json",
                name=ds.name,
                label=ds.label,
                variables=ds.variables,
                keys=ds.keys,
                study_oid=study_oid,
                created=created,
                source_version=source_version,
            )
        )
    spec = folder / "spec.csv"
    write_csv(spec_sheet(datasets), spec)
    files.append(spec)
    logger.info("ADaM: %s written to %s", ", ".join(d.name for d in datasets), folder)
    return files
