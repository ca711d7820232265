"""The manifest: everything needed to rebuild a cohort and to prove the rebuild is the same.

It lists the tool, engine and Python versions, the study and every definition file with content
hashes, the extract files with sizes and hashes, the plan's hash, and the hash of every output
file. It holds no timestamps, so two builds of the same inputs give the same manifest.

It holds no machine paths either, so it can be shared and checked on another machine: the
study is recorded by its file name, the definitions relative to the study's folder
(``../conditions/ckd.yaml``), and the extract by its role, each file relative to the extract's
root (the extract folder, or the folder of a site mapping file, which is listed too). Two
hints say where the inputs were, for ``verify`` on the same layout: the study relative to the
output folder, and the extract relative to the study's folder. A relative path is recorded only
when it cannot spell out a private folder (see :func:`portable_path`); otherwise the hint is
left out (``null``) and a file is named by its name alone.
"""

from __future__ import annotations

import hashlib
import json
import os
import platform
from collections.abc import Iterable
from pathlib import Path, PurePosixPath
from typing import Any

from pipeline.config._library import library_folder
from pipeline.config._study import Study
from pipeline.errors import AscertainError
from pipeline.extract import ExtractPath, HadoopPath, is_hadoop_uri
from pipeline.extract._hadoop import hadoop_name

MANIFEST = "manifest.json"
MANIFEST_VERSION = 2
CHUNK = 1 << 20
INPUT_GROUPS = ("study", "definitions", "measures", "reference_rates", "extract")
LIBRARY_PREFIX = "library:"


def sha256_file(path: ExtractPath) -> str:
    """The SHA-256 of a file's bytes, read in chunks."""
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        while block := handle.read(CHUNK):
            digest.update(block)
    return digest.hexdigest()


def _home() -> Path | None:
    try:
        return Path.home().resolve()
    except (RuntimeError, OSError):  # no home directory known: nothing more to protect
        return None


def portable_path(path: Path, base: Path) -> str | None:
    """``path`` relative to the folder ``base``, with ``/`` separators, if that is private-free.

    A relative path spells out every folder below the two paths' common ancestor. That is
    harmless when the ancestor is a project folder, but from ``/srv/out`` to
    ``/users/someone/study.yaml`` it would name the home directory. So the path is given only
    when the common ancestor lies at least two levels below the file-system root and is not
    above the home directory; otherwise (or on different drives) ``None``.
    """
    path, base = Path(os.path.abspath(path)), Path(os.path.abspath(base))
    try:
        common = Path(os.path.commonpath([path, base]))
    except ValueError:  # different drives
        return None
    home = _home()
    if len(common.parts) < 3 or (home is not None and common in home.parents):
        return None
    return Path(os.path.relpath(path, base)).as_posix()


def file_name(path: ExtractPath, base: Path) -> str:
    """How shareable files name an input: relative to ``base`` (or by its bare name).

    A file on a Hadoop file system is named relative to its extract's root folder, whatever
    ``base`` is: the server and the folders above the root are never written down.
    """
    if isinstance(path, HadoopPath):
        return path.relative
    return portable_path(path, base) or path.name


def describe_files(paths: Iterable[ExtractPath], base: Path) -> list[dict[str, Any]]:
    """Path relative to ``base`` (or the bare name), size and SHA-256 of each file, by path.

    Files on a Hadoop file system are read through it (the same bytes give the same hash).
    """
    return _describe({p: file_name(p, base) for p in set(paths)})


def _describe(named: dict[Any, str]) -> list[dict[str, Any]]:
    entries = [
        {"path": name, "bytes": p.stat().st_size, "sha256": sha256_file(p)}
        for p, name in named.items()
    ]
    return sorted(entries, key=lambda e: e["path"])


def definition_path(file: Path, study_file: Path, *, library: bool) -> str:
    """How a manifest names a definition file.

    A study that reads the shipped library (``library: true``) names its definitions inside
    the library (``library:conditions/ckd.yaml``): where ascertain is installed differs from
    machine to machine, and a rebuild must match them wherever that is. Other definitions are
    named relative to the study's folder (``../conditions/ckd.yaml``).
    """
    if library:
        return LIBRARY_PREFIX + (portable_path(file, library_folder()) or file.name)
    return portable_path(file, study_file.parent) or file.name


def measure_path(file: Path, study_file: Path) -> str:
    """How a manifest names a measure file: ``library:measures/...`` for a shipped one.

    Shipped measures are named inside the library wherever ascertain is installed (as
    :func:`definition_path` does); a study's own relative to the study's folder.
    """
    library = library_folder().resolve()
    if file.resolve().is_relative_to(library):
        return LIBRARY_PREFIX + file.resolve().relative_to(library).as_posix()
    return portable_path(file, study_file.parent) or file.name


def extract_root(extract: Path | str) -> Path:
    """The folder extract files are named relative to: the folder, or a mapping file's folder.

    A connection URI has no files; the current folder stands in (nothing is named from it).
    """
    if isinstance(extract, str):
        return Path.cwd()
    return extract if extract.is_dir() else extract.parent


def extract_inputs(extract: Path | str, files: Iterable[ExtractPath]) -> list[ExtractPath]:
    """Every file a build reads from the extract: the table files, and a site mapping file."""
    if isinstance(extract, str):
        return [*files]
    return [*files, *([extract] if extract.is_file() else [])]


def _locations(
    extract: Path | str, study_file: Path, out: Path, database: dict[str, Any] | None
) -> dict[str, Any]:
    """Where the inputs were: hints for ``verify`` on the same layout (see module docstring).

    A database named by a URI is recorded by that URI, which holds no password. An extract on
    a Hadoop file system is recorded by its scheme and its folder's (or mapping file's) name,
    never its server or path; ``verify --extract URI`` names it again.
    """
    if is_hadoop_uri(extract):
        # Scheme and name only: the server and the path above the extract are private.
        name = hadoop_name(str(extract))
        mapped = PurePosixPath(name).suffix in (".yaml", ".yml")
        return {
            "extract_kind": "hadoop mapping file" if mapped else "hadoop folder",
            "extract_scheme": str(extract).split(":", 1)[0].lower(),
            "extract_name": name,
            "extract_from_study": None,
            "study_from_output": portable_path(study_file, out),
        }
    if isinstance(extract, str):
        return {
            "extract_kind": "database",
            "extract_from_study": None,
            "extract_uri": extract,
            "study_from_output": portable_path(study_file, out),
        }
    kind = "folder" if extract.is_dir() else "mapping file"
    return {
        "extract_kind": f"database {kind}" if database is not None else kind,
        "extract_from_study": portable_path(extract, study_file.parent),
        "study_from_output": portable_path(study_file, out),
    }


_NOT_STUDY_KEYS: dict[str, Any] = {
    "definitions": True,
    "measures": True,
    "local_codes": True,
    "extract": True,
    "engine": True,
    "spark": True,
    "output": {"folder"},
    "persontime": {"reference_rates"},
}
"""Study keys left out of the manifest: paths of this machine (the definitions, the extract, the
output folder, the local code tables, the reference rate table; the manifest names its files
otherwise) and how an engine runs (threads, memory, Spark settings, which may name machine paths
or secrets), which does not change a cohort."""


def _flatten(value: Any, prefix: str, into: dict[str, Any]) -> None:
    if isinstance(value, dict):
        for key, inner in value.items():
            _flatten(inner, f"{prefix}.{key}" if prefix else str(key), into)
    elif isinstance(value, list) and any(isinstance(v, dict) for v in value):
        for number, inner in enumerate(value):  # eligibility steps: by their position
            _flatten(inner, f"{prefix}[{number}]", into)
    else:
        into[prefix] = value


def study_keys(study: Study) -> dict[str, Any]:
    """The study's settings as flat key paths (``outcomes.horizon_days``) and JSON values.

    ``ascertain diff`` compares two builds' designs from their manifests alone, since the
    study file may have changed or moved since. Defaults are filled in, so a key spelled out
    and one left at its default read the same; unset options are left out.
    """
    flat: dict[str, Any] = {}
    dumped = study.model_dump(mode="json", exclude_none=True, exclude=_NOT_STUDY_KEYS)
    _flatten(dumped, "", flat)
    return dict(sorted(flat.items()))


def make_manifest(
    *,
    tool_version: str,
    engine: dict[str, Any],
    study_file: Path,
    definition_files: Iterable[Path],
    measure_files: Iterable[Path] = (),
    reference_files: Iterable[Path] = (),
    library: bool = False,
    extract: Path | str,
    extract_entries: list[dict[str, Any]],
    out: Path,
    plan_hash: str,
    rows: dict[str, int],
    database: dict[str, Any] | None = None,
    keys: dict[str, Any] | None = None,
) -> dict[str, Any]:
    """The manifest of one build (without the output hashes, which the writer adds).

    Args:
        tool_version: The version of ascertain that built it.
        engine: The engine's name, version and thread count.
        study_file: The study file, resolved.
        definition_files: Every definition file the study's catalog loaded, and every code
            list file (CSV, header, hierarchy, edition table) those definitions read, and the
            study's local code tables (``local_codes:``).
        measure_files: Every measure file the build read (shipped and the study's own).
        reference_files: The study's reference rate table (``persontime: reference_rates:``),
            recorded as ``reference_rates`` relative to the study's folder; the section is
            absent without one, so other builds' manifests are unchanged.
        library: The study reads the shipped library (see :func:`definition_path`).
        extract: The extract folder, site mapping file or connection URI the build read.
        extract_entries: ``describe_files`` of the extract's files, relative to its root.
        out: The output folder (for the hint of where the study is from there).
        plan_hash: The compiled plan's content hash.
        rows: Cohort size and rows read per source table.
        database: For a database source, its server version and each table's rows and
            checksum (``DatabaseFacts.as_manifest``); the section is absent for files.
        keys: The study's settings (:func:`study_keys`), recorded as ``study_keys``.
    """
    manifest = {
        "manifest_version": MANIFEST_VERSION,
        "tool_version": tool_version,
        "engine": engine,
        "python": platform.python_version(),
        "study": describe_files([study_file], study_file.parent),
        "definitions": _describe(
            {f: definition_path(f, study_file, library=library) for f in set(definition_files)}
        ),
        "measures": _describe({f: measure_path(f, study_file) for f in set(measure_files)}),
        "extract": extract_entries,
        "locations": _locations(extract, study_file, out, database),
        "plan_hash": plan_hash,
        "rows": rows,
    }
    references = {f: portable_path(f, study_file.parent) or f.name for f in set(reference_files)}
    if references:
        manifest["reference_rates"] = _describe(references)
    if keys is not None:
        manifest["study_keys"] = keys
    if database is not None:
        manifest["database"] = database
    return manifest


def _upgrade(data: dict[str, Any], folder: Path) -> dict[str, Any]:
    """A manifest of the first layout (absolute paths) in the current one, paths made relative."""
    study = Path(data["study"][0]["path"])
    extract = Path(data.get("extract_folder", study.parent))
    root = extract.parent if extract.suffix in (".yaml", ".yml") else extract

    def relative(group: str, base: Path) -> list[dict[str, Any]]:
        entries = [
            {**e, "path": portable_path(Path(e["path"]), base) or Path(e["path"]).name}
            for e in data.get(group, [])
        ]
        return sorted(entries, key=lambda e: e["path"])

    upgraded = {k: v for k, v in data.items() if k != "extract_folder"}
    return upgraded | {
        "manifest_version": MANIFEST_VERSION,
        "study": relative("study", study.parent),
        "definitions": relative("definitions", study.parent),
        "extract": relative("extract", root),
        "locations": {
            "extract_kind": "folder" if root == extract else "mapping file",
            "extract_from_study": portable_path(extract, study.parent),
            "study_from_output": portable_path(study, folder.resolve()),
        },
    }


def read_manifest(folder: Path) -> dict[str, Any]:
    """Read an output folder's manifest, in the current layout whatever version wrote it.

    Raises:
        AscertainError: The folder has no readable manifest.
    """
    path = folder / MANIFEST
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError) as err:
        raise AscertainError(f"{path}: cannot read the manifest: {err}") from err
    if not isinstance(data, dict) or "outputs" not in data or not data.get("study"):
        raise AscertainError(f"{path}: not a manifest written by ascertain")
    version = data.get("manifest_version", 1)
    if version == 1:
        return _upgrade(data, folder)
    if version != MANIFEST_VERSION:
        raise AscertainError(
            f"{path}: manifest version {version} is newer than this ascertain reads "
            f"({MANIFEST_VERSION}); use the version that wrote it ({data.get('tool_version')})"
        )
    return data


def changed_inputs(recorded: dict[str, Any], rebuilt: dict[str, Any]) -> list[str]:
    """Inputs that differ between a manifest and that of its rebuild, as readable lines.

    Files are matched by their recorded relative path (the study by its role: there is one),
    so the inputs may live anywhere on the machine that rebuilds.
    """
    changes = []
    for group in INPUT_GROUPS:
        before = {e["path"]: e["sha256"] for e in recorded.get(group, [])}
        after = {e["path"]: e["sha256"] for e in rebuilt.get(group, [])}
        if group == "study":
            if list(before.values()) != list(after.values()):
                changes.append(f"study file {next(iter(after), '?')} has changed since the build")
            continue
        for name in sorted(before.keys() | after.keys()):
            if name not in after:
                changes.append(f"{group} file {name} is missing")
            elif name not in before:
                changes.append(f"{group} file {name} was not there at the build")
            elif before[name] != after[name]:
                changes.append(f"{group} file {name} has changed since the build")
    return changes + _changed_tables(recorded, rebuilt)


def _changed_tables(recorded: dict[str, Any], rebuilt: dict[str, Any]) -> list[str]:
    """Database tables whose row count or content checksum differ, as readable lines."""
    before = {t["table"]: t for t in recorded.get("database", {}).get("tables", [])}
    after = {t["table"]: t for t in rebuilt.get("database", {}).get("tables", [])}
    changes = []
    for name in sorted(before.keys() | after.keys()):
        old, new = before.get(name), after.get(name)
        if new is None or old is None:
            state = "not read now" if new is None else "not read at the build"
            changes.append(f"database table {name} was {state}")
        elif old["source"] != new["source"]:
            changes.append(
                f"database table {name} is read from {new['source']}, not {old['source']}"
            )
        elif (old["rows"], old["checksum"]) != (new["rows"], new["checksum"]):
            changes.append(
                f"database table {name} ({new['source']}) has changed since the build "
                f"({old['rows']:,} rows then, {new['rows']:,} now; checksum "
                f"{old['checksum']} then, {new['checksum']} now)"
            )
    return changes
