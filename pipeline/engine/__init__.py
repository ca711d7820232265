"""Engines run plans; DuckDB is the default and needs nothing beyond ``pip install``.

Spark (``pip install ascertain[spark]``) runs the same plans; pyspark is imported only when a
Spark run starts.
"""

from pipeline.engine._duckdb import DuckDBEngine, RunResult, StageReport
from pipeline.engine._spark import SparkEngine

__all__ = ["DuckDBEngine", "RunResult", "SparkEngine", "StageReport"]
