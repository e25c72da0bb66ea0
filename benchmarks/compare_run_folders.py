"""Compare the data files of two run folders: same tables, same rows, same values.

Usage::

    python benchmarks/compare_run_folders.py RUN_A RUN_B [--rtol 1e-9]

Every ``*.parquet`` and ``*.csv`` file (and ``tables/*.md``) of either folder is read
from both; a file must exist in both with the same columns, types and row count, text,
integer, boolean and date columns equal exactly (rows in the same order), and float
columns equal to ``rtol`` (relative to max(1, |value|); NaN equals NaN, null equals
null). Figures, the report, the manifest, the log and ``warnings.txt`` are not
compared (they hold times, memory and drawings). Prints one line per file and exits 1
when any file differs.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np
import polars as pl


def read(path: Path) -> pl.DataFrame:
    if path.suffix == ".parquet":
        return pl.read_parquet(path)
    return pl.read_csv(path, infer_schema_length=0)  # text: compared exactly, as written


def compare_frames(a: pl.DataFrame, b: pl.DataFrame, rtol: float) -> tuple[bool, str]:
    if a.columns != b.columns:
        return False, f"columns {a.columns} vs {b.columns}"
    if a.dtypes != b.dtypes:
        return False, f"types {a.dtypes} vs {b.dtypes}"
    if a.height != b.height:
        return False, f"rows {a.height} vs {b.height}"
    worst = 0.0
    for name in a.columns:
        x, y = a[name], b[name]
        if x.dtype.is_float():
            xv, yv = x.to_numpy().astype(float), y.to_numpy().astype(float)
            same_missing = np.isnan(xv) == np.isnan(yv)
            if not same_missing.all():
                return False, f"{name}: missing values differ"
            ok = ~np.isnan(xv)
            if ok.any():
                rel = np.abs(xv[ok] - yv[ok]) / np.maximum(1.0, np.abs(yv[ok]))
                worst = max(worst, float(rel.max()))
        elif not x.equals(y, check_names=False):
            return False, f"{name}: values differ"
    if worst > rtol:
        return False, f"largest relative float difference {worst:.1e} > {rtol:g}"
    return True, f"equal (largest relative float difference {worst:.1e})"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("run_a", type=Path)
    parser.add_argument("run_b", type=Path)
    parser.add_argument("--rtol", type=float, default=1e-9)
    args = parser.parse_args()
    names = set()
    for run in (args.run_a, args.run_b):
        for pattern in ("**/*.parquet", "**/*.csv", "tables/*.md"):
            names |= {p.relative_to(run).as_posix() for p in run.glob(pattern)}
    failed = 0
    for name in sorted(names):
        a, b = args.run_a / name, args.run_b / name
        if not (a.exists() and b.exists()):
            ok, text = False, f"only in {'A' if a.exists() else 'B'}"
        elif name.endswith(".md"):
            ok = a.read_text(encoding="utf-8") == b.read_text(encoding="utf-8")
            text = "identical text" if ok else "text differs"
        else:
            ok, text = compare_frames(read(a), read(b), args.rtol)
        failed += not ok
        print(f"{'ok  ' if ok else 'DIFF'} {name}: {text}")
    print(f"{len(names)} files compared, {failed} differ")
    sys.exit(1 if failed else 0)


if __name__ == "__main__":
    main()
