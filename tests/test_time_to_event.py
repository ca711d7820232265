"""``time_X`` / ``event_X`` on the demo extract, the Parquet column metadata, the README example.

The time-to-event columns are checked against the columns they restate, for every patient and
in both directions (each value of ``event_X`` implies its conditions and each condition implies
that value), so neither can drift from ``incident_X`` and the follow-up columns.
"""

from __future__ import annotations

import csv
import json
import re
from pathlib import Path

import polars as pl
import pyarrow.parquet as pq
import pytest

from pipeline.workflows.build import BuildOptions, build_study

from .conftest import DEMO_STUDY, ROOT

OUTCOMES = ("type2_diabetes", "ckd", "heart_failure")


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("demo") / "output" / "orvane_multimorbidity"
    build_study(DEMO_STUDY, BuildOptions(out=out))
    return out


@pytest.fixture(scope="module")
def cohort(demo: Path) -> pl.DataFrame:
    return pl.read_parquet(demo / "cohort.parquet")


def test_columns_sit_right_after_days_to(cohort: pl.DataFrame) -> None:
    for name in OUTCOMES:
        at = cohort.columns.index(f"days_to_{name}")
        assert cohort.columns[at + 1 : at + 3] == [f"time_{name}", f"event_{name}"]
        assert cohort.schema[f"time_{name}"] == pl.Int32
        assert cohort.schema[f"event_{name}"] == pl.Int32


@pytest.mark.parametrize("name", OUTCOMES)
def test_time_and_event_agree_with_the_other_columns(cohort: pl.DataFrame, name: str) -> None:
    rows = cohort.select(
        "patient_id",
        "index_date",
        "followup_end",
        "followup_days",
        "end_reason",
        f"prevalent_{name}",
        f"at_risk_{name}",
        f"incident_{name}",
        f"onset_{name}",
        f"days_to_{name}",
        f"time_{name}",
        f"event_{name}",
    ).rows()
    seen = {0: 0, 1: 0, 2: 0, None: 0}
    for (
        pid,
        index,
        end,
        days,
        reason,
        prevalent,
        at_risk,
        incident,
        onset,
        days_to,
        time,
        event,
    ) in rows:
        seen[event] += 1
        assert at_risk == (not prevalent), pid  # the demo has no clear_before
        if not at_risk:
            assert (incident, time, event) == (None, None, None), pid
            continue
        # incident restated from the dates, not from incident_X
        by_dates = onset is not None and index < onset <= end
        assert incident == by_dates, pid
        # forward: each condition gives its event and time
        if by_dates:
            assert (event, time) == (1, (onset - index).days), pid
            assert time == days_to, pid
        elif reason == "death":
            assert (event, time) == (2, days), pid
        else:
            assert (event, time) == (0, days), pid
        # backward: each event value implies its conditions
        assert (event == 1) == bool(incident), pid
        assert (event == 2) == (reason == "death" and not incident), pid
        assert (event == 0) == (reason != "death" and not incident), pid
        assert 0 <= time <= days, pid
    # all three kinds and patients not at risk occur on the demo extract (the test means something)
    assert all(seen[k] > 0 for k in (0, 1, 2, None)), seen


def test_an_onset_on_the_day_of_death_is_the_outcome(cohort: pl.DataFrame) -> None:
    # Whichever outcome has such patients on the demo extract; at least one must.
    found = 0
    for name in OUTCOMES:
        same_day = cohort.filter(
            (pl.col("end_reason") == "death")
            & (pl.col(f"onset_{name}") == pl.col("followup_end"))
            & pl.col(f"at_risk_{name}")
        )
        found += same_day.height
        assert (same_day[f"event_{name}"] == 1).all()
    if found == 0:
        pytest.skip("no onset on the day of death on this extract (checked by hand elsewhere)")


def test_column_labels_and_units_are_in_the_parquet_file(demo: Path) -> None:
    schema = pq.read_schema(demo / "cohort.parquet")
    with (demo / "dictionary.csv").open(encoding="utf-8") as handle:
        dictionary = {row["column"]: row for row in csv.DictReader(handle)}
    assert set(schema.names) == set(dictionary)
    for field in schema:
        meta = field.metadata
        assert meta[b"description"].decode() == dictionary[field.name]["meaning"]
        unit = dictionary[field.name]["unit"]
        assert meta.get(b"unit", b"").decode() == unit
    assert schema.field("time_ckd").metadata[b"unit"] == b"days"
    # polars does not expose field metadata; it reads the schema-level JSON copy
    stored = json.loads(pl.read_parquet_metadata(demo / "cohort.parquet")["ascertain.columns"])
    assert stored["followup_days"] == {
        "description": "length of follow-up",
        "unit": "days",
        "computed": "followup_end - index_date",
    }
    assert set(stored) == set(dictionary)
    # and the data still reads in polars with the same values as pyarrow
    assert pl.read_parquet(demo / "cohort.parquet").equals(
        pl.from_arrow(pq.read_table(demo / "cohort.parquet"))
    )


def test_readme_survival_examples_run(demo: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    blocks = [
        re.search(rf"<!-- {name} -->\n```python\n(.*?)```", readme, re.S)
        for name in ("survival-example", "cox-example")
    ]
    assert all(blocks)
    code = [block.group(1) for block in blocks if block]
    assert len([line for line in code[0].splitlines() if line.strip()]) <= 5
    # the first block reads output/orvane_multimorbidity/cohort.parquet from the working folder
    monkeypatch.chdir(demo.parent.parent)
    namespace: dict[str, object] = {}
    for text in code:
        exec(compile(text, "README.md", "exec"), namespace)  # the README's own blocks
    km, cox, hf = namespace["km"], namespace["cox"], namespace["hf"]
    # the fits used every patient at risk and their events
    events = int((hf["event_heart_failure"] == 1).sum())
    assert events > 0
    assert km.event_observed.sum() == events
    assert (
        len(km.durations)
        == len(hf)
        == int(
            pl.read_parquet("output/orvane_multimorbidity/cohort.parquet")[
                "at_risk_heart_failure"
            ].sum()
        )
    )
    assert cox.params.shape == (1,)
    assert hf["time_heart_failure"].notna().all()
