"""Output folders: a command writes only into a folder that is new, empty or its own.

Every case checks that the files ascertain did not write survive byte for byte, and that a
refusal exits with status 2 and names the folder and the foreign files (README, "Output
folders"; pipeline/outputs/_ownership.py).
"""

from __future__ import annotations

import json
import shutil
from collections.abc import Callable
from pathlib import Path

import pytest
from typer.testing import CliRunner

import pipeline.outputs._write as write_module
import pipeline.workflows.prepare as prepare_module
from pipeline.cli import app
from pipeline.errors import EngineError, OutputFolderError
from pipeline.outputs._ownership import REPORT, foreign_entries
from pipeline.outputs.report import write_report
from pipeline.workflows.build import BuildOptions, build_study

from .conftest import DEMO_STUDY, HANDMADE, ROOT
from .helpers import write_study

BUILD_FILES = [
    "attrition.csv",
    "cohort.parquet",
    "dictionary.csv",
    "dictionary.md",
    "manifest.json",
    "population.parquet",
    "quality.csv",
    "run.json",
]


def snapshot(folder: Path) -> dict[str, bytes]:
    """Every file under ``folder`` (hidden ones too) by relative path, with its bytes."""
    return {
        p.relative_to(folder).as_posix(): p.read_bytes()
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    }


def cli(*args: object) -> tuple[int, str]:
    result = CliRunner().invoke(app, [str(a) for a in args])
    return result.exit_code, result.output


def build(out: Path, extract: Path = HANDMADE) -> tuple[int, str]:
    return cli("build", DEMO_STUDY, "--extract", extract, "--out", out, "--quiet")


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """One build of the hand-made extract, copied by the tests that need a previous output."""
    out = tmp_path_factory.mktemp("built") / "out"
    code, output = build(out)
    assert code == 0, output
    return out


@pytest.fixture
def previous(built: Path, tmp_path: Path) -> Path:
    out = tmp_path / "out"
    shutil.copytree(built, out)
    return out


@pytest.fixture
def extract_copy(tmp_path: Path) -> Path:
    """A copy of the hand-made extract: a test that went wrong must not harm the fixture."""
    copy = tmp_path / "extract"
    shutil.copytree(HANDMADE, copy)
    return copy


def no_staging_left(parent: Path) -> bool:
    return not [p for p in parent.iterdir() if p.name.startswith(".") and ".new-" in p.name]


def test_build_refuses_a_folder_with_foreign_files(tmp_path: Path) -> None:
    out = tmp_path / "out"
    (out / "mine").mkdir(parents=True)
    (out / "notes.txt").write_text("my own notes\n")
    (out / ".hidden").write_bytes(b"\x00\x01")
    (out / "mine" / "keep.csv").write_text("a,b\n1,2\n")
    (out / "empty").mkdir()
    before = snapshot(out)
    code, output = build(out)
    assert code == 2
    flat = " ".join(output.split())
    assert str(out) in flat
    for name in (".hidden", "empty/", "mine/", "notes.txt"):
        assert name in flat
    assert snapshot(out) == before
    assert sorted(p.name for p in out.iterdir()) == [".hidden", "empty", "mine", "notes.txt"]
    assert no_staging_left(tmp_path)


def test_refused_build_does_not_start_the_engine(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    def engine_started(*args: object, **kwargs: object) -> None:
        raise AssertionError("the engine started before the output folder was checked")

    monkeypatch.setattr(prepare_module, "make_engine", engine_started)
    (tmp_path / "out").mkdir()
    (tmp_path / "out" / "notes.txt").write_text("mine")
    with pytest.raises(OutputFolderError, match=r"notes\.txt"):
        build_study(DEMO_STUDY, BuildOptions(extract=HANDMADE, out=tmp_path / "out"))


def test_build_into_an_empty_existing_folder(tmp_path: Path) -> None:
    out = tmp_path / "out"
    out.mkdir()
    code, output = build(out)
    assert code == 0, output
    assert sorted(p.name for p in out.iterdir()) == BUILD_FILES


def test_out_equal_to_the_extract_is_refused(extract_copy: Path) -> None:
    before = snapshot(extract_copy)
    code, output = build(extract_copy, extract_copy)
    assert code == 2
    assert "is the extract" in output
    assert snapshot(extract_copy) == before


def test_out_through_a_link_to_the_extract_is_refused(extract_copy: Path, tmp_path: Path) -> None:
    link = tmp_path / "link"
    link.symlink_to(extract_copy, target_is_directory=True)
    before = snapshot(extract_copy)
    code, output = build(link, extract_copy)
    assert code == 2
    assert "is the extract" in output
    assert snapshot(extract_copy) == before


def test_out_inside_the_extract_is_refused(extract_copy: Path) -> None:
    before = snapshot(extract_copy)
    code, output = build(extract_copy / "out", extract_copy)
    assert code == 2
    assert "is inside the extract" in " ".join(output.split())
    assert not (extract_copy / "out").exists()
    assert snapshot(extract_copy) == before


def test_extract_inside_out_is_refused(tmp_path: Path) -> None:
    work = tmp_path / "work"
    shutil.copytree(HANDMADE, work / "extract")
    before = snapshot(work)
    code, output = build(work, work / "extract")
    assert code == 2
    assert "is inside the output folder" in " ".join(output.split())
    assert snapshot(work) == before


def test_study_and_definitions_inside_out_are_not_touched(tmp_path: Path) -> None:
    folder = tmp_path / "project"
    text = (ROOT / "definitions" / "conditions" / "heart_failure.yaml").read_text()
    study = write_study(folder, {"heart_failure": text}, ["heart_failure"], extract=HANDMADE)
    before = snapshot(folder)
    code, output = cli("build", study, "--out", folder, "--quiet")
    assert code == 2
    flat = " ".join(output.split())
    assert "study.yaml" in flat
    assert "conditions/" in flat
    assert snapshot(folder) == before


def test_rebuild_replaces_only_tool_files_and_removes_stale_ones(previous: Path) -> None:
    # A file an earlier build listed in its manifest but this build no longer writes.
    manifest = json.loads((previous / "manifest.json").read_text())
    manifest["outputs"]["retired_table.csv"] = "0" * 64
    (previous / "manifest.json").write_text(json.dumps(manifest))
    (previous / "retired_table.csv").write_text("old\n")
    first = snapshot(previous)
    code, output = build(previous)
    assert code == 0, output
    assert sorted(p.name for p in previous.iterdir()) == BUILD_FILES
    again = snapshot(previous)
    for name in BUILD_FILES:
        if name not in ("run.json", "manifest.json"):
            assert again[name] == first[name], name
    assert no_staging_left(previous.parent)


def test_rebuild_removes_the_previous_report_with_a_note(previous: Path) -> None:
    write_report(previous)
    assert (previous / "report.html").is_file()
    code, output = build(previous)
    assert code == 0, output
    flat = " ".join(output.split())
    assert "report.html and summary/" in flat
    assert f"ascertain report {previous}" in flat
    assert sorted(p.name for p in previous.iterdir()) == BUILD_FILES


def test_report_refuses_to_overwrite_a_foreign_report(previous: Path) -> None:
    (previous / "report.html").write_text("<p>my own report</p>")
    before = snapshot(previous)
    code, output = cli("report", previous)
    assert code == 2
    flat = " ".join(output.split())
    assert "report.html" in flat
    assert str(previous) in flat
    assert snapshot(previous) == before


def test_report_refuses_a_foreign_summary_file(previous: Path) -> None:
    write_report(previous)
    (previous / "summary" / "mine.csv").write_text("x\n1\n")
    before = snapshot(previous)
    with pytest.raises(OutputFolderError, match=r"summary/mine\.csv"):
        write_report(previous)
    assert snapshot(previous) == before


def test_report_replaces_its_own_files(previous: Path) -> None:
    write_report(previous)
    first = snapshot(previous)
    (previous / "summary" / "flow.csv").write_text("edited\n")
    code, output = cli("report", previous)
    assert code == 0, output
    assert snapshot(previous) == first
    assert foreign_entries(previous, (REPORT,)) == BUILD_FILES


@pytest.mark.parametrize("how", ["up", "absolute", "climbing"])
def test_an_edited_record_cannot_reach_outside_the_folder(previous: Path, how: str) -> None:
    write_report(previous)
    victim = previous.parent / "victim.txt"
    victim.write_text("not the tool's")
    entry = {"up": "../victim.txt", "absolute": str(victim), "climbing": "summary/../../victim.txt"}
    record = previous / REPORT.record
    data = json.loads(record.read_text())
    data["files"].append(entry[how])
    record.write_text(json.dumps(data))
    code, output = build(previous)
    assert code == 0, output
    assert victim.read_text() == "not the tool's"


def test_a_failed_build_leaves_the_previous_output_byte_identical(
    previous: Path,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    study_copy: Callable[[str], Path],
) -> None:
    write_report(previous)
    before = snapshot(previous)
    bad = study_copy(DEMO_STUDY.read_text().replace("horizon_days", "horizon_dayz"))
    code, output = cli("build", bad, "--extract", HANDMADE, "--out", previous, "--quiet")
    assert code == 2
    assert "horizon_dayz" in output
    assert snapshot(previous) == before

    def fail_while_writing(*args: object, **kwargs: object) -> None:
        raise EngineError("disk full while writing the dictionary")

    monkeypatch.setattr(write_module, "write_dictionary", fail_while_writing)
    with pytest.raises(EngineError):
        build_study(DEMO_STUDY, BuildOptions(extract=HANDMADE, out=previous))
    assert snapshot(previous) == before
    assert no_staging_left(tmp_path)


def test_synth_refuses_a_folder_that_is_not_its_own(tmp_path: Path) -> None:
    out = tmp_path / "data"
    out.mkdir()
    (out / "patients.csv").write_text("patient_id\n1\n")
    before = snapshot(out)
    code, output = cli("synth", out, "--patients", 20, "--seed", 3)
    assert code == 2
    assert "patients.csv" in output
    assert str(out) in " ".join(output.split())
    assert snapshot(out) == before


def test_synth_over_its_own_extract_removes_files_it_no_longer_writes(tmp_path: Path) -> None:
    out = tmp_path / "data"
    assert cli("synth", out, "--patients", 20, "--seed", 3)[0] == 0
    assert (out / "patients.parquet").is_file()
    code, output = cli("synth", out, "--patients", 20, "--seed", 3, "--format", "csv")
    assert code == 0, output
    assert not (out / "patients.parquet").exists()
    assert (out / "patients.csv").is_file()
    assert foreign_entries(out, ()) == sorted(
        [f"{t}.csv" for t in ("diagnoses", "encounters", "measurements", "patients")]
        + ["ascertain-synth.json", "prescriptions.csv", "scenario.json", "truth.parquet"]
    )


def test_profile_refuses_a_foreign_folder_and_the_extract(
    extract_copy: Path, tmp_path: Path
) -> None:
    out = tmp_path / "look"
    out.mkdir()
    (out / "profile.json").write_text("{}")
    before = snapshot(out)
    code, output = cli("profile", extract_copy, "--out", out)
    assert code == 2
    assert "profile.json" in output
    assert snapshot(out) == before
    extract_before = snapshot(extract_copy)
    code, output = cli("profile", extract_copy, "--out", extract_copy)
    assert code == 2
    assert "is the extract" in output
    assert snapshot(extract_copy) == extract_before


def test_profile_rewrites_its_own_folder(extract_copy: Path, tmp_path: Path) -> None:
    out = tmp_path / "look"
    assert cli("profile", extract_copy, "--out", out)[0] == 0
    first = snapshot(out)
    code, output = cli("profile", extract_copy, "--out", out)
    assert code == 0, output
    assert snapshot(out) == first
    assert sorted(first) == ["ascertain-profile.json", "profile.html", "profile.json"]


@pytest.mark.parametrize(
    "args",
    [
        ["sql", str(DEMO_STUDY), "--dialect", "no_such_dialect"],
        ["sql", str(DEMO_STUDY), "--stage", "no_such_stage"],
        ["build", "no_such_study.yaml"],
        ["build", str(DEMO_STUDY), "--threads", "0"],
        ["synth", "unused", "--format", "xml"],
        ["explain", str(DEMO_STUDY), "--patient", "1", "--format", "xml"],
        ["report", "no_such_folder"],
        ["diff", "no_such_a", "no_such_b"],
        ["verify", "no_such_folder"],
    ],
)
def test_refused_input_exits_2(args: list[str], tmp_path: Path) -> None:
    assert cli(*args)[0] == 2


def test_a_negative_answer_exits_1(study_copy: Callable[[str], Path]) -> None:
    bad = study_copy(DEMO_STUDY.read_text().replace("horizon_days", "horizon_dayz"))
    code, output = cli("check", bad)
    assert code == 1, output
    assert "horizon_dayz" in output


def test_an_operating_system_error_exits_2(monkeypatch: pytest.MonkeyPatch) -> None:
    import pipeline.cli as cli_module

    def denied(*args: object, **kwargs: object) -> None:
        raise PermissionError(13, "Permission denied", "out")

    monkeypatch.setattr(cli_module, "build_study", denied)
    code, output = cli("build", DEMO_STUDY, "--quiet")
    assert code == 2
    assert "Permission denied" in output


def test_a_manifest_not_written_by_ascertain_owns_nothing(tmp_path: Path) -> None:
    out = tmp_path / "out"
    out.mkdir()
    (out / "manifest.json").write_text('{"outputs": {"data.csv": "x"}}')
    (out / "data.csv").write_text("mine\n")
    before = snapshot(out)
    code, output = build(out)
    assert code == 2
    assert "data.csv" in output
    assert snapshot(out) == before


def test_writing_into_the_current_folder_stages_beside_it(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """``synth .`` in an empty folder (and ``report .`` in a build) must not stage inside it."""
    here = tmp_path / "here"
    here.mkdir()
    monkeypatch.chdir(here)
    code, output = cli("synth", ".", "--patients", 20, "--seed", 3)
    assert code == 0, output
    assert (here / "ascertain-synth.json").is_file()
    assert not [p for p in here.iterdir() if p.name.startswith(".")]
    assert no_staging_left(tmp_path)
