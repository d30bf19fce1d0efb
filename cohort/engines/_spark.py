"""Spark: run the recipes through a Spark session on CDM tables as temporary views (pyspark 4).

:func:`local_spark` starts a small local session set up as the recipes need it: time zone UTC,
``spark.sql.timestampType=TIMESTAMP_NTZ`` (CDM times are naive local times), adaptive query
execution on, the driver bound to 127.0.0.1; :func:`connect_spark` also reaches a cluster master
or a Spark Connect server with the same settings. :class:`SparkSession` registers the CDM tables
as temporary views: an extract staged as Parquet through :func:`cohort.source.open_extract` (with
DuckDB's types and full column lists), a Parquet folder Spark reads itself, or tables of a catalog
database, cast to the CDM types. Every recipe is written to Parquet in a staging folder and read
back as a temporary view (so the episode loop does not grow its plan), and tables come back as
polars through Arrow.
"""

from __future__ import annotations

import shutil
import tempfile
import time
from pathlib import Path
from typing import Any

import polars as pl

from cohort._errors import CohortError, InputError

__all__ = ["local_spark", "connect_spark", "SparkSession"]


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
        first = " ".join(str(error).split())[:300] or type(error).__name__
        msg = (f"could not start a local Spark session: {first}. Install Java 17 "
               "(openjdk-17-jre-headless; .ci/spark.sh) and put java on PATH or set JAVA_HOME")
        raise CohortError(msg) from None
    spark.sparkContext.setLogLevel("ERROR")
    return spark


_SPARK_TYPES: dict[str, str] = {
    "id": "bigint", "concept": "int", "int": "int", "float": "double", "date": "date",
    "datetime": "timestamp_ntz", "text": "string",
}


def connect_spark(master: str | None = None, *, cores: int = 2, memory: str = "1g",
                  app: str = "dka-cohort") -> Any:
    """A Spark session for the recipes: local (``None`` or ``local[n]``), a cluster or Spark Connect.

    ``master`` is a Spark master URL (``local[2]``, ``spark://host:7077``, ``yarn``, ...) or a
    Spark Connect URL (``sc://host:15002``). Local sessions are :func:`local_spark`; others get the
    settings the recipes need (session time zone UTC, ``TIMESTAMP_NTZ``, adaptive execution on).

    Examples
    --------
    >>> spark = connect_spark("spark://cluster:7077")   # doctest: +SKIP
    """
    if master is None or master.startswith("local"):
        if master and master.startswith("local[") and master.endswith("]") and master[6:-1].isdigit():
            cores = int(master[6:-1])
        return local_spark(cores=cores, memory=memory, app=app)
    _, session_class = _pyspark()
    settings = {
        "spark.sql.session.timeZone": "UTC",
        "spark.sql.timestampType": "TIMESTAMP_NTZ",
        "spark.sql.adaptive.enabled": "true",
    }
    try:
        if master.startswith("sc://"):
            builder = session_class.builder.remote(master).appName(app)
        else:
            builder = session_class.builder.master(master).appName(app)
        for key, value in settings.items():
            builder = builder.config(key, value)
        spark = builder.getOrCreate()
        for key, value in settings.items():
            spark.conf.set(key, value)
    except Exception as error:  # noqa: BLE001 - any failure to reach the master
        first = str(error).strip().splitlines()[0] if str(error).strip() else type(error).__name__
        msg = (f"could not start a Spark session on {master!r}: {first}. Check --spark-master (a "
               "Spark master URL such as spark://host:7077, or sc://host:15002 for Spark Connect)")
        raise CohortError(msg) from None
    return spark


class SparkSession:
    """Run recipes in Spark on CDM tables; tables come back as polars.

    Parameters
    ----------
    spark
        A pyspark session (:func:`local_spark`, :func:`connect_spark`, or one of your own with the
        same settings: UTC, ``spark.sql.timestampType=TIMESTAMP_NTZ``).
    source
        Where the CDM tables are. With ``reader="duckdb"`` (the default) an extract of any format
        :func:`cohort.source.open_extract` reads, checked and staged as Parquet under ``staging``
        (Spark and this process must share the file system: a local session). With
        ``reader="spark"`` a folder of Parquet tables (``<table>.parquet`` or ``<table>/``) that
        Spark reads itself, local or remote (``s3a://``, ``hdfs://``); the columns are cast to the
        CDM types and an absent optional table is an empty view.
    staging
        A folder for the recipes' tables (written as Parquet by Spark, read back as views; default
        a temporary folder removed by :meth:`close`). With a cluster it must be a path every
        executor and this process see the same way.
    database
        Instead of ``source``: a database of the session's catalog holding the CDM tables
        (``--schema``).
    reader
        ``"duckdb"`` or ``"spark"`` (see ``source``).

    Examples
    --------
    >>> with SparkSession(local_spark(), "demo/extract") as session:   # doctest: +SKIP
    ...     run_recipes(session, "consensus-2024")
    """

    dialect = "spark"

    def __init__(
        self,
        spark: Any,
        source: str | Path | None = None,
        *,
        staging: str | Path | None = None,
        database: str | None = None,
        reader: str = "duckdb",
    ) -> None:
        self.spark = spark
        conf = spark.conf
        if conf.get("spark.sql.session.timeZone") != "UTC":
            msg = ("the Spark session's time zone must be UTC (spark.sql.session.timeZone); got "
                   f"{conf.get('spark.sql.session.timeZone')!r}")
            raise InputError(msg)
        if (source is None) == (database is None):
            msg = ("SparkSession needs the CDM tables from exactly one place: a Parquet folder "
                   "(source, --source) or a catalog database holding them (database, --schema)")
            raise InputError(msg)
        if reader not in ("duckdb", "spark"):
            msg = f"reader must be 'duckdb' or 'spark', got {reader!r}"
            raise InputError(msg)
        self._own_staging = staging is None
        self.staging = Path(tempfile.mkdtemp(prefix="dka-spark-")) if staging is None else Path(staging)
        self.staging.mkdir(parents=True, exist_ok=True)
        self.seconds: dict[str, float] = {}
        self._paths: dict[str, Path] = {}
        self._views: set[str] = set()
        self.cdm_rows: dict[str, int] = {}
        started = time.perf_counter()
        try:
            if database is not None:
                self._from_catalog(database)
            elif reader == "spark":
                self._from_parquet(str(source))
            else:
                self._from_extract(source)
        except BaseException:
            self.close()
            raise
        self.seconds["load"] = time.perf_counter() - started

    def _from_extract(self, source: str | Path) -> None:
        """Stage the extract's typed views (DuckDB reads it) as Parquet; Spark reads the copies."""
        from cohort._cdm import CDM_TABLES
        from cohort.source import open_extract

        with open_extract(source) as extract:
            for table, columns in CDM_TABLES.items():
                names = ", ".join(column.name for column in columns)
                path = self.staging / f"cdm_{table}.parquet"
                extract.con.execute(f"copy (select {names} from {table}) to '{path}' (format parquet)")
                self._view(self.spark.read.parquet(str(path)), table)

    def _typed(self, frame: Any, table: str, where: str) -> Any:
        """Select the full CDM column list of ``table`` from ``frame`` with the CDM types."""
        from cohort._cdm import CDM_TABLES

        present = {name.lower(): name for name in frame.columns}
        lacking = [column.name for column in CDM_TABLES[table] if column.used and column.name not in present]
        if lacking:
            msg = (f"{where}: CDM table {table} lacks the column(s) {', '.join(lacking)} the pipeline "
                   "reads; add them (OMOP CDM v5.4 names)")
            raise InputError(msg)
        selects = []
        for column in CDM_TABLES[table]:
            kind = _SPARK_TYPES[column.kind]
            if column.name in present:
                selects.append(f"cast(`{present[column.name]}` as {kind}) as {column.name}")
            else:
                selects.append(f"cast(null as {kind}) as {column.name}")
        return frame.selectExpr(*selects)

    def _empty(self, table: str) -> Any:
        from cohort._cdm import CDM_TABLES

        ddl = ", ".join(f"{column.name} {_SPARK_TYPES[column.kind]}" for column in CDM_TABLES[table])
        return self.spark.createDataFrame([], ddl)

    def _from_parquet(self, folder: str) -> None:
        """Spark reads ``<folder>/<table>`` or ``<folder>/<table>.parquet`` itself (local or remote paths)."""
        from cohort._cdm import CDM_TABLES, REQUIRED_TABLES

        base = folder.rstrip("/")
        local = "://" not in base
        if local and not Path(base).is_dir():
            msg = f"--source {folder}: no such folder; give a folder of CDM Parquet tables (<table>.parquet)"
            raise InputError(msg)
        missing = []
        for table in CDM_TABLES:
            frame = None
            for candidate in (f"{base}/{table}.parquet", f"{base}/{table}"):
                if local and not Path(candidate).exists():
                    continue
                try:
                    frame = self.spark.read.parquet(candidate)
                    break
                except Exception:  # noqa: BLE001 - not there (remote paths cannot be checked first)
                    continue
            if frame is None:
                if table in REQUIRED_TABLES:
                    missing.append(table)
                    continue
                frame = self._empty(table)
            else:
                frame = self._typed(frame, table, f"--source {folder}")
            self._view(frame, table)
        if missing:
            msg = (f"--source {folder} lacks the CDM table(s) {', '.join(missing)} (looked for "
                   "<table>.parquet and <table>/ of Parquet files); the episodes need "
                   f"{', '.join(REQUIRED_TABLES)}")
            raise InputError(msg)

    def _from_catalog(self, database: str) -> None:
        """Views over ``<database>.<table>`` of the session's catalog, typed as the CDM says."""
        from cohort._cdm import CDM_TABLES, REQUIRED_TABLES

        catalog = self.spark.catalog
        try:
            exists = catalog.databaseExists(database)
        except Exception:  # noqa: BLE001 - some catalogs cannot say
            exists = True
        if not exists:
            msg = (f"the Spark catalog has no database {database!r} (--schema); give the database "
                   "holding the CDM tables, or --source a folder of CDM Parquet tables")
            raise InputError(msg)
        missing = []
        for table in CDM_TABLES:
            if catalog.tableExists(f"{database}.{table}"):
                frame = self._typed(self.spark.table(f"{database}.{table}"), table, f"database {database}")
            elif table in REQUIRED_TABLES:
                missing.append(table)
                continue
            else:
                frame = self._empty(table)
            self._view(frame, table)
        if missing:
            msg = (f"Spark database {database} lacks the CDM table(s) {', '.join(missing)}; the "
                   f"episodes need {', '.join(REQUIRED_TABLES)}")
            raise InputError(msg)

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

    def query(self, sql: str, recipe: str = "<query>") -> list[tuple[Any, ...]]:
        """Rows of a select (written for Spark)."""
        try:
            return [tuple(row) for row in self._sql(sql, recipe).collect()]
        except CohortError:
            raise
        except Exception as error:  # noqa: BLE001
            msg = f"Spark failed running {recipe}: {str(error).strip().splitlines()[0]}"
            raise CohortError(msg) from None

    def fetch(self, table: str, *, order_by: str | None = None) -> pl.DataFrame:
        """Table ``table`` as polars (through Arrow); ``order_by`` a column list to sort on."""
        frame = self.spark.table(table)
        if order_by:
            frame = frame.orderBy(*[name.strip() for name in order_by.split(",")])
        return pl.from_arrow(frame.toArrow())  # type: ignore[return-value]
