"""A local Spark session shared by every test that needs one (Spark starts slowly).

``.ci/run`` installs a Java runtime (Debian's openjdk-17-jre-headless) and the test
command installs the ``spark`` extra. Outside CI, without pyspark or Java, the tests
that need Spark skip and say why; with ``CI=true`` they fail instead.
"""

from __future__ import annotations

import os
import shutil
import sys
from collections.abc import Iterator
from typing import Any

import pytest

__all__ = ["spark_session"]


def _missing() -> str | None:
    try:
        import pyspark  # noqa: F401
    except ImportError:
        return "pyspark is not installed (pip install -e '.[spark]')"
    java_home = os.environ.get("JAVA_HOME")
    if shutil.which("java") is None and not (java_home and os.path.isdir(java_home)):
        return (
            "no Java runtime for Spark (Debian: apt-get install openjdk-17-jre-headless; "
            ".ci/run installs it)"
        )
    return None


@pytest.fixture(scope="session")
def spark_session() -> Iterator[Any]:
    """One ``local[2]`` SparkSession for the whole test session."""
    reason = _missing()
    if reason is not None:
        if os.environ.get("CI", "").lower() == "true":
            pytest.fail(f"CI=true but {reason}")
        pytest.skip(reason)
    from pyspark.sql import SparkSession

    os.environ.setdefault("PYSPARK_PYTHON", sys.executable)
    session = (
        SparkSession.builder.master("local[2]")
        .appName("kidneycohort-tests")
        .config("spark.ui.enabled", "false")
        .config("spark.ui.showConsoleProgress", "false")
        .config("spark.sql.session.timeZone", "UTC")
        .config("spark.sql.shuffle.partitions", "4")
        .config("spark.driver.memory", "1g")
        .getOrCreate()
    )
    session.sparkContext.setLogLevel("ERROR")
    yield session
    session.stop()
