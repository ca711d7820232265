"""Writing a run's outputs: analysis table, attrition log, dictionary, manifest, run record."""

from pipeline.outputs._manifest import (
    MANIFEST,
    MANIFEST_VERSION,
    changed_inputs,
    describe_files,
    extract_inputs,
    extract_root,
    file_name,
    make_manifest,
    portable_path,
    read_manifest,
    sha256_file,
    study_keys,
)
from pipeline.outputs._usability import check_usable
from pipeline.outputs._write import (
    ATTRITION_COLUMNS,
    DATA_FILES,
    parquet_sink,
    write_outputs,
    write_parquet,
    write_parquet_stream,
)

__all__ = [
    "ATTRITION_COLUMNS",
    "DATA_FILES",
    "MANIFEST",
    "MANIFEST_VERSION",
    "changed_inputs",
    "check_usable",
    "describe_files",
    "extract_inputs",
    "extract_root",
    "file_name",
    "make_manifest",
    "parquet_sink",
    "portable_path",
    "read_manifest",
    "sha256_file",
    "study_keys",
    "write_outputs",
    "write_parquet",
    "write_parquet_stream",
]
