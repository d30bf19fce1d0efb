"""Spark: run the recipes through a Spark session on CDM tables staged as Parquet (pyspark 4).

:func:`local_spark` starts a small local session set up as the recipes need it: time zone UTC,
``spark.sql.timestampType=TIMESTAMP_NTZ`` (CDM times are naive local times), adaptive query
execution on, the driver bound to 127.0.0.1. :class:`SparkSession` stages an extract's CDM tables
(read through :func:`cohort.source.open_extract`, so with DuckDB's types and full column lists)
as Parquet and registers them as temporary views; every recipe is written to Parquet there and read back
as a temporary view (so the episode loop does not grow its plan), and tables come back as polars.
"""

from __future__ import annotations

import shutil
import tempfile
import time
from pathlib import Path
from typing import Any

import polars as pl

from cohort._errors import CohortError, InputError

__all__ = ["local_spark", "SparkSession"]


def _pyspark() -> Any:
    try:
        import pyspark
        from pyspark.sql import SparkSession as _Session
    except ImportError:  # pragma: no cover - depends on the environment
        msg = "the Spark engine needs pyspark 4 and Java 17: pip install 'dka-cohort[spark]'"
        raise CohortError(msg) from None
    return pyspark, _Session


def local_spark(*, cores: int = 2, memory: str = "1g", app: str = "dka-cohort") -> Any:
    """Start (or get) a local Spark session on 127.0.0.1 set up for the recipes.

    Examples
    --------
    >>> spark = local_spark(cores=2)   # doctest: +SKIP
    """
    _, session_class = _pyspark()
    builder = (
        session_class.builder.master(f"local[{int(cores)}]").appName(app)
        .config("spark.driver.host", "127.0.0.1")
        .config("spark.driver.bindAddress", "127.0.0.1")
        .config("spark.sql.session.timeZone", "UTC")
        .config("spark.sql.timestampType", "TIMESTAMP_NTZ")
        .config("spark.sql.adaptive.enabled", "true")
        .config("spark.sql.shuffle.partitions", str(max(2, int(cores))))
        .config("spark.default.parallelism", str(max(2, int(cores))))
        .config("spark.driver.memory", memory)
        .config("spark.ui.enabled", "false")
        .config("spark.ui.showConsoleProgress", "false")
        .config("spark.sql.execution.arrow.pyspark.enabled", "true")
    )
    try:
        spark = builder.getOrCreate()
    except Exception as error:  # Java missing or the JVM does not start
        msg = f"could not start a local Spark session (is Java 17 installed?): {error}"
        raise CohortError(msg) from None
    spark.sparkContext.setLogLevel("ERROR")
    return spark


class SparkSession:
    """Run recipes in Spark on an extract's CDM tables; tables come back as polars.

    Parameters
    ----------
    spark
        A pyspark session (:func:`local_spark`, or a remote one with the same settings: UTC,
        ``spark.sql.timestampType=TIMESTAMP_NTZ``).
    source
        The extract (opened with :func:`cohort.source.open_extract`); its CDM tables are staged
        as Parquet under ``staging`` and registered as temporary views.
    staging
        A folder for the staged tables (default: a temporary folder removed by :meth:`close`).

    Examples
    --------
    >>> with SparkSession(local_spark(), "demo/extract") as session:   # doctest: +SKIP
    ...     run_recipes(session, "consensus-2024")
    """

    dialect = "spark"

    def __init__(self, spark: Any, source: str | Path, *, staging: str | Path | None = None) -> None:
        from cohort._cdm import CDM_TABLES
        from cohort.source import open_extract

        self.spark = spark
        conf = spark.conf
        if conf.get("spark.sql.session.timeZone") != "UTC":
            msg = ("the Spark session's time zone must be UTC (spark.sql.session.timeZone); got "
                   f"{conf.get('spark.sql.session.timeZone')!r}")
            raise InputError(msg)
        self._own_staging = staging is None
        self.staging = Path(tempfile.mkdtemp(prefix="dka-spark-")) if staging is None else Path(staging)
        self.staging.mkdir(parents=True, exist_ok=True)
        self.seconds: dict[str, float] = {}
        self._paths: dict[str, Path] = {}
        self._views: set[str] = set()
        started = time.perf_counter()
        with open_extract(source) as extract:
            for table, columns in CDM_TABLES.items():
                names = ", ".join(column.name for column in columns)
                path = self.staging / f"cdm_{table}.parquet"
                extract.con.execute(f"copy (select {names} from {table}) to '{path}' (format parquet)")
                self._view(spark.read.parquet(str(path)), table)
        self.seconds["load"] = time.perf_counter() - started

    def __enter__(self) -> SparkSession:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def _view(self, frame: Any, name: str) -> None:
        frame.createOrReplaceTempView(name)
        self._views.add(name)

    def close(self) -> None:
        """Drop the temporary views made here and remove the staging folder (the session stays)."""
        for name in sorted(self._views):
            self.spark.catalog.dropTempView(name)
        self._views.clear()
        if self._own_staging:
            shutil.rmtree(self.staging, ignore_errors=True)

    def _sql(self, sql: str, recipe: str) -> Any:
        try:
            return self.spark.sql(sql)
        except Exception as error:
            text = str(error).strip().splitlines()[0] if str(error).strip() else type(error).__name__
            msg = f"Spark refused {recipe}: {text}"
            raise CohortError(msg) from None

    def register_codelists(self, lists: Any) -> None:
        """Stage the code lists as Parquet and register ``dka_codelist_<name>`` views."""
        for name, frame in lists.frames.items():
            path = self.staging / f"codelist_{name}.parquet"
            frame.write_parquet(path)
            self._view(self.spark.read.parquet(str(path)), f"dka_codelist_{name}")

    def _path(self, target: str) -> Path:
        self._version = getattr(self, "_version", 0) + 1
        return self.staging / f"{target}_{self._version}.parquet"

    def _write(self, frame: Any, path: Path, target: str, mode: str = "error") -> None:
        try:
            frame.write.mode(mode).parquet(str(path))
        except Exception as error:
            text = str(error).strip().splitlines()[0]
            msg = f"Spark failed running {target}: {text}"
            raise CohortError(msg) from None

    def materialise(self, target: str, sql: str) -> None:
        """Write ``sql`` to Parquet under the staging folder and make ``target`` a view over it.

        Each table is written once to a new path, so a recipe never reads files being replaced
        and the episode loop's plans stay short.
        """
        started = time.perf_counter()
        path = self._path(target)
        self._write(self._sql(sql, target), path, target)
        self._paths[target] = path
        self._view(self.spark.read.parquet(str(path)), target)
        self.seconds[target] = self.seconds.get(target, 0.0) + time.perf_counter() - started

    def append(self, target: str, sql: str) -> None:
        """Append the rows of ``sql`` to table ``target``'s Parquet folder."""
        path = self._paths[target]
        self._write(self._sql(sql, target), path, target, mode="append")
        self._view(self.spark.read.parquet(str(path)), target)

    def count(self, table: str) -> int:
        """Rows of ``table``."""
        return int(self.spark.table(table).count())

    def fetch(self, table: str) -> pl.DataFrame:
        """Table ``table`` as polars (through Arrow)."""
        return pl.from_arrow(self.spark.table(table).toArrow())  # type: ignore[return-value]
