"""The transition counts on Spark SQL: the same query text as the embedded engine.

The validated, coded panel (DuckDB table ``coded``) is written to Parquet in ``workdir`` and read
by Spark as the temporary view ``coded``; the propensity band (if any) is added by the same SQL
CASE expression; then :func:`stateworth.estimation.counts.count_sql` and
:func:`~stateworth.estimation.counts.first_rows_sql` run unchanged through ``spark.sql``. Results are
put in the canonical row order, so they compare row for row with DuckDB's.

The session is ``SparkSession.builder.getOrCreate()`` with ``spark.master`` taken from the
environment variable ``STATEWORTH_SPARK_MASTER`` (default ``local[2]``): point it at a cluster
(``spark://host:7077``, ``yarn``) and put ``workdir`` on storage every executor can read.
"""

from __future__ import annotations

import os
import tempfile

from stateworth.errors import PanelError
from stateworth.estimation.counts import JointCounts, count_sql, first_rows_sql, joint_from_columns
from stateworth.estimation.panel import CODED, Panel


def spark_session():
    """A Spark session (local mode by default); a clear error when pyspark is not installed."""
    try:
        from pyspark.sql import SparkSession
    except ImportError:
        raise PanelError("the spark engine needs pyspark (and Java 17): pip install 'pyspark>=3.5', or fit with "
                         "the default embedded engine (--engine duckdb)", where="--engine") from None
    master = os.environ.get("STATEWORTH_SPARK_MASTER", "local[2]")
    return (SparkSession.builder.master(master).appName("stateworth-fit")
            .config("spark.sql.session.timeZone", "UTC").config("spark.ui.enabled", "false")
            .config("spark.sql.shuffle.partitions", "8").getOrCreate())


def count_spark(spec, panel: Panel, band_expr: str | None, band_col: str | None,
                workdir: str | None = None) -> tuple[JointCounts, list[tuple]]:
    """(joint counts, first-row counts) of a coded panel, computed by Spark SQL."""
    spark = spark_session()
    with tempfile.TemporaryDirectory(prefix="stateworth-spark-", dir=workdir) as d:
        path = os.path.join(d, "coded.parquet")
        panel.con.execute(f"COPY {CODED} TO '{path}' (FORMAT PARQUET)")
        spark.read.parquet(path).createOrReplaceTempView("coded")
        source = "coded"
        if band_expr:
            spark.sql(f"SELECT *, {band_expr} AS {band_col} FROM coded").createOrReplaceTempView("banded")
            source = "banded"
        pdf = spark.sql(count_sql(spec, source)).toPandas()
        joint = joint_from_columns(spec, {c: pdf[c].to_numpy() for c in pdf.columns})
        first = [tuple(r) for r in spark.sql(first_rows_sql(spec, source)).collect()]
    return joint, first
