"""Rates by time since index: summed by hand from person-time, suppressed like the other bands."""

from __future__ import annotations

import csv
from datetime import date
from pathlib import Path

import polars as pl
import pytest

from pipeline.outputs.report._rates import rates_block, rates_summary
from pipeline.stats import protect_cells
from pipeline.stats._disclosure import feasible_range

from .conftest import HANDMADE
from .test_report_rates import build_with_rates

SINCE = "{age_bands: [40, 50, 60, 70, 80], since_index_years: [0, 1, 3]}"


def _cells(cells: list[tuple[str, str, int, int]]) -> pl.DataFrame:
    """A hand-made person-time table: (age band, since-index band, days at risk, events)."""
    return pl.DataFrame(
        [
            {
                "patient_id": i,
                "age_band": band,
                "age_band_start": int(band.rstrip("+").split("-")[0]),
                "calendar_year": 2016,
                "since_index_band": since,
                "cell_start": date(2016, 1, 1),
                "cell_end": date(2016, 12, 31),
                "days": days,
                "days_at_risk_ckd": days,
                "events_ckd": events,
            }
            for i, (band, since, days, events) in enumerate(cells)
        ]
    )


CELLS = [
    ("40-49", "0-1", 365_250, 12),
    ("40-49", "1-3", 365_250, 10),
    ("50-59", "0-1", 365_250, 9),
    ("50-59", "3+", 365_250, 3),  # the one small since-index band: 3+ has 3 events
    ("50-59", "1-3", 730_500, 8),
]


def test_since_index_rows_sum_the_bands_over_ages_and_years() -> None:
    block = rates_block(_cells(CELLS), ["ckd"], {"ckd": 42})
    rows = block.frame.filter(pl.col("since_index") != "all")
    # by hand: 0-1 = 12 + 9 events over 2,000 person-years; 1-3 = 10 + 8 over 3,000; 3+ = 3
    assert rows["since_index"].to_list() == ["0-1", "1-3", "3+"]
    assert rows["events"].to_list() == [21, 18, 3]
    assert rows["person_years"].to_list() == [2000.0, 3000.0, 1000.0]
    published = rates_summary(block, frozenset(), 5)
    since = published.filter(pl.col("since_index") != "all")
    assert since["rate_per_1000_py"].to_list() == [10.5, 6.0, 3.0]
    # every other row says "all" in the new column, and the age bands are as before
    others = published.filter(pl.col("since_index") == "all")
    assert set(others["age_band"]) == {"40-49", "50-59", "all"}


def test_a_small_since_band_is_hidden_with_a_complement() -> None:
    block = rates_block(_cells(CELLS), ["ckd"], {"ckd": 42})
    values = block.values()
    hidden = protect_cells(values, block.all_relations(), 5)
    assert "pt|ckd|since|3+" in hidden
    # The reader's identity, from what the counts mean: the since-index bands add up to the
    # incident cases of the incidence table (and the age bands too).
    since = [k for k in values if k.startswith("pt|ckd|since|")]
    ages = [k for k in values if k.startswith("pt|ckd|") and k.endswith("|all")]
    reader = [
        (("events|ckd", -1), *((k, 1) for k in since)),
        (("events|ckd", -1), *((k, 1) for k in ages)),
    ]
    for key in hidden:
        low, high = feasible_range(key, values, reader, hidden)
        assert high - low >= 5, key
    published = rates_summary(block, hidden, 5)
    small = published.filter(pl.col("since_index") == "3+")
    assert small["events"].to_list() == ["<5"]
    assert small["rate_per_1000_py"].to_list() == [None]


def test_without_the_split_the_rates_table_keeps_its_columns() -> None:
    block = rates_block(_cells(CELLS).drop("since_index_band"), ["ckd"], {"ckd": 42})
    assert "since_index" not in rates_summary(block, frozenset(), 5).columns


@pytest.fixture(scope="module")
def since_build(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return build_with_rates(tmp_path_factory.mktemp("rates_since"), SINCE, extract=HANDMADE)


def test_the_report_gives_rates_by_time_since_index(since_build: Path) -> None:
    persontime = pl.read_parquet(since_build / "persontime.parquet")
    with (since_build / "summary" / "rates.csv").open(encoding="utf-8") as handle:
        rates = list(csv.DictReader(handle))
    since = [r for r in rates if r["since_index"] != "all"]
    outcomes = {r["outcome"] for r in rates}
    assert {r["outcome"] for r in since} == outcomes
    for r in since:  # each band's events and person-years, summed here from the file
        o = r["outcome"]
        part = persontime.filter(
            pl.col(f"days_at_risk_{o}").is_not_null()
            & (pl.col("since_index_band") == r["since_index"])
        )
        assert abs(float(r["person_years"]) - part[f"days_at_risk_{o}"].sum() / 365.25) <= 0.05
        if r["events"] not in ("<5", "*"):
            assert int(r["events"]) == part[f"events_{o}"].sum()
    page = (since_build / "report.html").read_text(encoding="utf-8")
    assert "Rates by time since index" in page
