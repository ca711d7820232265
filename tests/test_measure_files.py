"""Measures defined in YAML files: the shipped ones, a study's own, and their errors.

Serum urate is added by a file only (no code change). Its factor, 1 mg/dL = 59.48 umol/L, is
from memory: the molar mass of uric acid is 168.11 g/mol, so 1 mg/dL = 10 mg/L / 168.11 g/mol
= 59.48 umol/L.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.compile import compile_study
from pipeline.compile._context import evidence_number
from pipeline.config import load_study, shipped_measures
from pipeline.engine import DuckDBEngine
from pipeline.errors import ConfigError
from pipeline.extract import discover_extract
from pipeline.extract.readers.fhir import LOINC_MEASURES
from pipeline.outputs import sha256_file
from pipeline.workflows.build import BuildOptions, build_study

from .helpers import eligible_encounters, eligible_patient, write_extract, write_study

URATE = """\
measure: urate
title: Serum urate
canonical_unit: umol/L
plausible: [30, 1500]
codes: {LOINC: ["3084-1"]}
units:
  - spellings: [umol/L, µmol/L]
  - spellings: [mg/dL]
    factor: 59.48
    source: molar mass of uric acid 168.11 g/mol (from memory)
"""

GOUT = """\
condition: gout
title: Gout (test)
about: a gout-like definition reading urate in either unit
provenance: {adapts: "our own, for this test", icd_edition: "ICD-10 (WHO)", version: "1",
             date: 2026-01-01}
evidence:
  urate_umol: {measurement: {measure: urate, at_least: 420 umol/L}}
  urate_mg: {measurement: {measure: urate, at_least: 7 mg/dL}}
rules:
  - {name: high urate, need: {urate_umol: 1}}
  - {name: high urate in mg, need: {urate_mg: 1}}
"""

# (patient, value, unit, at or above both thresholds). 420 umol/L is 7.061 mg/dL and 7 mg/dL is
# 416.36 umol/L: no value here lies between the two, so both select the same rows.
URATE_ROWS = [
    ("P1", "450", "umol/L", True),
    ("P2", "6.5", "mg/dL", False),  # 386.6 umol/L
    ("P3", "7.2", "mg/dL", True),  # 428.3 umol/L
    ("P4", "400", "µmol/L", False),
    ("P5", "7.07", "mg/dL", True),  # 420.5 umol/L
    ("P6", "415", "umol/L", False),
]


def _urate_study(tmp_path: Path, conditions: dict[str, str] | None = None) -> Path:
    measures = tmp_path / "study" / "measures"
    measures.mkdir(parents=True)
    (measures / "urate.yaml").write_text(URATE, encoding="utf-8")
    patients = [eligible_patient(p) for p, *_ in URATE_ROWS]
    encounters = [e for p, *_ in URATE_ROWS for e in eligible_encounters(p)]
    rows = [
        {"patient_id": p, "obs_date": "2016-05-01", "measure": "urate", "value": v, "unit": u}
        for p, v, u, _ in URATE_ROWS
    ]
    extract = write_extract(
        tmp_path / "x", {"patients": patients, "encounters": encounters, "measurements": rows}
    )
    study = write_study(tmp_path / "study", conditions or {"gout": GOUT}, ["gout"], extract=extract)
    study.write_text(study.read_text(encoding="utf-8") + "measures: [measures]\n", "utf-8")
    return study


def test_urate_added_by_a_file_both_units_select_the_same_rows(tmp_path: Path) -> None:
    study = _urate_study(tmp_path)
    plan = compile_study(load_study(study)).through("evidence_events")
    events = DuckDBEngine(threads=1).run(plan, discover_extract(tmp_path / "x", plan.sources))
    rows = events.outputs["evidence_events"].to_pylist()
    by_key = {
        key: {r["patient_id"] for r in rows if r["evidence"] == evidence_number(key)}
        for key in ("gout.urate_umol", "gout.urate_mg")
    }
    expected = {p for p, *_, high in URATE_ROWS if high}
    assert by_key["gout.urate_umol"] == expected
    assert by_key["gout.urate_mg"] == expected


def test_urate_unknown_without_the_study_measures(tmp_path: Path) -> None:
    study = _urate_study(tmp_path)
    study.write_text(study.read_text("utf-8").replace("measures: [measures]\n", ""), "utf-8")
    with pytest.raises(ConfigError, match=r"unknown measure 'urate'"):
        load_study(study)


def test_shipped_measures_keep_their_conversions() -> None:
    measures = shipped_measures()
    # the same numbers the registry held in code before they moved to files
    assert measures.threshold("hba1c", "at_least", "48 mmol/mol").canonical_value == 6.54304
    creatinine = measures["creatinine"].conversion("μmol/L")
    assert creatinine is not None
    assert (creatinine.factor, creatinine.divisor) == (1.0, 88.42)
    assert measures["smoking"].categories == ("current", "former", "never")
    assert measures.names() == [
        *("bmi", "creatinine", "dbp", "egfr", "fasting_glucose", "hba1c", "height", "ldl"),
        *("sbp", "smoking", "total_cholesterol", "weight"),
    ]


def test_shipped_loinc_codes_agree_with_the_fhir_reader() -> None:
    # the FHIR reader's own table (read without a plan: the synthetic writer) must say the same
    from_files = {
        code: m.name
        for m in shipped_measures().measures.values()
        for system, code in m.codes
        if system == "LOINC"
    }
    assert from_files == LOINC_MEASURES


def _check(*args: str) -> tuple[int, str]:
    result = CliRunner().invoke(app, ["check", *args])
    return result.exit_code, result.output


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        (
            URATE.replace("canonical_unit", "canonical_unti"),
            "urate.yaml:3:1 [unknown-key] unknown key 'canonical_unti'; did you mean "
            "'canonical_unit'?",
        ),
        (
            URATE.replace("[mg/dL]", "[mg/dL, umol/L]"),
            "urate.yaml:8:24 [duplicate-unit] unit 'umol/L' is already listed in units[0] of "
            "measure 'urate'",
        ),
        (
            URATE.replace("59.48", "-59.48"),
            "urate.yaml:9:13 [bad-value] units[1].factor: factor must be more than 0 (got -59.48)",
        ),
        (
            URATE.replace("[30, 1500]", "[1500, 30]"),
            "urate.yaml:4:1 [bad-value] plausible: the plausible range starts (1500) above "
            "where it ends (30)",
        ),
        (
            URATE.replace("canonical_unit: umol/L", "canonical_unit: mmol/L"),
            "urate.yaml:3:17 [canonical-unit] the canonical unit 'mmol/L' must be listed under "
            "units without a factor, divisor or offset (a value in it is kept as it is)",
        ),
    ],
)
def test_measure_file_errors(tmp_path: Path, text: str, expected: str) -> None:
    (tmp_path / "urate.yaml").write_text(text, encoding="utf-8")
    code, output = _check(str(tmp_path))
    assert code == 1, output
    assert expected in output


def test_measure_defined_twice_names_both_files(tmp_path: Path) -> None:
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    (tmp_path / "a" / "urate.yaml").write_text(URATE, encoding="utf-8")
    (tmp_path / "b" / "uric_acid.yaml").write_text(URATE, encoding="utf-8")
    code, output = _check(str(tmp_path / "a"), str(tmp_path / "b"))
    assert code == 1
    assert (
        f"{tmp_path / 'b' / 'uric_acid.yaml'}:1:10 [duplicate-measure] measure 'urate' is "
        f"already defined in {tmp_path / 'a' / 'urate.yaml'}"
    ) in output


def test_a_loinc_code_names_one_measure(tmp_path: Path) -> None:
    # FHIR observations and local lab tables are read by LOINC code, so a second measure
    # claiming a code would make the reading depend on which file sorts last.
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    (tmp_path / "a" / "urate.yaml").write_text(URATE, encoding="utf-8")
    twin = URATE.replace("measure: urate", "measure: uric_acid")
    (tmp_path / "b" / "uric_acid.yaml").write_text(twin, encoding="utf-8")
    code, output = _check(str(tmp_path / "a"), str(tmp_path / "b"))
    assert code == 1
    assert (
        f"{tmp_path / 'b' / 'uric_acid.yaml'}:5:9 [duplicate-code] LOINC code 3084-1 is already "
        f"the code of measure 'urate' ({tmp_path / 'a' / 'urate.yaml'})"
    ) in output


def test_a_study_cannot_redefine_a_shipped_measure(tmp_path: Path) -> None:
    study = _urate_study(tmp_path)
    hba1c = URATE.replace("measure: urate", "measure: hba1c")
    (tmp_path / "study" / "measures" / "urate.yaml").write_text(hba1c, encoding="utf-8")
    with pytest.raises(ConfigError, match=r"\[duplicate-measure\] measure 'hba1c' is already "):
        load_study(study)


def test_derivation_inputs_keep_their_canonical_unit(tmp_path: Path) -> None:
    creatinine = (
        "measure: creatinine\ntitle: c\ncanonical_unit: umol/L\nplausible: [10, 2000]\n"
        "units:\n  - spellings: [umol/L]\n"
    )
    (tmp_path / "creatinine.yaml").write_text(creatinine, encoding="utf-8")
    code, output = _check(str(tmp_path))
    assert code == 1
    assert "creatinine.yaml:3:17 [derivation-unit]" in output


HBA1C_IN_WRONG_UNIT = """\
condition: diabetes_slip
title: Diabetes with a slipped unit
about: the HbA1c threshold is written in mmol/mol but meant in percent
provenance: {adapts: "our own, for this test", icd_edition: "ICD-10 (WHO)", version: "1",
             date: 2026-01-01}
evidence:
  a1c_high: {measurement: {measure: hba1c, at_least: 6.5 mmol/mol}}
rules:
  - {name: one high value, need: {a1c_high: 1}}
"""


def test_check_warns_of_a_threshold_outside_the_plausible_range(tmp_path: Path) -> None:
    file = tmp_path / "diabetes_slip.yaml"
    file.write_text(HBA1C_IN_WRONG_UNIT, encoding="utf-8")
    code, output = _check(str(file))
    # 6.5 mmol/mol by the master equation: 0.09148 * 6.5 + 2.152 = 2.74662 %
    assert output.splitlines() == [
        f"warning: {file}:7:54 [implausible-threshold] evidence 'a1c_high': at_least "
        "6.5 mmol/mol is 2.74662 % for hba1c, outside its plausible range 3 to 20 %; was "
        "6.5 % meant?",
        "1 files checked, 0 problems, 1 warnings",
    ]
    assert code == 0  # a warning, not a problem


def test_manifest_hashes_every_measure_file(tmp_path: Path) -> None:
    study = _urate_study(tmp_path)
    out = tmp_path / "out"
    build_study(study, BuildOptions(out=out, threads=1))
    manifest = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
    entries = {e["path"]: e["sha256"] for e in manifest["measures"]}
    own = tmp_path / "study" / "measures" / "urate.yaml"
    assert entries["measures/urate.yaml"] == sha256_file(own)
    shipped = shipped_measures().files
    assert {f"library:measures/{f.name}" for f in shipped.values()} <= set(entries)
    assert entries["library:measures/hba1c.yaml"] == sha256_file(shipped["hba1c"])
    assert len(entries) == len(shipped) + 1


ABSENT_CODE = """\
condition: gout_code
title: Gout by code (test)
about: a code no row of the test extract carries
provenance: {adapts: "our own, for this test", icd_edition: "ICD-10 (WHO)", version: "1",
             date: 2026-01-01}
evidence:
  code: {diagnosis: {ICD10: [M10]}}
rules:
  - {name: one code, need: {code: 1}}
"""


def test_a_definition_matching_no_row_is_a_warning(tmp_path: Path) -> None:
    study = _urate_study(tmp_path, {"gout": GOUT, "gout_code": ABSENT_CODE})
    text = study.read_text("utf-8").replace("conditions: [gout]", "conditions: [gout, gout_code]")
    study.write_text(text, "utf-8")
    expected = (
        "outcome 'gout_code': the definition 'gout_code' matches no row of the extract "
        "(evidence gout_code.code); every patient comes out without it"
    )
    result = build_study(study, BuildOptions(out=tmp_path / "out", threads=1))
    assert result.warnings == [expected]  # gout matched (P1, P3, P5), so it is not named
    run = json.loads((tmp_path / "out" / "run.json").read_text(encoding="utf-8"))
    assert run["unmatched_definitions"] == [
        {"use": "outcome 'gout_code'", "definition": "gout_code", "evidence": ["gout_code.code"]}
    ]
    code, output = _check(str(study), "--extract", str(tmp_path / "x"))
    assert code == 0, output
    assert f"warning: {study}: {expected}" in output.replace("\n", " ")
