"""Shareable outputs name no machine path, and ``verify`` rebuilds where the inputs moved."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.outputs import portable_path, read_manifest

from .conftest import DEMO_STUDY, HANDMADE, ROOT
from .test_mapping import _site

STUDY_NAME = DEMO_STUDY.name


def _run(*args: str | Path) -> tuple[int, str]:
    result = CliRunner().invoke(app, [str(a) for a in args])
    return result.exit_code, result.output


def _project(root: Path, *, extract_at: str = "extract") -> tuple[Path, Path]:
    """Copy the definitions and the hand-made extract under ``root``: (study, extract)."""
    shutil.copytree(ROOT / "definitions", root / "definitions")
    extract = root / extract_at
    shutil.copytree(HANDMADE, extract, ignore=shutil.ignore_patterns("expected_*", "*.md"))
    return root / "definitions" / "studies" / STUDY_NAME, extract


@pytest.fixture
def built(tmp_path: Path) -> tuple[Path, Path, Path]:
    """A project under tmp_path/site_a, built into site_a/out: (study, extract, out)."""
    study, extract = _project(tmp_path / "site_a")
    out = tmp_path / "site_a" / "out"
    code, output = _run("build", study, "--extract", extract, "--out", out, "--quiet")
    assert code == 0, output
    return study, extract, out


def test_shareable_files_name_no_machine_path(
    built: tuple[Path, Path, Path], tmp_path: Path
) -> None:
    _, extract, out = built
    code, output = _run("report", out)
    assert code == 0, output
    code, output = _run("profile", extract, "--out", tmp_path / "site_a" / "profile")
    assert code == 0, output
    shared = [
        out / "manifest.json",
        out / "run.json",
        out / "quality.csv",
        out / "report.html",
        *sorted((out / "summary").glob("*.csv")),
        tmp_path / "site_a" / "profile" / "profile.json",
        tmp_path / "site_a" / "profile" / "profile.html",
    ]
    assert len(shared) == 11  # 5 summary tables
    private = [str(tmp_path), str(tmp_path.resolve()), str(ROOT)]
    home = str(Path.home())
    if len(Path(home).parts) > 1:  # a home of "/" would match every absolute path
        private.append(home)
    for file in shared:
        text = file.read_text(encoding="utf-8")
        for path in private:
            assert path not in text, f"{file.name} holds {path}"
    report = (out / "report.html").read_text(encoding="utf-8")
    # The report found the study from the output folder alone and names definitions
    # relative to the study's folder.
    assert "could not be read" not in report
    assert "../conditions/heart_failure.yaml" in report
    assert json.loads((out / "run.json").read_text(encoding="utf-8"))["study_file"] == STUDY_NAME
    profile = json.loads((tmp_path / "site_a" / "profile" / "profile.json").read_text("utf-8"))
    assert profile["extract"] == "extract"


def test_verify_on_another_layout_is_identical_then_names_a_changed_file(
    built: tuple[Path, Path, Path], tmp_path: Path
) -> None:
    study, extract, out = built
    # Another machine: a different root, the study and output folder as they were relative to
    # each other, and the extract somewhere else altogether, named with --extract.
    elsewhere = tmp_path / "site_b" / "work"
    shutil.copytree(study.parent.parent, elsewhere / "definitions")
    shutil.copytree(out, elsewhere / "out")
    data = tmp_path / "data" / "delivered" / "orvane"
    shutil.copytree(extract, data)
    shutil.rmtree(tmp_path / "site_a")  # nothing of the first layout is left to find
    code, output = _run("verify", elsewhere / "out", "--extract", data)
    assert code == 0, output
    assert "identical" in output
    with (data / "diagnoses.csv").open("a", encoding="utf-8") as handle:
        handle.write("HM-001,2016-05-05,ICD10,I50.9,billing\n")
    code, output = _run("verify", elsewhere / "out", "--extract", data)
    assert code == 1, output
    assert "changed input: extract file diagnoses.csv has changed since the build" in output
    assert "identical" not in output


def test_verify_with_the_study_named_then_a_new_definition_file(
    built: tuple[Path, Path, Path], tmp_path: Path
) -> None:
    study, extract, out = built
    moved = tmp_path / "elsewhere" / "s"
    shutil.copytree(study.parent.parent, moved)
    code, output = _run(
        "verify", out, "--study", moved / "studies" / STUDY_NAME, "--extract", extract
    )
    assert code == 0, output
    (moved / "conditions" / "extra_note.yaml").write_text(
        (moved / "conditions" / "heart_failure.yaml")
        .read_text(encoding="utf-8")
        .replace("condition: heart_failure", "condition: heart_failure_copy"),
        encoding="utf-8",
    )
    code, output = _run(
        "verify", out, "--study", moved / "studies" / STUDY_NAME, "--extract", extract
    )
    assert code == 1, output
    assert "definitions file ../conditions/extra_note.yaml was not there at the build" in output


def test_verify_refuses_when_the_study_cannot_be_found(
    built: tuple[Path, Path, Path], tmp_path: Path
) -> None:
    _, _, out = built
    copy = tmp_path / "copied" / "out"
    shutil.copytree(out, copy)
    code, output = _run("verify", copy)
    assert code == 2
    assert f"the study file {STUDY_NAME} is not there; pass --study FILE" in output


def test_verify_refuses_when_the_recorded_extract_is_gone(
    built: tuple[Path, Path, Path],
) -> None:
    _, extract, out = built
    shutil.rmtree(extract)
    code, output = _run("verify", out)
    assert code == 2
    assert "pass --extract DIR" in output


def test_a_manifest_with_machine_paths_is_read_in_the_portable_layout(
    built: tuple[Path, Path, Path],
) -> None:
    study, extract, out = built
    portable = read_manifest(out)
    # The first layout, as written before: absolute paths and the extract folder.
    old = {k: v for k, v in portable.items() if k not in ("manifest_version", "locations")}
    old["study"] = [{**portable["study"][0], "path": str(study)}]
    old["definitions"] = [
        {**e, "path": str((study.parent / e["path"]).resolve())} for e in portable["definitions"]
    ]
    old["extract"] = [{**e, "path": str(extract / e["path"])} for e in portable["extract"]]
    old["extract_folder"] = str(extract)
    (out / "manifest.json").write_text(json.dumps(old), encoding="utf-8")
    assert read_manifest(out) == portable
    code, output = _run("verify", out)
    assert code == 0, output  # manifest.json is not among the outputs it hashes
    assert "identical" in output


def test_a_mapping_file_is_an_input_and_mapped_files_are_relative_to_it(tmp_path: Path) -> None:
    mapping = _site(tmp_path / "northside", dates="%d/%m/%Y", parquet=False)
    study, _ = _project(tmp_path / "p")
    out = tmp_path / "p" / "out"
    code, output = _run("build", study, "--extract", mapping, "--out", out, "--quiet")
    assert code == 0, output
    manifest = read_manifest(out)
    assert manifest["locations"]["extract_kind"] == "mapping file"
    assert manifest["locations"]["extract_from_study"] == "../../../northside/mapping.yaml"
    assert {e["path"] for e in manifest["extract"]} == {
        "mapping.yaml",
        "people.csv",
        "contacts.csv",
        "problems.csv",
        "meds.csv",
        "labs.csv",
    }
    code, output = _run("verify", out)
    assert code == 0, output
    mapping.write_text(mapping.read_text(encoding="utf-8") + "# a comment\n", encoding="utf-8")
    code, output = _run("verify", out)
    assert code == 1
    assert "changed input: extract file mapping.yaml has changed since the build" in output


# Made-up paths: portable_path only compares their parts and never touches the disk.
@pytest.mark.parametrize(
    ("path", "base", "home", "expected"),
    [
        (
            "/data/proj/conditions/ckd.yaml",
            "/data/proj/studies",
            "/users/x",
            "../conditions/ckd.yaml",
        ),
        ("/data/proj/studies/s.yaml", "/data/proj/studies", "/users/x", "s.yaml"),
        ("/users/x/p/defs/a.yaml", "/users/x/p/out", "/users/x", "../defs/a.yaml"),
        ("/users/x/a/s.yaml", "/users/x/b/out", "/users/x", "../../a/s.yaml"),
        # The common ancestor is the root, a top folder or above the home: no path.
        ("/users/x/s.yaml", "/srv/out", "/users/x", None),
        ("/srv/a/s.yaml", "/srv/b/out", "/users/x", None),
        ("/data/users/x/s.yaml", "/data/users/y/out", "/data/users/x", None),
    ],
)
def test_portable_path_names_no_private_folder(
    path: str, base: str, home: str, expected: str | None, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("HOME", home)
    assert portable_path(Path(path), Path(base)) == expected
