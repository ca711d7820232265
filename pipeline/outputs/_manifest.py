"""The manifest: everything needed to rebuild a cohort and to prove the rebuild is the same.

It lists the tool, engine and Python versions, the study and every definition file with content
hashes, the extract files with sizes and hashes, the plan's hash, and the hash of every output
file. It holds no timestamps, so two builds of the same inputs give the same manifest.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterable
from pathlib import Path
from typing import Any

from pipeline.errors import AscertainError

MANIFEST = "manifest.json"
CHUNK = 1 << 20


def sha256_file(path: Path) -> str:
    """The SHA-256 of a file's bytes, read in chunks."""
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        while block := handle.read(CHUNK):
            digest.update(block)
    return digest.hexdigest()


def describe_files(paths: Iterable[Path]) -> list[dict[str, Any]]:
    """Path, size and SHA-256 of each file, sorted by path."""
    return [
        {"path": str(p), "bytes": p.stat().st_size, "sha256": sha256_file(p)}
        for p in sorted(set(paths))
    ]


def read_manifest(folder: Path) -> dict[str, Any]:
    """Read an output folder's manifest.

    Raises:
        AscertainError: The folder has no readable manifest.
    """
    path = folder / MANIFEST
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError) as err:
        raise AscertainError(f"{path}: cannot read the manifest: {err}") from err
    if not isinstance(data, dict) or "outputs" not in data:
        raise AscertainError(f"{path}: not a manifest written by ascertain")
    return data


def changed_inputs(manifest: dict[str, Any]) -> list[str]:
    """Input files whose content no longer matches the manifest, as readable lines."""
    changes = []
    for group in ("study", "definitions", "extract"):
        for entry in manifest.get(group, []):
            path = Path(entry["path"])
            if not path.is_file():
                changes.append(f"{group} file {path} is missing")
            elif sha256_file(path) != entry["sha256"]:
                changes.append(f"{group} file {path} has changed since the build")
    return changes
