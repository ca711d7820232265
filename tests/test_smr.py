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
from pipeline.outputs.report._smr import expected_cells, smr_block, smr_summary

from .conftest import HANDMADE, ROOT
from .helpers import demo_study_variant
from .test_report_rates import build_with_rates

EXAMPLE = ROOT / "definitions" / "studies" / "orvane_reference_rates.csv"
WITH_RATES = "{age_bands: [40, 50, 60, 70, 80], reference_rates: ../rates.csv}"
HEAD = "# rates: test rates\n# source: made up for this test\n# figures: invented\n"


def _table(body: str, head: str = HEAD) -> ReferenceRates:
    return parse_reference_rates(head + body, Path("rates.csv"))


def _persontime(events: tuple[int, int, int, int] = (6, 3, 2, 1)) -> tuple[pl.DataFrame, ...]:
    """Cells of four patients: (patient, sex, band, days at risk, events), and their sexes.

    Two age bands by two sexes, one patient each (cells this large stand for many patients;
    the SMR only sums them).
    """
    cells = [
        (1, "F", "40-49", 730_500, events[0]),  # 2,000 person-years
        (2, "F", "50-59", 365_250, events[1]),  # 1,000
        (3, "M", "40-49", 365_250, events[2]),  # 1,000
        (4, "M", "50-59", 182_625, events[3]),  # 500
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
    # The cohort: the four, and further incident cases without person-time of their own, so
    # that each sex's incident cases are its events (as the build's accounting check makes them).
    extra = [(100 + i, sex) for p, sex, _, _, n in cells for i in range(10 * p, 10 * p + n - 1)]
    ids = [c[0] for c in cells] + [e[0] for e in extra]
    cohort = pl.DataFrame(
        {
            "patient_id": ids,
            "sex": [c[1] for c in cells] + [e[1] for e in extra],
            "at_risk_hf": [True] * len(ids),
            "incident_hf": [c[4] > 0 for c in cells] + [True] * len(extra),
        }
    )
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
    rates = rates_block(persontime.drop("calendar_year"), ["hf"], {"hf": 12})
    block = smr_block(persontime, cohort, table, rates)
    row = smr_summary(block, table, frozenset(), 5).row(0, named=True)
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
    rates = rates_block(persontime.drop("calendar_year"), ["hf"], {"hf": 12})
    block = smr_block(persontime, cohort, table, rates)
    row = smr_summary(block, table, frozenset({"events|hf"}), 5).row(0, named=True)
    assert row["observed"] == "*"
    assert (row["smr"], row["smr_low"], row["smr_high"]) == (None, None, None)
    assert row["expected"] == 10.5  # person-time times rates: shown
    assert "suppressed" in row["note"]


# Two bands by two sexes, by hand. Events (F 40-49, F 50-59, M 40-49, M 50-59) = 6, 3, 2, 2 over
# 2,000, 1,000, 1,000 and 500 person-years; women's rate 1.5 per 1,000 at 40-59, men's 4:
#   all       13 observed, expected 3.0 + 1.5 + 4.0 + 2.0 = 10.5
#   40-49      8 observed, expected 3.0 + 4.0 = 7.0         SMR 8 / 7   = 1.1429
#   50-59      5 observed, expected 1.5 + 2.0 = 3.5         SMR 5 / 3.5 = 1.4286
#   F          9 observed, expected 3.0 + 1.5 = 4.5         SMR 9 / 4.5 = 2.0
#   M          4 observed, expected 4.0 + 2.0 = 6.0         SMR 4 / 6   = 0.6667
BY_HAND = [
    ("all", "all", "13", 10.5, 1.24),
    ("40-49", "all", "8", 7.0, 1.14),
    ("50-59", "all", "5", 3.5, 1.43),
    ("all", "F", "9", 4.5, 2.0),
    ("all", "M", "4", 6.0, 0.67),
]
BY_SEX = RATES.replace("hf,F,40,54,1.5\nhf,F,55,,9", "hf,F,40,59,1.5\nhf,F,60,,9")


def _smr_rows(hidden: frozenset[str] = frozenset()) -> list[dict[str, object]]:
    persontime, cohort = _persontime((6, 3, 2, 2))
    table = _table(BY_SEX)
    rates = rates_block(persontime.drop("calendar_year"), ["hf"], {"hf": 13})
    return smr_summary(smr_block(persontime, cohort, table, rates), table, hidden, 5).to_dicts()


def test_smr_by_age_band_and_sex_by_hand() -> None:
    rows = _smr_rows()
    got = [(r["age_band"], r["sex"], r["observed"], r["expected"], r["smr"]) for r in rows]
    assert got == BY_HAND
    for r in rows:
        observed, expected = int(str(r["observed"])), float(str(r["expected"]))
        # Exact limits of an SMR (observed Poisson, expected fixed) in the gamma form: the
        # lower limit is the 2.5% quantile of Gamma(k, 1), the upper the 97.5% quantile of
        # Gamma(k + 1, 1), over the expected count (the chi-square limits of Garwood 1936
        # halved; the equivalence from memory), with scipy's gamma quantiles.
        low = stats.gamma.ppf(0.025, observed) / expected
        high = stats.gamma.ppf(0.975, observed + 1) / expected
        assert (r["smr_low"], r["smr_high"]) == (round(low, 2), round(high, 2)), r
    # and written out for men: 4 events, 6 expected -> 0.1817 to 1.7069
    assert (rows[-1]["smr_low"], rows[-1]["smr_high"]) == (0.18, 1.71)


def test_smr_rows_add_up_and_a_hidden_band_or_sex_leaves_its_smr_out() -> None:
    rows = _smr_rows(frozenset({"pt|hf|50-59|all", "pt|hf|sex|M"}))
    by = {(r["age_band"], r["sex"]): r for r in rows}
    assert by[("50-59", "all")]["observed"] == "*"
    assert by[("all", "M")]["observed"] == "<5"
    for key in (("50-59", "all"), ("all", "M")):
        assert (by[key]["smr"], by[key]["smr_low"], by[key]["smr_high"]) == (None, None, None)
        assert by[key]["expected"] is not None  # person-time times rates: shown
    assert by[("40-49", "all")]["smr"] == 1.14  # the others are shown


def test_the_sex_counts_are_tied_to_the_total_and_to_table_one() -> None:
    persontime, cohort = _persontime((6, 3, 2, 2))
    table = _table(BY_SEX)
    rates = rates_block(persontime.drop("calendar_year"), ["hf"], {"hf": 13})
    block = smr_block(persontime, cohort, table, rates)
    assert block.relations == ((("events|hf", -1), ("pt|hf|sex|F", 1), ("pt|hf|sex|M", 1)),)
    # each sex's events are the incident cases of that sex, as Table 1 counts them
    assert block.meanings["pt|hf|sex|F"] == (("at|hf", "true"), ("inc|hf", "true"), ("sex", "F"))
    band_keys = set(rates.frame["events#key"].to_list())
    assert {k for k in block.frame["events#key"] if "|sex|" not in k} <= band_keys


def test_a_table_without_sex_gives_smrs_by_sex_from_the_same_rates() -> None:
    persontime, cohort = _persontime((6, 3, 2, 2))
    table = _table("outcome,age_start,age_end,rate_per_1000_py\nhf,40,49,2\nhf,50,,4\n")
    rates = rates_block(persontime.drop("calendar_year"), ["hf"], {"hf": 13})
    rows = smr_summary(smr_block(persontime, cohort, table, rates), table, frozenset(), 5)
    by = {(r["age_band"], r["sex"]): r["expected"] for r in rows.to_dicts()}
    # F: 2,000 x 2 + 1,000 x 4 = 8.0 per 1,000; M: 1,000 x 2 + 500 x 4 = 4.0
    assert (by[("all", "F")], by[("all", "M")], by[("all", "all")]) == (8.0, 4.0, 12.0)


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
        (
            "outcome,sex,age_start,age_end,rate_per_1000_py\nhf,F,40,,1\nhf,W,40,,1\n",
            "rates.csv:6:4",
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
    band_events = {
        (r["outcome"], r["age_band"]): r["events"]
        for r in _rows(smr_build / "summary" / "rates.csv")
        if r["calendar_year"] == "all"
    }
    outcomes = ["type2_diabetes", "ckd", "heart_failure"]
    assert [r["outcome"] for r in smr if r["age_band"] == r["sex"] == "all"] == outcomes
    for o in outcomes:  # the whole outcome, then its bands (those with person-time), sexes
        groups = [(r["age_band"], r["sex"]) for r in smr if r["outcome"] == o]
        bands = [(b, "all") for x, b in band_events if x == o and b != "all"]
        at_risk = cohort.filter(pl.col(f"at_risk_{o}"))["sex"].unique().sort().to_list()
        assert at_risk == ["F", "M"]
        assert groups == [("all", "all"), *bands, ("all", "F"), ("all", "M")]
    for r in smr:
        o, band, sex = r["outcome"], r["age_band"], r["sex"]
        if sex == "all":  # the outcome's and each band's count: the rates table's cells
            assert r["observed"] == band_events[(o, band)]
        if band == sex == "all":
            assert r["observed"] == incidence[o]  # the same count, suppressed the same way
        cells = persontime.filter(pl.col(f"days_at_risk_{o}").is_not_null()).join(
            cohort.select("patient_id", "sex"), on="patient_id"
        )
        if band != "all":
            cells = cells.filter(pl.col("age_band") == band)
        if sex != "all":
            cells = cells.filter(pl.col("sex") == sex)
            events = cells[f"events_{o}"].sum()
            assert r["observed"] == (str(events) if events >= 5 else r["observed"])
        expected = sum(
            c[f"days_at_risk_{o}"] / 365.25 * rates[(o, c["sex"], c["age_band"][:1])] / 1000
            for c in cells.iter_rows(named=True)
        )
        assert float(r["expected"]) == pytest.approx(expected, abs=0.005)
        if r["observed"] not in ("<5", "*"):
            assert float(r["smr"]) == pytest.approx(int(r["observed"]) / expected, abs=0.005)
        else:
            assert r["smr"] == ""
    for o in outcomes:  # where shown, the bands and the sexes add up to the incident cases
        for part in (
            [r["observed"] for r in smr if r["outcome"] == o and r["sex"] == "all"][1:],
            [r["observed"] for r in smr if r["outcome"] == o and r["sex"] != "all"],
        ):
            if all(x.isdigit() for x in [*part, incidence[o]]):
                assert sum(map(int, part)) == int(incidence[o])
    page = (smr_build / "report.html").read_text(encoding="utf-8")
    assert "Observed and expected events" in page
    assert "<td>sex F</td>" in page
    assert "<td>age 60-69</td>" in page
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
