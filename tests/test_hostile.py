"""Hostile extract files: each is read correctly, counted in the quality log, or refused.

Every test builds the demo study on a copy of the handmade extract with one file made hostile.
A refusal is an ``ExtractError`` naming the file (and the line for a row problem), shown by the
CLI as one message with exit code 2 and no output written; a build that succeeds read exactly
the data lines written and accounted for each of them in the quality log.
"""

from __future__ import annotations

import csv
import io
import shutil
from pathlib import Path

import duckdb
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from sqlglot import exp
from typer.testing import CliRunner

from pipeline.errors import ExtractError
from pipeline.extract import discover_extract, table_function
from pipeline.workflows.build import BuildOptions, BuildResult, build_study, plan_study

from .conftest import DEMO_STUDY, HANDMADE
from .helpers import demo_study_variant


def _lines(table: str) -> list[bytes]:
    """The handmade table's lines (header first), each ending in a newline."""
    return (HANDMADE / f"{table}.csv").read_bytes().splitlines(keepends=True)


def _data_rows(table: str) -> int:
    return len(_lines(table)) - 1


def _hostile(folder: Path, table: str, content: bytes, *, name: str | None = None) -> Path:
    """A copy of the handmade extract whose ``table`` file is replaced by ``content``."""
    extract = folder / "extract"
    extract.mkdir(parents=True)
    for path in HANDMADE.glob("*.csv"):
        if not path.name.startswith("expected_"):
            shutil.copy(path, extract / path.name)
    (extract / f"{table}.csv").unlink()
    (extract / (name or f"{table}.csv")).write_bytes(content)
    return extract


def _build(extract: Path) -> BuildResult:
    return build_study(DEMO_STUDY, BuildOptions(extract=extract, out=extract.parent / "out"))


def _read(result: BuildResult) -> dict[str, int]:
    rows = result.run.outputs["rows_read"].to_pylist()
    return {r["source_table"]: r["n_rows"] for r in rows}


def _reasons(result: BuildResult, table: str) -> dict[str, int]:
    """One table's quality log as written to quality.csv, checked to add up to the rows read."""
    with (result.out / "quality.csv").open(encoding="utf-8") as handle:
        rows = [r for r in csv.DictReader(handle) if r["source_table"] == table]
    reasons = {r["reason"]: int(r["n_rows"]) for r in rows}
    assert sum(reasons.values()) == _read(result)[table]
    return reasons


def _added(result: BuildResult, baseline: BuildResult, table: str) -> dict[str, int]:
    """The quality-log rows ``result`` has beyond ``baseline`` for one table, by reason."""
    before = _reasons(baseline, table)
    after = _reasons(result, table)
    added = {r: n - before.get(r, 0) for r, n in after.items() if n != before.get(r, 0)}
    assert not [r for r, n in before.items() if n > after.get(r, 0)]
    return added


def _values(extract: Path, table: str, column: str) -> list[str | None]:
    """One column of a table exactly as the engine reads it."""
    found = discover_extract(extract, plan_study(DEMO_STUDY).sources)[table]
    select = exp.select(column).from_(exp.Table(this=table_function(found)))
    return [row[0] for row in duckdb.sql(select.sql("duckdb")).fetchall()]


def _refused(extract: Path, *expected: str) -> str:
    """Build through the CLI; check exit 2, one message holding ``expected``, no traceback."""
    from pipeline.cli import app

    out = extract.parent / "out"
    args = ["build", str(DEMO_STUDY), "--extract", str(extract), "--out", str(out), "--quiet"]
    result = CliRunner().invoke(app, args)
    assert result.exit_code == 2, result.output
    assert isinstance(result.exception, SystemExit)
    message = " ".join(result.output.split())
    assert "Traceback" not in message
    for text in expected:
        assert text in message
    assert not out.exists()
    with pytest.raises(ExtractError):
        _build(extract)
    return message


@pytest.fixture(scope="module")
def baseline(tmp_path_factory: pytest.TempPathFactory) -> BuildResult:
    """The demo study built on the unchanged handmade extract."""
    folder = tmp_path_factory.mktemp("baseline")
    return _build(_hostile(folder, "patients", b"".join(_lines("patients"))))


# 1. A byte-order mark is skipped, by discovery and by DuckDB.


def test_byte_order_mark_is_skipped(tmp_path: Path, baseline: BuildResult) -> None:
    extract = _hostile(tmp_path, "patients", b"\xef\xbb\xbf" + b"".join(_lines("patients")))
    found = discover_extract(extract, plan_study(DEMO_STUDY).sources)["patients"]
    assert found.columns[0] == "patient_id"
    assert _values(extract, "patients", "patient_id")[0] == "HM-001"
    result = _build(extract)
    assert _read(result)["patients"] == _data_rows("patients")
    assert _added(result, baseline, "patients") == {}
    assert result.read("cohort").equals(baseline.read("cohort"))


# 2. Quoted fields hold commas, doubled quotes and line breaks.


def test_quoted_commas_and_line_breaks_are_read(tmp_path: Path, baseline: BuildResult) -> None:
    # drug_text first: a field split at the wrong place would shift the row's other columns
    lines = [b"drug_text,patient_id,start_date,stop_date,atc\n"]
    for line in _lines("prescriptions")[1:]:
        patient, start, stop, atc, text = line.rstrip(b"\n").split(b",")
        lines.append(b",".join([text, patient, start, stop, atc]) + b"\n")
    lines.append(b'"metformin, 500 mg\nonce daily",HM-027,2016-08-01,,A10BA02\n')
    lines.append(b'"say ""twice"", daily",HM-027,2016-08-02,,"A10BA02"\n')
    extract = _hostile(tmp_path, "prescriptions", b"".join(lines))
    texts = _values(extract, "prescriptions", "drug_text")
    assert texts[-2:] == ["metformin, 500 mg\nonce daily", 'say "twice", daily']
    result = _build(extract)
    assert _read(result)["prescriptions"] == _data_rows("prescriptions") + 2
    assert _added(result, baseline, "prescriptions") == {"used": 2}


# 3. Ragged rows are refused, naming the file, the line and the column.


def test_a_row_with_too_few_fields_is_refused(tmp_path: Path) -> None:
    row = b"HM-001,2016-01-01,ICD10,I10\n"  # no source
    extract = _hostile(tmp_path, "diagnoses", b"".join([*_lines("diagnoses"), row]))
    line = len(_lines("diagnoses")) + 1
    _refused(
        extract,
        f"{extract / 'diagnoses.csv'}:{line} [csv-ragged-row]",
        "4 fields where the header has 5 (missing from column 5)",
    )


def test_a_row_with_too_many_fields_is_refused(tmp_path: Path) -> None:
    lines = _lines("diagnoses")
    row = b"HM-001,2016-01-01,ICD10,I10,visit,extra\n"
    extract = _hostile(tmp_path, "diagnoses", b"".join([*lines[:5], row, *lines[5:]]))
    _refused(
        extract,
        f"{extract / 'diagnoses.csv'}:6 [csv-ragged-row] 'HM-001,2016-01-01,ICD10,I10,visit,extra'",
        "6 fields where the header has 5 (extra from column 6)",
    )


def test_a_quote_never_closed_is_refused(tmp_path: Path) -> None:
    # DuckDB's single-threaded reader would silently drop every line after the open quote
    lines = _lines("diagnoses")
    row = b'HM-001,2016-01-01,ICD10,"I10,visit\n'
    extract = _hostile(tmp_path, "diagnoses", b"".join([*lines[:5], row, *lines[5:]]))
    _refused(
        extract,
        f"{extract / 'diagnoses.csv'}:6 [csv-unclosed-quote]",
        "a quoted field is never closed",
    )


# 4. Other delimiters are refused when the header is read.


@pytest.mark.parametrize("delimiter", [b";", b"\t"])
def test_other_delimiters_are_refused(tmp_path: Path, delimiter: bytes) -> None:
    content = b"".join(_lines("encounters")).replace(b",", delimiter)
    extract = _hostile(tmp_path, "encounters", content)
    header = repr("patient_id{0}encounter_date{0}encounter_type".format(delimiter.decode()))
    _refused(
        extract,
        f"{extract / 'encounters.csv'}:1 [wrong-delimiter] the header has one column {header}",
        "files must be comma-separated",
    )


# 5. Text that is not UTF-8 is refused where it is read.


def test_latin1_in_a_row_is_refused_with_its_line(tmp_path: Path) -> None:
    row = "HM-001,2016-01-01,ICD10,I10,Müller clinic\n".encode("latin-1")
    extract = _hostile(tmp_path, "diagnoses", b"".join([*_lines("diagnoses"), row]))
    _refused(
        extract,
        f"{extract / 'diagnoses.csv'}:{len(_lines('diagnoses')) + 1} [csv-not-utf8]",
        "not valid UTF-8",
    )


def test_latin1_in_the_header_is_refused_with_its_byte(tmp_path: Path) -> None:
    lines = _lines("patients")
    header = lines[0].rstrip(b"\n") + ",prénom\n".encode("latin-1")
    rows = [line.rstrip(b"\n") + b",x\n" for line in lines[1:]]
    extract = _hostile(tmp_path, "patients", b"".join([header, *rows]))
    byte = len(lines[0]) + 3  # 'p', 'r', then the Latin-1 'é'
    _refused(extract, f"{extract / 'patients.csv'}:1 [not-utf8] byte {byte}: not valid UTF-8")


def test_latin1_in_a_column_never_read_is_not_checked(
    tmp_path: Path, baseline: BuildResult
) -> None:
    # drug_text is read by no study stage, so DuckDB never decodes it: the row is counted
    row = "HM-027,2016-08-01,,A10BA02,Müller\n".encode("latin-1")
    extract = _hostile(tmp_path, "prescriptions", b"".join([*_lines("prescriptions"), row]))
    result = _build(extract)
    assert _read(result)["prescriptions"] == _data_rows("prescriptions") + 1
    assert _added(result, baseline, "prescriptions") == {"used": 1}


# 6. An empty file is refused; a header alone is an empty table.


def test_an_empty_file_is_refused(tmp_path: Path) -> None:
    extract = _hostile(tmp_path, "encounters", b"")
    _refused(extract, f"{extract / 'encounters.csv'} [empty-file] empty file, no header")


def test_a_header_only_file_is_an_empty_table(tmp_path: Path) -> None:
    extract = _hostile(tmp_path, "prescriptions", _lines("prescriptions")[0])
    result = _build(extract)
    assert _read(result)["prescriptions"] == 0
    assert _reasons(result, "prescriptions") == {}


# 7. A file that is not what its name says is refused.


def test_parquet_bytes_in_a_csv_are_refused(tmp_path: Path) -> None:
    buffer = io.BytesIO()
    pq.write_table(pa.table({"patient_id": ["HM-001"], "encounter_date": ["2015-01-01"]}), buffer)
    extract = _hostile(tmp_path, "encounters", buffer.getvalue())
    _refused(
        extract, f"{extract / 'encounters.csv'} [not-csv] this is a Parquet file, not CSV text"
    )


def test_text_in_a_parquet_file_is_refused(tmp_path: Path) -> None:
    content = b"".join(_lines("encounters"))
    extract = _hostile(tmp_path, "encounters", content, name="encounters.parquet")
    _refused(
        extract, f"{extract / 'encounters.parquet'} [unreadable-file] not a readable Parquet file"
    )


# 8. Enormous values are counted, never a crash.


def test_enormous_measurement_values_are_counted(tmp_path: Path, baseline: BuildResult) -> None:
    rows = [
        b"HM-001,2016-01-01,hba1c,,1e400,%\n",  # beyond a double
        b"HM-001,2016-01-02,hba1c,,12345678901234567890,%\n",  # 20 digits
        b"HM-001,2016-01-03,hba1c,," + b"9" * 400 + b",%\n",
        b"HM-001,2016-01-04,hba1c,,6.5,%\n",  # a plain value, for comparison
    ]
    extract = _hostile(tmp_path, "measurements", b"".join([*_lines("measurements"), *rows]))
    # Three implausible values of four would stop the demo study's build as a misread table.
    accepted = "{accept_set_aside: [{table: measurements, reason: implausible value}]}"
    study = demo_study_variant(tmp_path / "study", quality=accepted)
    result = build_study(study, BuildOptions(extract=extract, out=tmp_path / "out"))
    assert _read(result)["measurements"] == len(rows)
    assert _added(result, baseline, "measurements") == {"implausible value": 3, "used": 1}


def test_enormous_codes_are_counted(tmp_path: Path, baseline: BuildResult) -> None:
    rows = [
        b"HM-001,2016-01-01,ICD10," + b"E11" * 34_000 + b",visit\n",  # a 100 kB code
        b"HM-001,2016-01-02,ICD10,12345678901234567890,visit\n",
        b"12345678901234567890,2016-01-03,ICD10,I10,visit\n",  # a 20-digit patient id
    ]
    extract = _hostile(tmp_path, "diagnoses", b"".join([*_lines("diagnoses"), *rows]))
    assert len(_values(extract, "diagnoses", "code")[-3]) == 102_000
    result = _build(extract)
    assert _read(result)["diagnoses"] == _data_rows("diagnoses") + len(rows)
    assert _added(result, baseline, "diagnoses") == {"malformed code": 2, "orphan patient": 1}


# 9. Impossible dates are unparseable dates; a five-digit year is a date after the data.


def test_impossible_dates_are_unparseable(tmp_path: Path, baseline: BuildResult) -> None:
    rows = [
        b"HM-001,0000-00-00,ICD10,I10,visit\n",
        b"HM-001,2015-02-30,ICD10,I10,visit\n",
        b"HM-001,2015-13-01,ICD10,I10,visit\n",
        b"HM-001,99999-01-01,ICD10,I10,visit\n",  # a valid DuckDB date, in year 99999
    ]
    extract = _hostile(tmp_path, "diagnoses", b"".join([*_lines("diagnoses"), *rows]))
    result = _build(extract)
    assert _read(result)["diagnoses"] == _data_rows("diagnoses") + len(rows)
    added = _added(result, baseline, "diagnoses")
    assert added == {"unparseable date": 3, "after end of data": 1}
    assert result.read("cohort").equals(baseline.read("cohort"))


# 10. Quotes, semicolons and SQL in codes are data.


def test_sql_in_codes_is_data(tmp_path: Path, baseline: BuildResult) -> None:
    codes = [
        "'; DROP TABLE patients; --",
        '"); DROP TABLE src_patients; --',
        "I10;E11",
        "I1'0",
        'E11"9',
    ]
    out = io.StringIO()
    csv.writer(out, lineterminator="\n").writerows(
        ["HM-001", f"2016-01-{day:02d}", "ICD10", code, "visit"]
        for day, code in enumerate(codes, 1)
    )
    content = b"".join(_lines("diagnoses")) + out.getvalue().encode()
    extract = _hostile(tmp_path, "diagnoses", content)
    assert _values(extract, "diagnoses", "code")[-len(codes) :] == codes
    result = _build(extract)
    assert _read(result)["diagnoses"] == _data_rows("diagnoses") + len(codes)
    assert _added(result, baseline, "diagnoses") == {"malformed code": len(codes)}
    assert _read(result)["patients"] == _data_rows("patients")
    assert result.read("cohort").equals(baseline.read("cohort"))


# 11. A malformed date is counted, and the quality log names the first row it set aside.


def _quality_rows(result: BuildResult, table: str) -> dict[str, tuple[str, str]]:
    with (result.out / "quality.csv").open(encoding="utf-8") as handle:
        rows = [r for r in csv.DictReader(handle) if r["source_table"] == table]
    return {r["reason"]: (r["first_file"], r["first_row"]) for r in rows}


def test_a_malformed_date_in_row_1234_is_named(tmp_path: Path, baseline: BuildResult) -> None:
    data = _lines("diagnoses")[1:]
    filler = [b"HM-001,2031-01-01,ICD10,I10,visit\n"] * (1233 - len(data))
    # A quoted line break: row numbers count records, not lines.
    filler[0] = b'HM-001,2031-01-01,ICD10,I10,"two\nlines"\n'
    bad = b"HM-001,2016-31-01,ICD10,I10,visit\n"
    rows = [*data, *filler, bad, b"HM-001,01/02/2016,ICD10,I10,visit\n"]
    extract = _hostile(tmp_path, "diagnoses", b"".join([_lines("diagnoses")[0], *rows]))
    result = _build(extract)
    assert _read(result)["diagnoses"] == len(rows)
    assert _added(result, baseline, "diagnoses")["unparseable date"] == 2
    located = _quality_rows(result, "diagnoses")
    assert located["unparseable date"] == ("diagnoses.csv", "1234")
    assert located["used"] == ("", "")
    assert result.read("cohort").equals(baseline.read("cohort"))


def test_rows_are_named_per_file_of_a_mapped_glob(tmp_path: Path) -> None:
    header, *data = _lines("diagnoses")
    extract = _hostile(tmp_path, "diagnoses", b"".join([header, *data]), name="unused.txt")
    (extract / "unused.txt").unlink()
    parts = extract / "diagnoses"
    parts.mkdir()
    (parts / "part-1.csv").write_bytes(b"".join([header, *data]))
    (parts / "part-2.csv").write_bytes(header + b"HM-001,2016-02-01,ICD10,I10,visit\n" * 2
                                       + b"HM-001,not a date,ICD10,I10,visit\n")  # fmt: skip
    lines = ["mapping: two_parts", "tables:"]
    for table in ("patients", "encounters", "diagnoses", "prescriptions", "measurements"):
        file = "diagnoses/part-*.csv" if table == "diagnoses" else f"{table}.csv"
        same = ", ".join(f"{c}: {c}" for c in _lines(table)[0].decode().strip().split(","))
        lines += [f"  {table}:", f"    file: {file}", f"    columns: {{{same}}}"]
    mapping = extract / "mapping.yaml"
    mapping.write_text("\n".join(lines) + "\n", encoding="utf-8")
    result = _build(mapping)
    assert _read(result)["diagnoses"] == len(data) + 3
    located = _quality_rows(result, "diagnoses")
    assert located["unparseable date"] == ("diagnoses/part-2.csv", "3")
    assert located["exact duplicate"] == ("", "")


def test_a_column_named_source_position_is_data(tmp_path: Path, baseline: BuildResult) -> None:
    # The engine numbers rows in a column of that name; a file's own column gives way to it.
    header, *data = _lines("diagnoses")
    rows = [line.rstrip(b"\n") + b",999\n" for line in data]
    rows.append(b"HM-001,not a date,ICD10,I10,visit,999\n")
    extract = _hostile(
        tmp_path, "diagnoses", header.rstrip(b"\n") + b",source_position\n" + b"".join(rows)
    )
    result = _build(extract)
    assert _read(result)["diagnoses"] == len(rows)
    assert _quality_rows(result, "diagnoses")["unparseable date"] == (
        "diagnoses.csv",
        str(len(rows)),
    )
    assert result.read("cohort").equals(baseline.read("cohort"))


def test_a_code_set_aside_never_counts_as_evidence(tmp_path: Path, baseline: BuildResult) -> None:
    # HM-002 has no heart failure. One I50.9 code would need a loop diuretic within 365 days or a
    # second code: a diagnosis row labelled ATC (unknown code system) and an overlong I50 code
    # (malformed) are set aside, so neither may supply it.
    rows = [
        b"HM-002,2017-03-01,ICD10,I50.9,visit\n",
        b"HM-002,2017-03-01,ATC,C03CA01,visit\n",
        b"HM-002,2017-04-01,ICD10,I509XYZ1,visit\n",
    ]
    extract = _hostile(tmp_path, "diagnoses", b"".join([*_lines("diagnoses"), *rows]))
    result = _build(extract)
    added = _added(result, baseline, "diagnoses")
    assert added == {"used": 1, "unknown code system": 1, "malformed code": 1}
    assert result.read("cohort").equals(baseline.read("cohort"))
