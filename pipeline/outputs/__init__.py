"""Writing a run's outputs: the analysis table, the attrition log and the run record."""

from pipeline.outputs._write import ATTRITION_COLUMNS, write_outputs, write_parquet

__all__ = ["ATTRITION_COLUMNS", "write_outputs", "write_parquet"]
