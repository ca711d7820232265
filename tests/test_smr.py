"""SMRs against a study's reference rate table: the table's checks, the arithmetic, the report."""

from __future__ import annotations

import csv
import json
import shutil
from datetime import date
from pathlib import Path

import polars as pl
import pytest
from scipy import stats
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.config import load_study
from pipeline.config._reference_rates import ReferenceRates, parse_reference_rates
from pipeline.errors import ConfigError
from pipeline.outputs import sha256_file
from pipeline.outputs._manifest import changed_inputs
from pipeline.outputs.report._rates import rates_block
from pipeline.outputs.report._smr import expected_cells, smr_summary

from .conftest import HANDMADE, ROOT
from .helpers import demo_study_variant
from .test_report_rates import build_with_rates

EXAMPLE = ROOT / "definitions" / "studies" / "orvane_reference_rates.csv"
WITH_RATES = "{age_bands: [40, 50, 60, 70, 80], reference_rates: ../rates.csv}"
HEAD = "# rates: test rates\n# source: made up for this test\n# figures: invented\n"


def _table(body: str, head: str = HEAD) -> ReferenceRates:
    return parse_reference_rates(head + body, Path("rates.csv"))


def _persontime() -> tuple[pl.DataFrame, pl.DataFrame]:
    """Cells of four patients: (patient, sex, band, days at risk, events)."""
    cells = [
        (1, "F", "40-49", 730_500, 6),  # 2,000 person-years
        (2, "F", "50-59", 365_250, 3),  # 1,000
        (3, "M", "40-49", 365_250, 2),  # 1,000
        (4, "M", "50-59", 182_625, 1),  # 500
    ]
    persontime = pl.DataFrame(
        [
            {
                "patient_id": p,
                "age_band": band,
                "age_band_start": int(band[:2]),
                "calendar_year": 2016,
                "cell_start": date(2016, 1, 1),
                "cell_end": date(2016, 12, 31),
                "days": days,
                "days_at_risk_hf": days,
                "events_hf": events,
            }
            for p, _, band, days, events in cells
        ]
    )
    cohort = pl.DataFrame({"patient_id": [c[0] for c in cells], "sex": [c[1] for c in cells]})
    return persontime, cohort


RATES = """outcome,sex,age_start,age_end,rate_per_1000_py
hf,F,40,54,1.5
hf,F,55,,9
hf,M,0,59,4
"""


def test_smr_by_hand_with_the_exact_interval_from_scipy() -> None:
    persontime, cohort = _persontime()
    # The study's bands 40-49 and 50-59 of women lie in the table's 40-59, men's in 0-59.
    table = _table(RATES.replace("hf,F,40,54,1.5\nhf,F,55,,9", "hf,F,40,59,1.5\nhf,F,60,,9"))
    events, person_years, rates = expected_cells(persontime, cohort, table, "hf")
    assert events == [6, 2, 3, 1]  # sorted by band, then sex
    assert person_years == [2000.0, 1000.0, 1000.0, 500.0]
    assert rates == [1.5, 4.0, 1.5, 4.0]
    # F: (2,000 + 1,000) py x 1.5 = 4.5; M: (1,000 + 500) py x 4 = 6.0; expected 10.5
    block = rates_block(persontime.drop("calendar_year"), ["hf"], {"hf": 12})
    row = smr_summary(persontime, cohort, table, block, frozenset(), 5).row(0, named=True)
    assert row["observed"] == "12"
    assert row["expected"] == 10.5
    assert row["smr"] == round(12 / 10.5, 2)
    # Exact (Garwood 1936) limits of a Poisson count k: chi2(a/2; 2k)/2 and chi2(1-a/2; 2k+2)/2
    # (the formula from memory), with scipy's chi-square quantiles, divided by the expected.
    low = stats.chi2.ppf(0.025, 2 * 12) / 2 / 10.5
    high = stats.chi2.ppf(0.975, 2 * 13) / 2 / 10.5
    assert (row["smr_low"], row["smr_high"]) == (round(low, 2), round(high, 2))
    assert (row["smr_low"], row["smr_high"]) == (0.59, 2.0)  # and written out: 0.5905, 1.9963


def test_a_hidden_observed_count_leaves_the_smr_out() -> None:
    persontime, cohort = _persontime()
    table = _table(RATES.replace("hf,F,40,54,1.5\nhf,F,55,,9", "hf,F,40,,1.5"))
    block = rates_block(persontime.drop("calendar_year"), ["hf"], {"hf": 12})
    row = smr_summary(persontime, cohort, table, block, frozenset({"events|hf"}), 5).row(
        0, named=True
    )
    assert row["observed"] == "*"
    assert (row["smr"], row["smr_low"], row["smr_high"]) == (None, None, None)
    assert row["expected"] == 10.5  # person-time times rates: shown
    assert "suppressed" in row["note"]


@pytest.mark.parametrize(
    ("body", "where", "code"),
    [
        ("outcome,age_start,age_end,rate_per_1000_py\nhf,40,49,x\n", "rates.csv:5:10", "bad-row"),
        ("outcome,age_start,age_end,rate_per_1000_py\nhf,40,49\n", "rates.csv:5:1", "bad-row"),
        ("outcome,age_start,age_end,rate_per_1000_py\nhf,4O,49,1\n", "rates.csv:5:4", "bad-row"),
        ("outcome,age_start,age_end,rate_per_1000_py\nhf,50,49,1\n", "rates.csv:5:7", "bad-row"),
        ("outcome,age_start,age_end,rate_per_1000_py\nhf,40,,-1\n", "rates.csv:5:8", "bad-row"),
        ("outcome,age,age_end,rate_per_1000_py\nhf,40,,1\n", "rates.csv:4:9", "bad-header"),
        (
            "outcome,age_start,age_end,rate_per_1000_py\nhf,40,49,1\nhf,55,,2\n",
            "rates.csv:6:1",
            "band-gap",
        ),
        (
            "outcome,age_start,age_end,rate_per_1000_py\nhf,40,,1\nhf,40,,2\n",
            "rates.csv:6:1",
            "duplicate",
        ),
        (
            "outcome,sex,age_start,age_end,rate_per_1000_py\nhf,,40,,1\n",
            "rates.csv:5:4",
            "bad-row",
        ),
    ],
)
def test_bad_lines_are_named_by_file_line_and_column(body: str, where: str, code: str) -> None:
    with pytest.raises(ConfigError) as err:
        _table(body)
    assert f"{where} [rates-{code}]" in str(err.value)


def test_the_header_must_say_where_the_rates_come_from() -> None:
    with pytest.raises(ConfigError, match=r"rates.csv:1:1 \[rates-missing-key\].*source"):
        _table(
            "outcome,age_start,age_end,rate_per_1000_py\nhf,0,,1\n", "# rates: x\n# figures: y\n"
        )


def _study(tmp_path: Path, table: str | None = None, persontime: str = WITH_RATES) -> Path:
    study = demo_study_variant(tmp_path, persontime=persontime)
    text = EXAMPLE.read_text(encoding="utf-8")
    (tmp_path / "rates.csv").write_text(text if table is None else table, encoding="utf-8")
    return study


def test_a_band_of_the_cohort_not_in_the_table_is_named(tmp_path: Path) -> None:
    text = EXAMPLE.read_text(encoding="utf-8").replace("ckd,M,80,,22.0", "ckd,M,80,89,22.0")
    study = _study(tmp_path, text)
    with pytest.raises(ConfigError) as err:
        load_study(study)
    (problem,) = err.value.problems
    assert problem.code == "rates-not-covered"
    assert problem.file == study.resolve()
    assert "age band 80+" in problem.message
    assert "ckd, sex M" in problem.message


def test_rates_by_year_must_cover_every_year_of_follow_up(tmp_path: Path) -> None:
    lines = ["outcome,calendar_year,age_start,age_end,rate_per_1000_py"]
    lines += [f"ckd,{y},40,,3" for y in range(2015, 2019)]  # follow-up reaches 2019
    study = _study(tmp_path, HEAD + "\n".join(lines) + "\n")
    with pytest.raises(ConfigError, match=r"\[rates-not-covered\].*40-49 .*ckd, 2019"):
        load_study(study)


def test_an_outcome_the_study_lacks_is_named_at_its_line(tmp_path: Path) -> None:
    study = _study(tmp_path, HEAD + "outcome,age_start,age_end,rate_per_1000_py\ncdk,0,,3\n")
    with pytest.raises(ConfigError, match=r"rates.csv:5:1 \[rates-unknown-outcome\] 'cdk'"):
        load_study(study)


def test_a_bad_table_stops_check_and_build_with_exit_2_writing_nothing(tmp_path: Path) -> None:
    study = _study(tmp_path, EXAMPLE.read_text(encoding="utf-8").replace("ckd,F,60,69,6.0", "x"))
    runner = CliRunner()
    check = runner.invoke(app, ["check", str(study)])
    assert check.exit_code == 1  # check's code for files with problems
    assert "rates.csv:18:1 [rates-bad-row]" in check.output
    out = tmp_path / "out"
    build = runner.invoke(app, ["build", str(study), "--extract", str(HANDMADE), "--out", str(out)])
    assert build.exit_code == 2
    assert "[rates-bad-row]" in build.output
    assert not out.exists()


@pytest.fixture(scope="module")
def smr_build(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp("smr_build")
    shutil.copy(EXAMPLE, folder / "rates.csv")
    return build_with_rates(folder, WITH_RATES, extract=HANDMADE)


def _rows(path: Path) -> list[dict[str, str]]:
    with path.open(encoding="utf-8") as handle:
        return list(csv.DictReader(handle))


def test_the_report_gives_observed_expected_and_smr(smr_build: Path) -> None:
    persontime = pl.read_parquet(smr_build / "persontime.parquet")
    cohort = pl.read_parquet(smr_build / "cohort.parquet")
    lines = [x for x in EXAMPLE.read_text(encoding="utf-8").splitlines() if not x.startswith("#")]
    rates = {
        (o, s, a[:1]): float(r)
        for o, s, a, _, r in (x.split(",") for x in lines[1:])  # ten-year bands, by first digit
    }
    smr = _rows(smr_build / "summary" / "smr.csv")
    incidence = {r["outcome"]: r["events"] for r in _rows(smr_build / "summary" / "incidence.csv")}
    assert [r["outcome"] for r in smr] == ["type2_diabetes", "ckd", "heart_failure"]
    for r in smr:
        o = r["outcome"]
        assert r["observed"] == incidence[o]  # the same count, suppressed the same way
        cells = persontime.filter(pl.col(f"days_at_risk_{o}").is_not_null()).join(
            cohort.select("patient_id", "sex"), on="patient_id"
        )
        expected = sum(
            c[f"days_at_risk_{o}"] / 365.25 * rates[(o, c["sex"], c["age_band"][:1])] / 1000
            for c in cells.iter_rows(named=True)
        )
        assert float(r["expected"]) == pytest.approx(expected, abs=0.005)
        if r["observed"] not in ("<5", "*"):
            assert float(r["smr"]) == pytest.approx(int(r["observed"]) / expected, abs=0.005)
        else:
            assert r["smr"] == ""
    page = (smr_build / "report.html").read_text(encoding="utf-8")
    assert "Observed and expected events" in page
    assert "invented for the Orvane Bay demo scenario" in page  # the table's stated source


def test_the_table_is_hashed_in_the_manifest_not_its_path(smr_build: Path) -> None:
    manifest = json.loads((smr_build / "manifest.json").read_text(encoding="utf-8"))
    (entry,) = manifest["reference_rates"]
    assert entry["path"] == "../rates.csv"  # relative to the study's folder
    assert entry["sha256"] == sha256_file(smr_build.parent / "rates.csv")
    assert not any("reference_rates" in k for k in manifest["study_keys"])


def test_verify_and_diff_see_a_changed_table() -> None:
    recorded = {"reference_rates": [{"path": "../rates.csv", "sha256": "a"}]}
    rebuilt = {"reference_rates": [{"path": "../rates.csv", "sha256": "b"}]}
    assert changed_inputs(recorded, rebuilt) == [
        "reference_rates file ../rates.csv has changed since the build"
    ]
    assert changed_inputs(recorded, recorded) == []
