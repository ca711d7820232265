"""run.json states DuckDB's memory limit, where it came from, and each stage's peak memory."""

from __future__ import annotations

import json
import os
from pathlib import Path

import pytest

from pipeline.engine.duckdb import machine_memory_limit
from pipeline.workflows.build import BuildOptions, build_study

from .conftest import DEMO_STUDY, HANDMADE
from .helpers import demo_study_variant


def _run_json(study: Path, out: Path, memory_limit: str | None = None) -> dict:
    build_study(study, BuildOptions(extract=HANDMADE, out=out, memory_limit=memory_limit))
    return json.loads((out / "run.json").read_text(encoding="utf-8"))


def test_machine_default_is_half_the_memory(tmp_path: Path) -> None:
    run = _run_json(DEMO_STUDY, tmp_path / "out")
    assert run["engine"]["memory_limit_from"] == "machine"
    half_mib = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") // 2 // 2**20
    assert machine_memory_limit() == f"{half_mib}MiB"
    # DuckDB states the limit in its own words, e.g. "11.7 GiB" for 11974MiB.
    number, unit = run["engine"]["memory_limit"].split()
    assert unit == "GiB" or unit == "MiB"
    stated = float(number) * (1024 if unit == "GiB" else 1)
    assert abs(stated - half_mib) <= 0.01 * half_mib
    manifest = (tmp_path / "out" / "manifest.json").read_text(encoding="utf-8")
    assert "memory_limit" not in manifest  # the manifest is the same on every machine


def test_option_and_study_limits_are_stated(tmp_path: Path) -> None:
    run = _run_json(DEMO_STUDY, tmp_path / "a", memory_limit="1GB")
    assert run["engine"]["memory_limit_from"] == "option"
    assert run["engine"]["memory_limit"] == "953.6 MiB"  # DuckDB: 1GB is 10^9 bytes
    study = demo_study_variant(tmp_path / "s")
    study.write_text(
        study.read_text(encoding="utf-8") + "\nengine: {memory_limit: 2GB}\n", encoding="utf-8"
    )
    run = _run_json(study, tmp_path / "b")
    assert run["engine"]["memory_limit_from"] == "study"
    assert run["engine"]["memory_limit"] == "1.8 GiB"
    run = _run_json(study, tmp_path / "c", memory_limit="1GB")  # the option wins
    assert run["engine"]["memory_limit_from"] == "option"


def test_platform_without_memory_figures_keeps_duckdbs_default(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    def no_sysconf(name: str) -> int:
        raise ValueError(name)

    monkeypatch.setattr(os, "sysconf", no_sysconf)
    assert machine_memory_limit() is None


def test_every_stage_states_its_memory(tmp_path: Path) -> None:
    run = _run_json(DEMO_STUDY, tmp_path / "out")
    memory = {s["name"]: s["memory_bytes"] for s in run["stages"]}
    assert all(isinstance(m, int) and m >= 0 for m in memory.values()), memory
    assert max(memory.values()) > 0
