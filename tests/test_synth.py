"""Tests of the synthetic extract generator (pipeline.synth)."""

from __future__ import annotations

import hashlib
import json
import re
from datetime import date
from pathlib import Path

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest

from pipeline.errors import AscertainError
from pipeline.synth import Scenario, frank_kendall_tau, generate_extract
from pipeline.synth._population import draw_population
from pipeline.synth._scenario import CONDITIONS

N = 2000
SMALL_CHUNKS = Scenario(chunk_size=700)  # three chunks, so chunk boundaries are exercised
TABLES = ("patients", "encounters", "diagnoses", "prescriptions", "measurements")

EXPECTED_COLUMNS: dict[str, list[tuple[str, pa.DataType]]] = {
    "patients": [
        ("patient_id", pa.string()),
        ("birth_date", pa.date32()),
        ("birth_year", pa.int32()),
        ("sex", pa.string()),
        ("death_date", pa.date32()),
        ("practice_id", pa.string()),
    ],
    "encounters": [
        ("patient_id", pa.string()),
        ("encounter_date", pa.date32()),
        ("encounter_type", pa.string()),
    ],
    "diagnoses": [
        ("patient_id", pa.string()),
        ("event_date", pa.date32()),
        ("code_system", pa.string()),
        ("code", pa.string()),
        ("source", pa.string()),
    ],
    "prescriptions": [
        ("patient_id", pa.string()),
        ("start_date", pa.date32()),
        ("stop_date", pa.date32()),
        ("atc", pa.string()),
        ("drug_text", pa.string()),
    ],
    "measurements": [
        ("patient_id", pa.string()),
        ("obs_date", pa.date32()),
        ("measure", pa.string()),
        ("value", pa.float64()),
        ("value_text", pa.string()),
        ("unit", pa.string()),
    ],
    "truth": [
        ("patient_id", pa.string()),
        ("condition", pa.string()),
        ("true_onset_date", pa.date32()),
    ],
}
DATE_COLUMN = {
    "encounters": "encounter_date",
    "diagnoses": "event_date",
    "prescriptions": "start_date",
    "measurements": "obs_date",
}


def _digests(folder: Path) -> dict[str, str]:
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(folder.iterdir())}


@pytest.fixture(scope="module")
def extract(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("synth") / "a"
    generate_extract(out, patients=N, seed=11, scenario=SMALL_CHUNKS)
    return out


@pytest.fixture(scope="module")
def con(extract: Path) -> duckdb.DuckDBPyConnection:
    con = duckdb.connect()
    for name in (*TABLES, "truth"):
        con.execute(f"CREATE VIEW {name} AS SELECT * FROM read_parquet('{extract / name}.parquet')")
    return con


def _scalar(con: duckdb.DuckDBPyConnection, sql: str) -> object:
    row = con.execute(sql).fetchone()
    assert row is not None
    return row[0]


def test_same_seed_gives_identical_bytes(extract: Path, tmp_path: Path) -> None:
    generate_extract(tmp_path / "b", patients=N, seed=11, scenario=SMALL_CHUNKS)
    first, second = _digests(extract), _digests(tmp_path / "b")
    record = "ascertain-synth.json"  # the list of files synth wrote (pipeline/outputs/_ownership)
    expected = [f"{t}.parquet" for t in (*TABLES, "truth")] + ["scenario.json", record]
    assert sorted(first) == sorted(expected)
    assert first == second


def test_different_seed_gives_different_data(extract: Path, tmp_path: Path) -> None:
    generate_extract(tmp_path / "c", patients=N, seed=12, scenario=SMALL_CHUNKS)
    first, other = _digests(extract), _digests(tmp_path / "c")
    for name in ("patients.parquet", "encounters.parquet", "measurements.parquet"):
        assert first[name] != other[name], name


def test_parquet_schemas(extract: Path) -> None:
    for name, columns in EXPECTED_COLUMNS.items():
        schema = pq.read_schema(extract / f"{name}.parquet")
        assert [(f.name, f.type) for f in schema] == columns, name


def _readable(text: str) -> bool:
    try:
        date.fromisoformat(text)
    except ValueError:
        return False
    return re.fullmatch(r"\d{4}-\d{2}-\d{2}", text) is not None


def test_csv_has_the_same_columns_and_iso_dates(tmp_path: Path) -> None:
    summary = generate_extract(tmp_path / "csv", patients=300, seed=3, file_format="csv")
    spoiled = dated = 0
    for name in TABLES:
        path = tmp_path / "csv" / f"{name}.csv"
        header = path.read_text(encoding="utf-8").splitlines()[0]
        assert header.replace('"', "").split(",") == [c for c, _ in EXPECTED_COLUMNS[name]]
        table = pacsv.read_csv(
            path,
            convert_options=pacsv.ConvertOptions(
                column_types={c: pa.string() for c, _ in EXPECTED_COLUMNS[name]}
            ),
        )
        assert table.num_rows == summary.rows[name]
        if name in DATE_COLUMN:
            dates = table.column(DATE_COLUMN[name]).to_pylist()
            bad = [d for d in dates if not _readable(d)]
            # the two unreadable shapes: month pushed past 12, or day-first
            assert all(
                re.fullmatch(r"\d{4}-(1[3-9]|2[0-4])-\d{2}|\d{2}/\d{2}/\d{4}", d) for d in bad
            )
            spoiled += len(bad)
            dated += len(dates)
    assert (tmp_path / "csv" / "truth.parquet").exists()
    rate = Scenario().p_unreadable_date_row
    low, high = _rate_ci(spoiled, dated)  # statsmodels proportion_confint, 99.9 % Wilson
    assert low <= rate <= high


def test_summary_counts_match_files(extract: Path, tmp_path: Path) -> None:
    summary = generate_extract(tmp_path / "d", patients=500, seed=4)
    for name, count in summary.rows.items():
        assert pq.read_metadata(tmp_path / "d" / f"{name}.parquet").num_rows == count, name
    assert summary.rows["patients"] == 500
    assert summary.rows["truth"] == 500 * len(CONDITIONS)


def test_rows_are_sorted_by_all_columns(extract: Path) -> None:
    for name in (*TABLES, "truth"):
        table = pq.read_table(extract / f"{name}.parquet")
        keys = [(c, "ascending") for c in table.column_names]
        order = pc.sort_indices(table, sort_keys=keys)  # nulls last, as the generator sorts
        assert order.to_pylist() == list(range(table.num_rows)), name


def test_patient_ids_and_practices(con: duckdb.DuckDBPyConnection) -> None:
    bad_ids = _scalar(
        con, "SELECT count(*) FROM patients WHERE NOT regexp_full_match(patient_id, 'OB-[0-9]{7}')"
    )
    assert bad_ids == 0
    practices = {r[0] for r in con.execute("SELECT DISTINCT practice_id FROM patients").fetchall()}
    assert practices <= {f"P{i:02d}" for i in range(1, 15)}
    assert len(practices) == 14
    assert _scalar(con, "SELECT count(*) FROM patients WHERE birth_year IS NULL") == 0


def test_icd_system_follows_the_switch_date(con: duckdb.DuckDBPyConnection) -> None:
    icd10 = {c.replace(".", "") for c in Scenario().other_dx_icd10}
    for cond in Scenario().conditions.values():
        icd10 |= {c.replace(".", "") for c in cond.icd10}
    early = _scalar(
        con,
        "SELECT count(*) FROM diagnoses WHERE code_system = 'ICD10' "
        "AND event_date < DATE '2013-01-01'",
    )
    assert early == 0
    # after the switch, rows labelled ICD9 are ICD-10 codes mislabelled at a stated rate
    late = con.execute(
        "SELECT DISTINCT upper(replace(code, '.', '')) FROM diagnoses "
        "WHERE code_system = 'ICD9' AND event_date >= DATE '2013-01-01'"
    ).fetchall()
    assert late
    assert {r[0] for r in late} <= icd10


def test_mess_is_present(con: duckdb.DuckDBPyConnection) -> None:
    orphans = _scalar(
        con,
        "SELECT count(*) FROM encounters WHERE patient_id NOT IN (SELECT patient_id FROM patients)",
    )
    after_death = _scalar(
        con,
        "SELECT count(*) FROM encounters e JOIN patients p USING "
        "(patient_id) WHERE e.encounter_date > p.death_date",
    )
    texts = {
        r[0]
        for r in con.execute(
            "SELECT DISTINCT value_text FROM measurements WHERE value_text IS NOT NULL"
        ).fetchall()
    }
    assert orphans > 0
    assert after_death > 0
    assert ">90" in texts
    assert "<0.6" in texts
    assert any("," in t for t in texts)
    both = _scalar(
        con, "SELECT count(*) FROM measurements WHERE value IS NOT NULL AND value_text IS NOT NULL"
    )
    assert both == 0


def test_truth_onsets_are_within_life_and_data(con: duckdb.DuckDBPyConnection) -> None:
    per_patient = _scalar(
        con, "SELECT count(DISTINCT n) FROM (SELECT count(*) n FROM truth GROUP BY patient_id)"
    )
    assert per_patient == 1
    late = _scalar(
        con,
        """SELECT count(*) FROM truth t JOIN patients p USING (patient_id)
        WHERE t.true_onset_date > coalesce(p.death_date, DATE '2021-12-31')""",
    )
    assert late == 0
    cases = _scalar(con, "SELECT count(true_onset_date) FROM truth")
    assert cases > 0


def _rate_ci(count: int, nobs: int) -> tuple[float, float]:
    proportion = pytest.importorskip("statsmodels.stats.proportion")
    low, high = proportion.proportion_confint(count, nobs, alpha=0.001, method="wilson")
    return float(low), float(high)


def test_hba1c_share_in_mmol_per_mol_matches_the_scenario(
    con: duckdb.DuckDBPyConnection, extract: Path
) -> None:
    rate = json.loads((extract / "scenario.json").read_text())["scenario"]["p_hba1c_mmol_row"]
    row = con.execute(
        "SELECT count(*) FILTER (WHERE unit = 'mmol/mol'), count(*) "
        "FROM measurements WHERE measure = 'hba1c'"
    ).fetchone()
    assert row is not None
    # 99.9 % Wilson interval from statsmodels.stats.proportion.proportion_confint
    low, high = _rate_ci(row[0], row[1])
    assert low <= rate <= high


def test_duplicate_share_matches_the_scenario(
    con: duckdb.DuckDBPyConnection, extract: Path
) -> None:
    rate = json.loads((extract / "scenario.json").read_text())["scenario"]["p_duplicate_row"]
    total = distinct = 0
    for name in DATE_COLUMN:
        row = con.execute(
            f"SELECT count(*), (SELECT count(*) FROM (SELECT DISTINCT * FROM {name})) FROM {name}"
        ).fetchone()
        assert row is not None
        total += row[0]
        distinct += row[1]
    # duplicates ~ Binomial(distinct rows, rate); interval from statsmodels proportion_confint
    low, high = _rate_ci(total - distinct, distinct)
    assert low <= rate <= high


def _frank_tau_scipy(theta: float) -> float:
    # Kendall's tau of the Frank copula: 1 - 4/theta (1 - D1(theta)), D1 the Debye function
    # (Genest 1987, Biometrika 74:549), integrated with scipy.integrate.quad.
    integrate = pytest.importorskip("scipy.integrate")
    d1 = integrate.quad(lambda t: t / np.expm1(t) if t > 0 else 1.0, 0.0, theta)[0] / theta
    return 1.0 - 4.0 / theta * (1.0 - d1)


@pytest.mark.parametrize(("theta", "expected"), [(1.0, 0.110019), (2.0, 0.213895), (5.0, 0.456701)])
def test_frank_tau_formula_matches_scipy(theta: float, expected: float) -> None:
    # expected values: Genest 1987 (Biometrika 74:549), integrated with scipy quad
    assert frank_kendall_tau(theta) == pytest.approx(_frank_tau_scipy(theta), abs=1e-9)
    assert frank_kendall_tau(theta) == pytest.approx(expected, abs=1e-6)


def test_scenario_records_the_implied_tau(extract: Path) -> None:
    meta = json.loads((extract / "scenario.json").read_text())
    theta = meta["scenario"]["copula_theta"]
    assert meta["scenario"]["copula_kendall_tau"] == pytest.approx(
        _frank_tau_scipy(theta), abs=1e-9
    )
    text = (extract / "scenario.json").read_text()
    assert text == json.dumps(meta, sort_keys=True, indent=2, ensure_ascii=False) + "\n"


def test_latent_draws_have_the_stated_kendall_tau() -> None:
    stats = pytest.importorskip("scipy.stats")
    sc = Scenario()
    n = 20_000
    pop = draw_population(
        np.random.default_rng(2024),
        sc,
        numbers=np.arange(1, n + 1),
        ghost=np.zeros(n, dtype=bool),
        start_day=14610,
        end_day=18992,
    )
    expected = _frank_tau_scipy(sc.copula_theta)
    # sd of tau-hat is about 0.005 at this n; 0.02 is four sd and still far from independence
    for i in range(len(CONDITIONS)):
        for j in range(i + 1, len(CONDITIONS)):
            tau = stats.kendalltau(pop.latent_u[:, i], pop.latent_u[:, j]).statistic
            assert tau == pytest.approx(expected, abs=0.02), (CONDITIONS[i], CONDITIONS[j])


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"patients": 0, "seed": 1}, "patients"),
        ({"patients": 10, "seed": 1, "file_format": "xlsx"}, "file_format"),
        ({"patients": 10, "seed": 1, "start": date(2020, 1, 1), "end": date(2020, 6, 1)}, "years"),
    ],
)
def test_bad_arguments_are_refused(tmp_path: Path, kwargs: dict[str, object], message: str) -> None:
    with pytest.raises(AscertainError, match=message):
        generate_extract(tmp_path / "x", **kwargs)  # type: ignore[arg-type]
    assert not (tmp_path / "x" / "patients.parquet").exists()
