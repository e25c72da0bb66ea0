"""Scale benchmark: 1,000,000 patients / ~12 M lab results read from an OMOP CDM in
PostgreSQL into canonical labs, beside the same rows read from Parquet.

Usage::

    eval "$(bash .ci/postgres_test_server.sh start)"     # or any server you may write to
    python benchmarks/omop_read_scale.py                    # 1 000 000 patients
    python benchmarks/omop_read_scale.py --patients 20000   # quick run
    python benchmarks/omop_read_scale.py --clients          # also compare Arrow clients

An invented OMOP database (made-up persons, the synthetic writer's small vocabulary with
invented concept ids) is generated with numpy, loaded into a fresh database of the server
named by ``KIDNEYCOHORT_TEST_POSTGRES_URI`` with psql's COPY, indexed like an OMOP
deployment, and the same lab rows are written as canonical Parquet. Each read then runs
in a fresh child process, so its peak memory (``ru_maxrss``) covers that read only:

* ``postgresql``: :func:`kidneycohort.io.omop.read_omop` (concept resolution, SQL
  selection, Arrow batches through ADBC, mapping to canonical raw labs);
* ``parquet``: :func:`kidneycohort.io.read_labs` on the canonical file, collected;
* with ``--clients`` (needs ``pip install connectorx 'psycopg[binary]'``): the
  measurement query alone through three Arrow-native PostgreSQL clients (ADBC, connectorx, psycopg ``COPY ... TO STDOUT`` into pyarrow's CSV reader),
  each to one Arrow table -- the measurement behind the choice of ADBC.

About 3 % of results are text in ``value_source_value`` with an empty number, 2 % carry
an operator concept, 1 % an unmapped unit (concept 0), 0.5 % belong to persons absent
from PERSON. Prints wall time and peak resident memory of each read.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
import uuid
from pathlib import Path

import numpy as np
import polars as pl

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from kidneycohort.io.omop._ddl import create_table_sql, index_sql  # noqa: E402
from kidneycohort.synthetic._omop_writer import _full, concept_table  # noqa: E402

URI_VARIABLE = "KIDNEYCOHORT_TEST_POSTGRES_URI"
CODES = {
    "creatinine": ("2160-0", "mg/dL"),
    "cystatin_c": ("33863-2", "mg/L"),
    "uacr": ("9318-7", "mg/g"),
}


def _ids(concepts: pl.DataFrame, vocabulary: str) -> dict[str, int]:
    rows = concepts.filter(pl.col("vocabulary_id") == vocabulary)
    return dict(zip(rows["concept_code"], rows["concept_id"], strict=True))


def generate(folder: Path, n_patients: int, per_patient: float, seed: int = 11) -> int:
    """Write CSV files of an invented OMOP CDM and the same labs as canonical Parquet."""
    rng = np.random.default_rng(seed)
    concepts = concept_table()
    loinc, ucum = _ids(concepts, "LOINC"), _ids(concepts, "UCUM")
    genders, operators = _ids(concepts, "Gender"), _ids(concepts, "Meas Value Operator")
    person_id = np.arange(1, n_patients + 1)
    birth = np.datetime64("1930-01-01") + rng.integers(0, 365 * 70, n_patients)
    start = np.datetime64("2015-01-01") + rng.integers(0, 365 * 3, n_patients)
    tables = {
        "concept": concepts,
        "person": pl.DataFrame(
            {
                "person_id": person_id,
                "gender_concept_id": np.where(
                    rng.random(n_patients) < 0.5, genders["F"], genders["M"]
                ),
                "year_of_birth": birth.astype("datetime64[Y]").astype(int) + 1970,
                "birth_datetime": birth.astype("datetime64[us]"),
                "race_concept_id": 0,
                "ethnicity_concept_id": 0,
            }
        ),
        "observation_period": pl.DataFrame(
            {
                "observation_period_id": person_id,
                "person_id": person_id,
                "observation_period_start_date": start,
                "observation_period_end_date": start + 365 * 6,
                "period_type_concept_id": 0,
            }
        ),
    }
    n = int(n_patients * per_patient)
    who = rng.integers(1, n_patients + 1, n)
    who = np.where(rng.random(n) < 0.005, who + n_patients, who)  # orphans
    analyte = rng.choice(list(CODES), n, p=[0.7, 0.15, 0.15])
    value = np.round(np.exp(rng.normal(0.1, 0.4, n)) * np.where(analyte == "uacr", 30, 1), 2)
    when = np.datetime64("2015-01-01T00:00", "m") + rng.integers(0, 9 * 365 * 1440, n)
    text = rng.random(n) < 0.03
    unit = np.array([CODES[a][1] for a in CODES])[np.searchsorted(list(CODES), analyte)]
    unmapped = rng.random(n) < 0.01
    has_operator = rng.random(n) < 0.02
    visits = n_patients // 2
    labs = pl.DataFrame(
        {
            "measurement_id": np.arange(1, n + 1),
            "person_id": who,
            "measurement_concept_id": pl.Series(analyte).replace_strict(
                {a: loinc[c[0]] for a, c in CODES.items()}
            ),
            "measurement_date": when.astype("datetime64[D]"),
            "measurement_datetime": when.astype("datetime64[us]"),
            "measurement_type_concept_id": 0,
            "operator_concept_id": pl.Series(np.where(has_operator, operators["<"], 0)).replace(
                0, None
            ),
            "value_as_number": pl.Series(np.where(text, np.nan, value)).fill_nan(None),
            "unit_concept_id": pl.Series(unit)
            .replace_strict(ucum)
            .zip_with(pl.Series(~unmapped), pl.Series([0] * n)),
            "visit_occurrence_id": pl.Series(rng.integers(1, visits + 1, n)).zip_with(
                pl.Series(rng.random(n) < 0.2), pl.Series([None] * n, dtype=pl.Int64)
            ),
            "unit_source_value": pl.Series(unit).zip_with(
                pl.Series(~unmapped), pl.Series(["mg/dl"] * n)
            ),
            "value_source_value": pl.Series(np.where(text, "see comment", value.astype(str))),
        }
    )
    tables["measurement"] = labs
    tables["visit_occurrence"] = pl.DataFrame(
        {
            "visit_occurrence_id": np.arange(1, visits + 1),
            "person_id": rng.integers(1, n_patients + 1, visits),
            "visit_concept_id": _ids(concepts, "Visit")["IP"],
            "visit_start_date": dt.date(2016, 1, 1),
            "visit_end_date": dt.date(2016, 1, 2),
            "visit_type_concept_id": 0,
        }
    )
    for name in ("death", "procedure_occurrence", "condition_occurrence"):
        tables[name] = pl.DataFrame()
    script = ["\\set ON_ERROR_STOP on", "CREATE SCHEMA cdm;"]
    for name, frame in tables.items():
        _full(name, frame).write_csv(folder / f"{name}.csv", datetime_format="%Y-%m-%d %H:%M:%S")
        script += [
            create_table_sql(name, "cdm"),
            f"\\copy cdm.{name} FROM '{name}.csv' WITH (FORMAT csv, HEADER true)",
        ]
    script += [s for name in tables for s in index_sql(name, "cdm")] + ["ANALYZE;"]
    (folder / "load.sql").write_text("\n".join(script) + "\n", encoding="utf-8")
    # the same rows as canonical raw labs (value as reported, unit as text)
    labs.select(
        pl.col("person_id").cast(pl.String).alias("patient_id"),
        pl.col("measurement_datetime").alias("sample_date"),
        pl.Series(analyte).alias("analyte"),
        pl.col("value_source_value").alias("value"),
        pl.col("unit_source_value").alias("unit"),
    ).write_parquet(folder / "labs.parquet")
    return n


def _database(uri: str, name: str) -> str:
    import urllib.parse

    parts = urllib.parse.urlparse(uri)
    return urllib.parse.urlunparse(parts._replace(path=f"/{name}"))


def _libpq(uri: str) -> dict[str, str]:
    """libpq environment variables for ``uri`` (keeps the password off the command line)."""
    import urllib.parse

    parts = urllib.parse.urlparse(uri)
    return {
        **os.environ,
        "PGHOST": parts.hostname or "",
        "PGPORT": str(parts.port or 5432),
        "PGUSER": urllib.parse.unquote(parts.username or ""),
        "PGPASSWORD": urllib.parse.unquote(parts.password or ""),
        "PGDATABASE": parts.path.lstrip("/"),
    }


def _admin(uri: str, sql: str) -> None:
    import adbc_driver_postgresql.dbapi as adbc_pg

    with adbc_pg.connect(uri, autocommit=True) as con, con.cursor() as cur:
        cur.execute(sql)


def child(kind: str, folder: Path) -> None:
    """One measured read in this (fresh) process; prints a JSON line."""
    started = time.perf_counter()
    if kind == "generate":
        patients, per_patient = (float(x) for x in os.environ["KC_BENCH_SIZE"].split(","))
        rows = generate(folder, int(patients), per_patient)
    elif kind == "postgresql":
        from kidneycohort.io.omop import OmopSource, read_omop

        rows = read_omop(OmopSource(connection_env="KC_BENCH_OMOP_URI")).labs.height
    elif kind == "parquet":
        from kidneycohort.io import read_labs

        rows = read_labs(str(folder / "labs.parquet")).collect().height
    else:
        rows = _client(kind)
    seconds = time.perf_counter() - started
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(json.dumps({"kind": kind, "rows": rows, "seconds": seconds, "peak_mb": peak}))


MEASUREMENT_SQL = (
    "SELECT measurement_id, person_id, measurement_concept_id, measurement_datetime, "
    "operator_concept_id, CAST(value_as_number AS FLOAT8) AS value_as_number, unit_concept_id, "
    "unit_source_value, value_source_value FROM cdm.measurement"
)


def _client(kind: str) -> int:
    uri = os.environ["KC_BENCH_OMOP_URI"]
    if kind == "adbc":
        import adbc_driver_postgresql.dbapi as adbc_pg

        with adbc_pg.connect(uri) as con, con.cursor() as cur:
            cur.execute(MEASUREMENT_SQL)
            return cur.fetch_arrow_table().num_rows
    if kind == "connectorx":
        import connectorx

        return connectorx.read_sql(uri, MEASUREMENT_SQL, return_type="arrow").num_rows
    import io

    import psycopg
    import pyarrow.csv as pacsv

    buffer = io.BytesIO()
    with psycopg.connect(uri) as con, con.cursor() as cur:
        with cur.copy(f"COPY ({MEASUREMENT_SQL}) TO STDOUT WITH (FORMAT csv, HEADER true)") as copy:
            for block in copy:
                buffer.write(block)
    buffer.seek(0)
    return pacsv.read_csv(buffer).num_rows


def measure(kind: str, folder: Path, env: dict[str, str]) -> dict[str, float]:
    # A forked child starts with its parent's peak-memory mark (Linux copies the memory
    # map's high-water mark on fork); a small launcher process in between gives the
    # measured child a clean one, so its ru_maxrss is its own.
    launcher = "import subprocess, sys; sys.exit(subprocess.call(sys.argv[1:]))"
    out = subprocess.run(
        [
            sys.executable,
            "-c",
            launcher,
            sys.executable,
            __file__,
            "--child",
            kind,
            "--folder",
            str(folder),
        ],
        env=env,
        check=True,
        capture_output=True,
        text=True,
    )
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--patients", type=int, default=1_000_000)
    parser.add_argument("--per-patient", type=float, default=12.0)
    parser.add_argument("--clients", action="store_true")
    parser.add_argument("--child")
    parser.add_argument("--folder")
    args = parser.parse_args()
    if args.child:
        child(args.child, Path(args.folder))
        return
    uri = os.environ.get(URI_VARIABLE)
    if not uri:
        sys.exit(f"set {URI_VARIABLE} to a PostgreSQL server URI (see .ci/postgres_test_server.sh)")
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        t = time.perf_counter()
        n = generate(folder, args.patients, args.per_patient)
        print(
            f"generated {args.patients:,} persons, {n:,} measurements in {time.perf_counter() - t:.1f} s"
        )
        name = f"kc_bench_{uuid.uuid4().hex[:8]}"
        _admin(uri, f'CREATE DATABASE "{name}"')
        try:
            target = _database(uri, name)
            t = time.perf_counter()
            subprocess.run(
                ["psql", "-q", "-f", "load.sql"], cwd=folder, env=_libpq(target), check=True
            )
            print(f"loaded into PostgreSQL (COPY + indexes) in {time.perf_counter() - t:.1f} s")
            env = {**os.environ, "KC_BENCH_OMOP_URI": target}
            kinds = ["postgresql", "parquet"] + (
                ["adbc", "connectorx", "psycopg_copy"] if args.clients else []
            )
            for kind in kinds:
                r = measure(kind, folder, env)
                print(
                    f"{kind:>13}: {r['rows']:>11,} rows  {r['seconds']:7.1f} s  peak {r['peak_mb']:7.0f} MB  ({r['rows'] / r['seconds']:,.0f} rows/s)"
                )
        finally:
            _admin(uri, f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


if __name__ == "__main__":
    main()
