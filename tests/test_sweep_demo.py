"""The sweep on the demo extract: properties of overrides, separate builds, disclosure.

- A variant identical to the base gives no gained or lost patient and the base's numbers.
- Widening a ``within_days`` never delays or removes an onset; raising a ``need`` count never
  advances or creates one.
- Each variant of the shipped example sweep gives, in one run, exactly the cohort (and so the
  numbers) of a separate build of the same variant.
- The released tables of every variant, read as one linked system by a reader who writes down
  every identity they imply, leave no hidden count (nor any difference of two overlapping sets
  that is small) narrower than the threshold.
"""

from __future__ import annotations

import csv
import itertools
from pathlib import Path

import polars as pl
import pyarrow.parquet as pq
import pytest

from pipeline import BuildOptions, build_study
from pipeline.stats._disclosure import feasible_range
from pipeline.workflows._sweep_numbers import COUNTS, sweep_rows
from pipeline.workflows.sweep import SweepOptions, run_sweep, write_sweep, write_variant_inputs

from .conftest import DEMO_STUDY

EXAMPLE = DEMO_STUDY.parent / "orvane_hf_window_sweep.yaml"
pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def property_run(tmp_path_factory: pytest.TempPathFactory):  # type: ignore[no-untyped-def]
    folder = tmp_path_factory.mktemp("sweep")
    file = folder / "sweep.yaml"
    file.write_text(
        f"sweep: properties\nbase: {DEMO_STUDY.resolve()}\n"
        "variants:\n"
        "  same:\n"
        "    definition.heart_failure.rules.0.within_days: 730\n"
        "  wider:\n"
        "    definition.heart_failure.rules.0.within_days: 1095\n"
        "    definition.ckd.rules.1.within_days: 1095\n"
        "    definition.type2_diabetes.rules.0.within_days: 1095\n"
        "  more_needed:\n"
        "    definition.heart_failure.rules.0.need.hf_code: 3\n"
        "    definition.ckd.rules.1.need.ckd_code: 3\n",
        encoding="utf-8",
    )
    return run_sweep(file, SweepOptions(threads=1))


def _onsets(run, variant: str, outcome: str) -> dict:  # type: ignore[no-untyped-def]
    frame = pl.from_arrow(run.cohorts[variant]).select("patient_id", f"onset_{outcome}")
    return dict(frame.iter_rows())


def test_an_identical_variant_gives_the_base_numbers(property_run) -> None:  # type: ignore[no-untyped-def]
    for outcome in property_run.sweep.outcomes:
        base, same = (
            next(r for r in property_run.rows if r["variant"] == v and r["outcome"] == outcome)
            for v in ("base", "same")
        )
        assert (same["gained"], same["lost"], same["jaccard"]) == (0, 0, 1.0)
        keys = [*COUNTS, "cumulative_incidence", "ci_low", "ci_high", "rate_per_1000py"]
        assert [same[k] for k in keys] == [base[k] for k in keys]


@pytest.mark.parametrize("outcome", ["heart_failure", "ckd", "type2_diabetes"])
def test_widening_a_window_never_delays_nor_removes_an_onset(property_run, outcome: str) -> None:  # type: ignore[no-untyped-def]
    base, wider = _onsets(property_run, "base", outcome), _onsets(property_run, "wider", outcome)
    checked = 0
    for patient, onset in base.items():
        if onset is None or patient not in wider:
            continue
        assert wider[patient] is not None, patient
        assert wider[patient] <= onset, patient
        checked += 1
    assert checked > 20
    assert sum(v is not None for v in wider.values()) >= sum(v is not None for v in base.values())


@pytest.mark.parametrize("outcome", ["heart_failure", "ckd"])
def test_raising_a_need_never_advances_nor_creates_an_onset(property_run, outcome: str) -> None:  # type: ignore[no-untyped-def]
    base = _onsets(property_run, "base", outcome)
    more = _onsets(property_run, "more_needed", outcome)
    changed = 0
    for patient, onset in more.items():
        if onset is None or patient not in base:
            continue
        assert base[patient] is not None, patient
        assert onset >= base[patient], patient
        changed += onset != base[patient]
    assert changed > 0  # the property is not checked on an override that changes nothing


@pytest.fixture(scope="module")
def example_run():  # type: ignore[no-untyped-def]
    return run_sweep(EXAMPLE, SweepOptions(threads=1))


def test_each_variant_equals_a_separate_build(example_run, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    sweep = example_run.sweep
    separate = {"base": example_run.cohorts["base"]}
    for variant in sweep.variants:
        out = tmp_path / "builds" / variant.name
        study = write_variant_inputs(sweep, variant, tmp_path / "inputs" / variant.name, out)
        build_study(study, BuildOptions(out=out, threads=1))
        separate[variant.name] = pq.read_table(out / "cohort.parquet")
        # Every column the numbers read (a build writes measure covariates rounded).
        columns = ["patient_id", "followup_days", "end_reason"] + [
            f"{p}_{o}"
            for o in sweep.outcomes
            for p in ("prevalent", "at_risk", "incident", "onset", "days_to")
        ]
        alone = separate[variant.name].select(columns)
        assert alone.equals(example_run.cohorts[variant.name].select(columns)), variant.name
    rows = sweep_rows(separate, sweep.outcomes)
    for alone, together in zip(rows, example_run.rows, strict=True):
        for key in (k for k in alone if k != "sets"):
            assert alone[key] == together[key] or alone[key] != alone[key], key  # NaN == NaN


def _reader_system(released: list[dict], rows: list[dict]):  # type: ignore[no-untyped-def]
    """Cells and identities a reader writes down from the released table alone."""
    values, relations, unknown = {}, [], set()
    truth = {(r["variant"], r["outcome"]): r for r in rows}

    def cell(name: str, value: int, shown: str | None) -> str:
        values[name] = value
        if shown is None or shown in ("*", "<5"):
            unknown.add(name)
        return name

    for row in released:
        v, o = row["variant"], row["outcome"]
        exact = truth[(v, o)]
        c = {
            k: cell(f"{k}|{v}" if k == "cohort" else f"{k}|{v}|{o}", exact[k], row[k])
            for k in COUNTS
            if v != "base" or k not in ("gained", "lost")
        }
        sets = exact["sets"]
        other = cell(f"other|{v}|{o}", len(sets["other"]), None)
        rest = cell(f"not_incident|{v}|{o}", len(sets["at_risk_not_incident"]), None)
        relations += [
            ((c["cohort"], 1), (c["prevalent"], -1), (c["at_risk"], -1), (other, -1)),
            ((c["at_risk"], 1), (c["incident"], -1), (rest, -1)),
        ]
        if v != "base":
            both = cell(f"both|{v}|{o}", len(sets["both"]), None)
            relations += [
                ((c["incident"], 1), (both, -1), (c["gained"], -1)),
                ((f"incident|base|{o}", 1), (both, -1), (c["lost"], -1)),
            ]
    differences = []
    for o in {r["outcome"] for r in rows}:
        group = [r for r in rows if r["outcome"] == o]
        for a, b in itertools.combinations(group, 2):
            for kind in ("cohort", "prevalent", "at_risk", "incident"):
                names = [
                    f"{kind}|{r['variant']}" + ("" if kind == "cohort" else f"|{o}") for r in (a, b)
                ]
                sa, sb = a["sets"][kind], b["sets"][kind]
                tag = f"{kind}|{a['variant']}|{b['variant']}|{o}"
                common = cell(f"common|{tag}", len(sa & sb), None)
                only_a = cell(f"a_only|{tag}", len(sa - sb), None)
                only_b = cell(f"b_only|{tag}", len(sb - sa), None)
                relations += [
                    ((names[0], 1), (common, -1), (only_a, -1)),
                    ((names[1], 1), (common, -1), (only_b, -1)),
                ]
                differences += [only_a, only_b]
    return values, relations, unknown, differences


def test_the_released_tables_of_all_variants_are_safe_as_one_system(
    example_run, tmp_path: Path
) -> None:  # type: ignore[no-untyped-def]
    threshold = example_run.sweep.base.study.output.small_cell_threshold
    write_sweep(example_run, tmp_path / "out")
    with (tmp_path / "out" / "sweep.csv").open(encoding="utf-8") as handle:
        released = list(csv.DictReader(handle))
    for row in released:
        for key in COUNTS:
            row[key] = row[key] or None
    values, relations, unknown, differences = _reader_system(released, example_run.rows)
    hidden = [
        f"{k}|{r['variant']}" + ("" if k == "cohort" else f"|{r['outcome']}")
        for r in released
        for k in COUNTS
        if r[k] in ("*", f"<{threshold}")
    ]
    assert hidden  # the example does hide something: the check is not empty
    small = [d for d in differences if 1 <= values[d] < threshold]
    assert small
    for name in sorted(set(hidden) | set(small)):
        low, high = feasible_range(name, values, relations, unknown)
        assert high - low >= threshold, (name, low, high)
