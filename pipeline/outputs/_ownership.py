"""Which folders a command may write into, and replacing only the files the tool wrote there.

A command that writes (``build``, ``report``, ``profile``, ``synth``) writes into a folder that
is absent, empty, or holds only files ascertain wrote there before. Each command leaves a record
of what it wrote: ``build`` its manifest (``outputs`` lists the data files; the manifest and
``run.json`` go with them), the others a small JSON record (``ascertain-report.json``,
``ascertain-profile.json``, ``ascertain-synth.json``) listing their files. Anything else in the
folder, at any depth and hidden or not, is foreign: the command refuses before doing any work
and names the folder and the foreign files, so a user's own files (or the extract, or the study
file) are never replaced or deleted.

Writing is staged: every file is written to a hidden sibling folder first and moved in only when
all are complete, so a failed run leaves the previous output as it was. A new folder is moved
into place whole; into an existing folder the new files are moved one by one (the record last,
so an interrupted move leaves a record that still lists every tool file present), and tool files
of the previous run that the new one does not write are removed. Files of a companion command
that would describe older data (a report over a rebuilt cohort) are removed with a note.
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path, PurePosixPath

from pipeline.errors import OutputFolderError


@dataclass(frozen=True)
class Owner:
    """A command that writes into a folder, and the file that records what it wrote.

    Attributes:
        command: The command's name, as typed after ``ascertain``.
        record: The record's file name inside the folder.
        own_record: Whether the record is the generic list written by :func:`install`
            (``build`` keeps its manifest instead, written with its outputs).
    """

    command: str
    record: str
    own_record: bool = True


BUILD = Owner("build", "manifest.json", own_record=False)
REPORT = Owner("report", "ascertain-report.json")
PROFILE = Owner("profile", "ascertain-profile.json")
SYNTH = Owner("synth", "ascertain-synth.json")
CODES = Owner("codes", "ascertain-codes.json")

BUILD_COMPANIONS = ("run.json",)
"""Build files the manifest does not list in ``outputs`` but which the build writes."""

SHARES_WITH: dict[Owner, tuple[Owner, ...]] = {
    BUILD: (REPORT, CODES),
    REPORT: (BUILD, CODES),
    CODES: (BUILD, REPORT),
}
"""Other owners whose files may lie in the same folder: a report and a code audit live in
their build folder (the audit describes the extract and the definitions, so a new build
leaves it in place)."""

REMOVES: dict[Owner, tuple[Owner, ...]] = {BUILD: (REPORT,)}
"""Owners whose files a new run removes: a report describes the cohort it was written for."""

LISTED = 8
"""How many foreign files an error names before saying how many more there are."""


def _safe(name: object) -> str | None:
    """A record entry as a relative POSIX path inside the folder, or None if it is not one.

    A record is a file anyone can edit: an entry that is absolute or climbs out of the folder
    (``..``) must never make the tool replace or remove a file elsewhere, so it is ignored.
    """
    if not isinstance(name, str) or not name or "\\" in name:
        return None
    path = PurePosixPath(name)
    if path.is_absolute() or any(part in ("", ".", "..") for part in path.parts):
        return None
    return path.as_posix()


def _read_json(path: Path) -> object:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError):
        return None


def listed_files(folder: Path, owner: Owner) -> frozenset[str]:
    """The files ``owner``'s record in ``folder`` says it wrote, its record included.

    Returns an empty set when there is no record or it is not one written by ascertain (then
    the file of that name is foreign like any other).
    """
    data = _read_json(folder / owner.record)
    if not isinstance(data, dict):
        return frozenset()
    if owner.own_record:
        if data.get("written_by") != f"ascertain {owner.command}":
            return frozenset()
        entries = data.get("files")
        extra: tuple[str, ...] = ()
    else:
        # A build's manifest: its outputs and the plan's hash (a user's manifest.json is foreign).
        entries = data.get("outputs") if "plan_hash" in data else None
        extra = BUILD_COMPANIONS
    if not isinstance(entries, (list, dict)):
        return frozenset()
    names = {_safe(name) for name in [*entries, *extra]}
    return frozenset(n for n in names if n is not None) | {owner.record}


def foreign_entries(folder: Path, owners: Iterable[Owner]) -> list[str]:
    """Everything in ``folder`` no owner's record lists, as sorted relative paths.

    Hidden files count, symbolic links count as themselves (never followed), and a subfolder
    holding nothing the tool wrote is named once, with a trailing slash.
    """
    owned: set[str] = set()
    for owner in owners:
        owned |= listed_files(folder, owner)
    owned_dirs = {str(parent) for name in owned for parent in PurePosixPath(name).parents}
    foreign: list[str] = []

    def walk(directory: Path, prefix: str) -> None:
        for entry in sorted(os.scandir(directory), key=lambda e: e.name):
            name = f"{prefix}{entry.name}"
            if entry.is_dir(follow_symlinks=False):
                if name in owned_dirs:
                    walk(Path(entry.path), f"{name}/")
                else:
                    foreign.append(f"{name}/")
            elif name not in owned:
                foreign.append(name)

    walk(folder, "")
    return foreign


def _inside(inner: Path, outer: Path) -> bool:
    return inner == outer or inner.is_relative_to(outer)


def check_apart(folder: Path, inputs: Iterable[tuple[str, Path]]) -> None:
    """Refuse an output folder that is an input, lies inside one, or holds one.

    Paths are compared after resolving symbolic links, so a link to the extract is the
    extract. The extract's own files would be foreign to the output folder anyway; this says
    plainly what is wrong, and also catches an output folder inside an extract (which a later
    run could mistake for extract files).

    Raises:
        OutputFolderError: The folder overlaps an input.
    """
    out = folder.resolve()
    for label, path in inputs:
        source = path.resolve()
        if out == source:
            raise OutputFolderError(f"the output folder {folder} is the {label} {path}")
        if _inside(out, source):
            raise OutputFolderError(f"the output folder {folder} is inside the {label} {path}")
        if _inside(source, out):
            raise OutputFolderError(f"the {label} {path} is inside the output folder {folder}")


def check_folder(folder: Path, owner: Owner, *, inputs: Iterable[tuple[str, Path]] = ()) -> None:
    """Refuse to let ``owner`` write into ``folder`` unless it is absent, empty or the tool's.

    Call it before any work is done, so a refused command costs nothing and touches nothing;
    :func:`install` checks again before it moves anything.

    Args:
        folder: The folder the command would write into.
        owner: The command writing.
        inputs: Labelled input paths the folder must not overlap (``("extract", path)``).

    Raises:
        OutputFolderError: The folder overlaps an input, is a file, or holds foreign files.
    """
    check_apart(folder, inputs)
    if not folder.exists() and not folder.is_symlink():
        return
    if not folder.is_dir():
        raise OutputFolderError(f"{folder} exists and is not a folder; ascertain writes folders")
    foreign = foreign_entries(folder, (owner, *SHARES_WITH.get(owner, ())))
    if foreign:
        shown = ", ".join(foreign[:LISTED])
        more = f" and {len(foreign) - LISTED} more" if len(foreign) > LISTED else ""
        raise OutputFolderError(
            f"{folder} holds files ascertain did not write there: {shown}{more}. Nothing was "
            f"written: `ascertain {owner.command}` writes only into a new or empty folder or one "
            "it wrote before; choose another folder or move those files away"
        )


@contextmanager
def staging(folder: Path) -> Iterator[Path]:
    """A hidden sibling folder to write into; removed on leaving, whatever happened.

    A sibling lies on the same file system as the destination, so moving files in is a
    rename, never a copy. The folder is made absolute first: ``.`` (``synth .``, ``report .``)
    is its own ``parent``, so the staging folder would land inside it and be refused as foreign.
    """
    where = Path(os.path.abspath(folder))
    where.parent.mkdir(parents=True, exist_ok=True)
    staged = Path(tempfile.mkdtemp(prefix=f".{where.name}.new-", dir=where.parent))
    try:
        yield staged
    finally:
        shutil.rmtree(staged, ignore_errors=True)


def _remove(folder: Path, names: Iterable[str]) -> None:
    """Remove listed files, then any folder they leave empty (never ``folder`` itself)."""
    parents: set[Path] = set()
    for name in names:
        path = folder / name
        if path.is_symlink() or path.is_file():
            path.unlink()
            parents.update(p for p in path.parents if _inside(p, folder) and p != folder)
    for parent in sorted(parents, key=lambda p: len(p.parts), reverse=True):
        if parent.is_dir() and not any(parent.iterdir()):
            parent.rmdir()


def write_record(staged: Path, owner: Owner, names: Iterable[str]) -> None:
    """Write ``owner``'s record listing ``names`` into the staging folder (sorted, no dates)."""
    record = {
        "written_by": f"ascertain {owner.command}",
        "files": sorted(names),
        "about": "The files ascertain wrote into this folder. A later run replaces or removes "
        "only these; any other file here makes it refuse.",
    }
    text = json.dumps(record, indent=2, sort_keys=True) + "\n"
    (staged / owner.record).write_text(text, encoding="utf-8")


def install(staged: Path, folder: Path, owner: Owner, names: Iterable[str]) -> list[str]:
    """Move a completely written run from ``staged`` into ``folder``.

    Args:
        staged: The staging folder holding every file of the run.
        folder: The destination, checked again with :func:`check_folder` first.
        owner: The command writing; its record (unless it writes its own, as ``build`` does)
            is written here, listing ``names``.
        names: The run's files, relative POSIX paths inside ``staged``.

    Returns:
        Notes for the user: companion files removed because they described older data.

    Raises:
        OutputFolderError: A foreign file appeared in ``folder`` while the run worked.
    """
    names = sorted(set(names) - {owner.record})
    if owner.own_record:
        write_record(staged, owner, names)
    check_folder(folder, owner)
    if not folder.exists():
        staged.rename(folder)
        return []
    notes = []
    for other in REMOVES.get(owner, ()):
        theirs = sorted(n for n in listed_files(folder, other) if (folder / n).exists())
        if theirs:
            tops = sorted({n.split("/")[0] + ("/" if "/" in n else "") for n in theirs})
            shown = [t for t in tops if t != other.record] or [other.record]
            said = " and ".join([", ".join(shown[:-1]), shown[-1]] if len(shown) > 1 else shown)
            _remove(folder, [n for n in theirs if n != other.record] + [other.record])
            notes.append(
                f"{said} in {folder} described the previous {owner.command} and were removed; "
                f"run `ascertain {other.command} {folder}` to write them again"
            )
    stale = listed_files(folder, owner) - {*names, owner.record}
    _remove(folder, sorted(stale))
    for name in [*names, owner.record]:
        target = folder / name
        target.parent.mkdir(parents=True, exist_ok=True)
        os.replace(staged / name, target)
    return notes
