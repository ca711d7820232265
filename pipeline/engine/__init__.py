"""Engines run plans; DuckDB is the default and needs nothing beyond ``pip install``.

Spark (``pip install ascertain[spark]``) runs the same plans; pyspark is imported only when a
Spark run starts. What both do the same way, and the result types, are in
:mod:`pipeline.engine.base`.
"""

from pipeline.engine.base import BatchSink, Engine, RunResult, StageCallback, StageReport
from pipeline.engine.duckdb import DuckDBEngine
from pipeline.engine.spark import SparkEngine

__all__ = [
    "BatchSink",
    "DuckDBEngine",
    "Engine",
    "RunResult",
    "SparkEngine",
    "StageCallback",
    "StageReport",
]
