"""Engines run plans; DuckDB is the default and needs nothing beyond ``pip install``."""

from pipeline.engine._duckdb import DuckDBEngine, RunResult, StageReport

__all__ = ["DuckDBEngine", "RunResult", "StageReport"]
