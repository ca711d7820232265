"""What ``verify`` reads and concludes: where a build's inputs are, and what differs on rebuild.

The rebuild itself is a build (:mod:`pipeline.workflows.verify`); this module only reads
manifests and files: :func:`locate_inputs` finds the study and the extract from the hints a
manifest records, and :func:`compare_rebuild` compares the two manifests and the files left in
the folder.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

from pipeline.errors import AscertainError
from pipeline.outputs._manifest import changed_inputs, sha256_file

# How a manifest records an extract on a Hadoop file system: by scheme and name only.
HADOOP_KINDS = ("hadoop folder", "hadoop mapping file")


@dataclass(frozen=True)
class VerifyResult:
    """What ``verify`` found: changed inputs and output files that differ on rebuild."""

    changed_inputs: list[str]
    differing_outputs: list[str]

    @property
    def identical(self) -> bool:
        """Whether the rebuild reproduced every output file bit for bit."""
        return not self.changed_inputs and not self.differing_outputs


def locate_inputs(
    folder: Path, manifest: dict[str, Any], study: Path | None, extract: Path | str | None
) -> tuple[Path, Path | str | None]:
    """Where the study and the extract to rebuild from are on this machine.

    The study is ``study`` if given, else the manifest's hint (the study file relative to the
    output folder). The extract is ``extract`` if given, else the manifest's hint (the extract
    the build read, relative to the study's folder), else ``None``: the study's own
    ``extract:``. A database source is found by its recorded URI (no password).

    Raises:
        AscertainError: The study or the recorded extract cannot be found on this machine.
    """
    name = manifest["study"][0]["path"]
    locations = manifest.get("locations", {})
    if study is None:
        hint = locations.get("study_from_output")
        if hint is None:
            raise AscertainError(
                f"{folder}: the manifest does not say where the study file {name} is "
                "(it was too far from the output folder to record); pass --study FILE"
            )
        study = folder.resolve() / hint  # the hint was made from the resolved folder
    if not study.is_file():
        raise AscertainError(f"{study}: the study file {name} is not there; pass --study FILE")
    if extract is None and locations.get("extract_kind") in HADOOP_KINDS:
        raise AscertainError(
            f"{folder}: the build read the extract '{locations.get('extract_name')}' on "
            f"{locations.get('extract_scheme')}://, and the manifest keeps no server address; "
            "pass --extract URI"
        )
    if extract is None and locations.get("extract_uri") is not None:
        return study, str(locations["extract_uri"])
    if extract is None and locations.get("extract_from_study") is not None:
        extract = study.resolve().parent / locations["extract_from_study"]
        if not extract.exists():
            raise AscertainError(
                f"{extract}: the extract the build read ({locations['extract_from_study']} "
                "from the study's folder) is not there; pass --extract DIR"
            )
    return study, extract


def compare_rebuild(folder: Path, manifest: dict[str, Any], again: dict[str, Any]) -> VerifyResult:
    """Compare a folder's manifest with its rebuild's, and the folder's files with the first.

    Args:
        folder: The output folder verified.
        manifest: Its manifest (as :func:`pipeline.outputs.read_manifest` returns it).
        again: The manifest of the rebuild.

    Returns:
        The inputs that changed, and every output that differs: in the rebuild, in the folder
        (a file changed since the build), or the plan.
    """
    changes = changed_inputs(manifest, again)
    differing = [
        name
        for name in sorted(set(manifest["outputs"]) | set(again["outputs"]))
        if manifest["outputs"].get(name) != again["outputs"].get(name)
    ]
    for name in sorted(manifest["outputs"]):
        path = folder / name
        if not path.is_file() or sha256_file(path) != manifest["outputs"][name]:
            differing.append(f"{name} (the file in the folder no longer matches the manifest)")
    if again["plan_hash"] != manifest["plan_hash"]:
        differing.append("the plan (the study or a definition compiles differently now)")
    return VerifyResult(changes, differing)
