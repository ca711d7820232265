"""The report's rates section: person-time by age band and year, suppressed and standardised."""

from __future__ import annotations

import csv
from datetime import date
from pathlib import Path

import polars as pl
import pytest

from pipeline.outputs.report import write_report
from pipeline.outputs.report._rates import rates_block, rates_summary, standardised_summary
from pipeline.stats import direct_standardised_rate, protect_cells
from pipeline.stats._disclosure import feasible_range
from pipeline.workflows.build import BuildOptions, build_study

from .conftest import DEMO_STUDY, HANDMADE
from .helpers import demo_study_variant


def _persontime(cells: list[tuple[str, int, int, int]]) -> pl.DataFrame:
    """A hand-made person-time table: (age band, year, days at risk, events) per cell."""
    rows = [
        {
            "patient_id": i,
            "age_band": band,
            "age_band_start": int(band.rstrip("+").split("-")[0]),
            "calendar_year": year,
            "cell_start": date(year, 1, 1),
            "cell_end": date(year, 12, 31),
            "days": days,
            "days_at_risk_ckd": days,
            "events_ckd": events,
        }
        for i, (band, year, days, events) in enumerate(cells)
    ]
    return pl.DataFrame(rows)


CELLS = [
    ("40-49", 2016, 365_250, 20),
    ("40-49", 2017, 365_250, 11),
    ("50-59", 2016, 365_250, 2),  # the one small count
    ("50-59", 2017, 365_250, 9),
    ("60+", 2016, 365_250, 30),
    ("60+", 2017, 365_250, 25),
]


def _rows(path: Path) -> list[dict[str, str]]:
    with path.open(encoding="utf-8") as handle:
        return list(csv.DictReader(handle))


def test_a_small_band_cannot_be_worked_out_from_the_incident_total() -> None:
    frame = _persontime(CELLS).drop("calendar_year")  # bands only: 31, 11 and 55 events
    frame = frame.with_columns(
        pl.when(pl.col("age_band") == "50-59")
        .then(pl.col("events_ckd") // 3)
        .otherwise(pl.col("events_ckd"))
    )  # 50-59 now has 0 + 3 = 3 events
    total = int(frame["events_ckd"].sum())
    block = rates_block(frame, ["ckd"], {"ckd": total})
    values = block.values()
    assert values["events|ckd"] == total  # shares the incidence table's key
    hidden = protect_cells(values, block.all_relations(), 5)
    assert "pt|ckd|50-59|all" in hidden
    # The reader's identity, written here from what the counts mean: the bands' events add up
    # to the incident cases the incidence table shows.
    bands = [k for k in values if k.startswith("pt|ckd|")]
    reader = [(("events|ckd", -1), *((k, 1) for k in bands))]
    for key in hidden:
        low, high = feasible_range(key, values, reader, hidden)
        assert high - low >= 5, key
    published = rates_summary(block, hidden, 5)
    small = published.filter(pl.col("age_band") == "50-59")
    assert small["events"].to_list() == ["<5"]
    assert small["rate_per_1000_py"].to_list() == [None]
    # every hidden count's rate and interval are left out
    gone = published.filter(pl.col("events").is_in(["<5", "*"]))
    assert gone.height >= 2
    assert gone["rate_per_1000_py"].null_count() == gone.height
    assert gone["rate_low"].null_count() == gone.height


def test_the_total_takes_its_own_key_when_it_differs_from_the_incidence_table() -> None:
    block = rates_block(_persontime(CELLS), ["ckd"], {"ckd": 1})
    assert "pt|ckd|all|all" in block.frame["events#key"].to_list()
    assert "events|ckd" not in block.frame["events#key"].to_list()


def test_shown_rates_are_events_over_person_years_and_standardised_over_bands() -> None:
    block = rates_block(_persontime(CELLS), ["ckd"], {"ckd": 97})
    published = rates_summary(block, frozenset(), 5)
    row = published.filter((pl.col("age_band") == "40-49") & (pl.col("calendar_year") == "all"))
    assert row["events"].to_list() == ["31"]
    assert row["person_years"].to_list() == [2000.0]
    assert row["rate_per_1000_py"].to_list() == [15.5]
    standardised = standardised_summary(block, frozenset())
    esp = standardised.filter(pl.col("standard") == "European Standard Population 2013")
    # ESP 2013 weights: 40-49 = 7000 + 7000, 50-59 = 7000 + 6500, 60+ = 6000 + ... + 200
    expected = direct_standardised_rate([31, 11, 55], [2000.0] * 3, [14000, 13500, 25500])
    assert esp["rate_per_1000_py"].to_list() == [round(expected.estimate, 2)]
    hidden = standardised_summary(block, frozenset({"pt|ckd|50-59|all"}))
    assert hidden["rate_per_1000_py"].null_count() == hidden.height
    assert hidden["note"].str.contains("suppressed").all()


def test_bands_that_cut_a_standard_band_are_named_not_standardised() -> None:
    cells = [("18-29", 2016, 36525, 5), ("30+", 2016, 36525, 9)]
    block = rates_block(_persontime(cells), ["ckd"], {"ckd": 14})
    notes = standardised_summary(block, frozenset())["note"].to_list()
    assert all("the age band 18-29 cuts the band 15-19" in n for n in notes)


def test_without_calendar_years_the_bands_are_the_cells() -> None:
    frame = _persontime(CELLS).drop("calendar_year")
    block = rates_block(frame, ["ckd"], {"ckd": 97})
    assert set(block.frame["calendar_year"]) == {"all"}
    assert block.frame.height == 4  # three bands and the total


BANDS = "{age_bands: [40, 50, 60, 70, 80], calendar_year: true}"
"""The demo study's person-time option in these tests: its age step admits 40 to 85."""


def build_with_rates(folder: Path, persontime: str = BANDS, extract: Path | None = None) -> Path:
    """Build the demo study with a ``persontime:`` section and write its report."""
    study = demo_study_variant(folder, persontime=persontime)
    out = folder / "out"
    build_study(study, BuildOptions(extract=extract, out=out))
    write_report(out)
    return out


@pytest.fixture(scope="module")
def tiny_rates(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return build_with_rates(tmp_path_factory.mktemp("tiny_rates"), extract=HANDMADE)


@pytest.fixture(scope="module")
def demo_rates(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return build_with_rates(tmp_path_factory.mktemp("demo_rates"))


def _by_hand(persontime: pl.DataFrame, outcome: str) -> pl.DataFrame:
    """Events, days at risk and the rate per 1,000 person-years of each band, from the file."""
    return (
        persontime.filter(pl.col(f"days_at_risk_{outcome}").is_not_null())
        .group_by("age_band")
        .agg(
            events=pl.col(f"events_{outcome}").cast(pl.Int64).sum(),
            days=pl.col(f"days_at_risk_{outcome}").cast(pl.Int64).sum(),
        )
        .with_columns(rate=pl.col("events") / (pl.col("days") / 365.25) * 1000)
    )


def test_the_report_shows_rates_when_the_build_has_person_time(tiny_rates: Path) -> None:
    page = (tiny_rates / "report.html").read_text(encoding="utf-8")
    assert 'id="rates"' in page
    assert "Rates by age band" in page
    assert "Each year's cell" in page
    assert "counted in the age band and calendar year it falls in;" in page
    assert page.count('<svg class="rates"') == 3  # one small panel per outcome
    assert "Fay and Feuer" in page
    assert "Ahmad OB" in page
    assert "Eurostat" in page
    rates = _rows(tiny_rates / "summary" / "rates.csv")
    incidence = {r["outcome"]: r["events"] for r in _rows(tiny_rates / "summary" / "incidence.csv")}
    for r in rates:
        if r["age_band"] == "all":
            assert r["events"] == incidence[r["outcome"]]
        if r["events"] in ("<5", "*"):
            assert r["rate_per_1000_py"] == ""
    # a standardised rate is left out when a band it uses is hidden
    hidden = {
        r["outcome"]
        for r in rates
        if r["calendar_year"] == "all" and r["age_band"] != "all" and r["events"] in ("<5", "*")
    }
    assert hidden  # the tiny cohort has small bands
    for r in _rows(tiny_rates / "summary" / "standardised_rates.csv"):
        assert (r["rate_per_1000_py"] == "") == (r["outcome"] in hidden), r


def test_the_report_is_the_same_twice_with_rates(tiny_rates: Path) -> None:
    first = {p.name: p.read_bytes() for p in (tiny_rates / "summary").glob("*.csv")}
    write_report(tiny_rates)
    second = {p.name: p.read_bytes() for p in (tiny_rates / "summary").glob("*.csv")}
    assert first == second


def test_band_events_add_up_to_the_incident_cases_of_the_real_build(tiny_rates: Path) -> None:
    persontime = pl.read_parquet(tiny_rates / "persontime.parquet")
    cohort = pl.read_parquet(tiny_rates / "cohort.parquet")
    outcomes = ["type2_diabetes", "ckd", "heart_failure"]
    incident = {o: int(cohort[f"incident_{o}"].sum()) for o in outcomes}
    assert sum(incident.values()) > 0  # the tiny extract has incident cases to count
    block = rates_block(persontime, outcomes, incident)
    published = rates_summary(block, frozenset(), 5)  # unsuppressed, to compare every cell
    for o in outcomes:
        hand = _by_hand(persontime, o)
        assert int(hand["events"].sum()) == incident[o]
        # the outcome's total shares the incidence table's key, so suppression links them
        total = block.frame.filter((pl.col("outcome") == o) & (pl.col("age_band") == "all"))
        assert total["events#key"].to_list() == [f"events|{o}"]
        bands = published.filter(
            (pl.col("outcome") == o) & (pl.col("calendar_year") == "all")
        ).join(hand, on="age_band", how="left")
        assert bands.height == hand.height + 1  # each band and the whole outcome
        for r in bands.filter(pl.col("age_band") != "all").iter_rows(named=True):
            assert r["events"] == str(r["events_right"])
            assert abs(r["person_years"] - r["days"] / 365.25) <= 0.05
            assert abs(r["rate_per_1000_py"] - r["rate"]) <= 0.005 + 1e-9


@pytest.mark.slow
def test_the_demo_rates_agree_with_its_incidence_table(demo_rates: Path) -> None:
    page = (demo_rates / "report.html").read_text(encoding="utf-8")
    assert 'id="rates"' in page
    persontime = pl.read_parquet(demo_rates / "persontime.parquet")
    rates = _rows(demo_rates / "summary" / "rates.csv")
    for row in _rows(demo_rates / "summary" / "incidence.csv"):
        o = row["outcome"]
        hand = _by_hand(persontime, o)
        assert str(hand["events"].sum()) == row["events"]  # the demo shows every total
        total = next(r for r in rates if r["outcome"] == o and r["age_band"] == "all")
        assert (total["events"], total["person_years"]) == (row["events"], row["person_years"])
        assert total["rate_per_1000_py"] == row["rate_per_1000_py"]
        shown = [
            r
            for r in rates
            if r["outcome"] == o and r["age_band"] != "all" and r["calendar_year"] == "all"
        ]
        assert len(shown) == hand.height == 5  # 40-49 ... 80+
        for r in shown:
            cell = hand.filter(pl.col("age_band") == r["age_band"]).row(0, named=True)
            if r["events"] in ("<5", "*"):
                continue
            assert int(r["events"]) == cell["events"]
            assert abs(float(r["rate_per_1000_py"]) - cell["rate"]) <= 0.005 + 1e-9
            assert abs(float(r["person_years"]) - cell["days"] / 365.25) <= 0.05


def test_rates_without_calendar_years_and_with_time_since_index(
    tmp_path: Path, tiny_rates: Path
) -> None:
    # calendar_year: false leaves the column out; time since index splits cells further but
    # the rates are by age band only, so each band sums the same days and events as before.
    option = "{age_bands: [40, 50, 60, 70, 80], calendar_year: false, since_index_years: [0, 1, 3]}"
    out = build_with_rates(tmp_path, option, extract=HANDMADE)
    persontime = pl.read_parquet(out / "persontime.parquet")
    assert "calendar_year" not in persontime.columns
    assert "since_index_band" in persontime.columns
    assert set(persontime["since_index_band"]) == {"0-1", "1-3", "3+"}
    by_year = pl.read_parquet(tiny_rates / "persontime.parquet")
    rates = _rows(out / "summary" / "rates.csv")
    assert rates
    assert {r["calendar_year"] for r in rates} == {"all"}
    outcomes = ["type2_diabetes", "ckd", "heart_failure"]
    columns = ["outcome", "age_band", "events", "person_years"]

    def bands(frame: pl.DataFrame) -> pl.DataFrame:
        block = rates_block(frame, outcomes, {})
        rows = block.frame.filter(pl.col("calendar_year") == "all")
        if "since_index" in rows.columns:  # the rows by time since index (tests/test_rates_since)
            rows = rows.filter(pl.col("since_index") == "all")
        return rows.select(columns)

    assert bands(persontime).to_dicts() == bands(by_year).to_dicts()
    page = (out / "report.html").read_text(encoding="utf-8")
    assert 'id="rates"' in page
    assert page.count('<svg class="rates"') == 3
    # without years the notes speak of bands only
    assert "Each year's cell" not in page
    assert "counted in the age band it falls in;" in page


def test_no_person_time_no_rates_section(tmp_path: Path) -> None:
    out = tmp_path / "out"
    build_study(DEMO_STUDY, BuildOptions(extract=HANDMADE, out=out))
    write_report(out)
    assert 'id="rates"' not in (out / "report.html").read_text(encoding="utf-8")
    assert not (out / "summary" / "rates.csv").exists()
