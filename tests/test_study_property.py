"""Properties of whole studies drawn at random from the study language.

A hypothesis strategy writes valid study files (index strategy, eligibility steps, covariates,
outcomes from the shipped definitions, horizon, look-back, follow-up, and sometimes measures of
the study's own, written as files beside it, with thresholds on them in any of their units,
person-time cells by age band, year and years since index, and matched controls) and
checks what must hold for every study: compiling is deterministic, every stage's Spark SQL reads
back with sqlglot's Spark reader, every stage reads only relations made earlier in the run (the
fake engine, no database), and one more exclusion step never adds a patient to the cohort.

The study's own measures are not in the shipped library; the property extract carries rows of
them (in both units) so that their thresholds select patients in the cohort property too.
"""

from __future__ import annotations

import datetime as dt
import shutil
from pathlib import Path
from typing import Any

import pytest
import sqlglot
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.engine import DuckDBEngine, SparkEngine
from pipeline.extract import discover_extract
from pipeline.workflows.build import plan_study

from .conftest import ROOT
from .fake_engine import FakeEngine

CONDITIONS = tuple(sorted(p.stem for p in (ROOT / "definitions" / "conditions").glob("*.yaml")))
MEASURES = ("bmi", "sbp", "hba1c", "egfr", "creatinine", "weight")
TABLES = ("patients", "encounters", "diagnoses", "prescriptions", "measurements")
# Measures a drawn study may declare as its own files. Conversions from memory: uric acid is
# 168.11 g/mol, so 1 mg/dL = 59.48 umol/L; creatinine is 113.12 g/mol, so 1 mg/g of creatinine
# = 1 mg per 8.84 mmol = 0.1131 mg/mmol. The numbers need only be valid, not clinical.
OWN_MEASURES = {
    "serum_urate": {
        "measure": "serum_urate",
        "title": "Serum urate (property test)",
        "canonical_unit": "umol/L",
        "plausible": [30, 1500],
        "codes": {"LOINC": ["3084-1"]},
        "units": [
            {"spellings": ["umol/L"]},
            {"spellings": ["mg/dL"], "factor": 59.48, "source": "168.11 g/mol (from memory)"},
        ],
    },
    "urine_acr": {
        "measure": "urine_acr",
        "title": "Urine albumin to creatinine ratio (property test)",
        "canonical_unit": "mg/mmol",
        "plausible": [0, 3000],
        "units": [
            {"spellings": ["mg/mmol"]},
            {"spellings": ["mg/g"], "factor": 0.1131, "source": "113.12 g/mol (from memory)"},
        ],
    },
}
# (canonical unit's threshold range, other unit, its factor) to draw thresholds in either unit
OWN_RANGES = {"serum_urate": (200, 600, "mg/dL", 59.48), "urine_acr": (1, 70, "mg/g", 0.1131)}
# Rows of the own measures in the property extract: (patient, date, measure, value, unit)
OWN_ROWS = [
    ("HM-001", "2015-06-01", "serum_urate", "450", "umol/L"),
    ("HM-002", "2016-02-10", "serum_urate", "5.1", "mg/dL"),
    ("HM-003", "2014-11-20", "serum_urate", "7.4", "mg/dL"),
    ("HX-001", "2016-03-01", "serum_urate", "310", "umol/L"),
    ("HM-004", "2015-09-09", "urine_acr", "35", "mg/mmol"),
    ("HM-005", "2016-04-04", "urine_acr", "120", "mg/g"),
    ("HX-002", "2015-12-12", "urine_acr", "2.5", "mg/mmol"),
    ("HX-003", "2016-07-07", "urine_acr", "600", "mg/g"),
]
PROPERTY = settings(
    max_examples=15,
    deadline=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)


def _window(low: int, high: int) -> st.SearchStrategy[list[int]]:
    return st.tuples(st.integers(low, high), st.integers(low, high)).map(sorted).map(list)


def _years() -> st.SearchStrategy[list[dt.date]]:
    return st.integers(2013, 2016).map(lambda y: [dt.date(y, 1, 1), dt.date(y + 1, 12, 31)])


INDEX = st.one_of(
    st.builds(lambda b: {"first_encounter": {"between": b}}, _years()),
    st.dates(dt.date(2014, 1, 1), dt.date(2017, 12, 31)).map(lambda d: {"fixed_date": d}),
    st.builds(
        lambda b, c: {"first_event": {"condition": c, "between": b}},
        _years(),
        st.sampled_from(CONDITIONS),
    ),
    st.builds(
        lambda b, atc: {
            "first_event": {"evidence": {"prescription": {"atc": [atc]}}, "between": b}
        },
        _years(),
        st.sampled_from(["C09", "C03C", "A10B", "C07"]),
    ),
    st.builds(
        lambda b, seed: {"random_encounter": {"between": b, "seed": seed}},
        _years(),
        st.integers(0, 1000),
    ),
    st.builds(lambda b: {"exposure_start": {"between": b}}, _years()),
)


def _exposure(atcs: list[str], washout: int, grace: int | None, treated: bool) -> dict[str, Any]:
    """An ``exposure:`` section: groups of drug classes, episodes and as treated optional."""
    section: dict[str, Any] = {
        "groups": {f"group_{i}": {"prescription": {"atc": [a]}} for i, a in enumerate(atcs)},
        "washout_days": washout,
    }
    if grace is not None:
        section["episodes"] = {"grace_days": grace, "cover_without_stop_days": 30}
        section["as_treated"] = treated
    return section


# Drug classes of the hand-made extracts, two or three groups compared.
EXPOSURE = st.builds(
    _exposure,
    st.lists(
        st.sampled_from(["C09", "C03C", "A10B", "C07", "C08"]), min_size=1, max_size=3, unique=True
    ),
    st.integers(0, 730),
    st.one_of(st.none(), st.integers(0, 90)),
    st.booleans(),
)

# Steps that only remove patients. in_contact_at_index is left out on purpose: a fixed-date
# study without it gets a default one, so adding one with a wider window can keep more people.
EXCLUSION = st.one_of(
    st.sampled_from([["F"], ["M"], ["F", "M"]]).map(lambda s: {"sex": s}),
    st.just({"alive_at_index": True}),
    st.tuples(st.integers(0, 70), st.integers(40, 100))
    .map(sorted)
    .map(lambda a: {"age": {"between": list(a)}}),
    st.integers(0, 1500).map(lambda d: {"history_days": d}),
    st.builds(
        lambda n, w: {"encounters": {"at_least": n, "window": w}},
        st.integers(1, 3),
        _window(-1095, 0),
    ),
    st.sampled_from(CONDITIONS).map(lambda c: {"not_prevalent": c}),
    st.builds(
        lambda code, w: {
            "no_evidence": {"evidence": {"diagnosis": {"ICD10": [code]}}, "window": w}
        },
        st.sampled_from(["I10", "I50", "E11", "N18", "J44"]),
        _window(-1825, 0),
    ),
    st.just({"at_risk_of_any_outcome": True}),
)


@st.composite
def own_threshold(draw: Any, measure: str) -> dict[str, Any]:
    """A measurement evidence on one of the study's own measures, in either of its units."""
    low, high, other, factor = OWN_RANGES[measure]
    value = draw(st.integers(low, high))
    # the same threshold written in the other unit (rounded: any valid number will do)
    written = draw(st.sampled_from([f"{value} {OWN_MEASURES[measure]['canonical_unit']}",
                                    f"{round(value / factor, 2)} {other}"]))  # fmt: skip
    comparison = draw(st.sampled_from(["at_least", "above", "below", "at_most"]))
    return {"measurement": {"measure": measure, comparison: written}}


def _covariate(kind: str, draw: Any, own: list[str]) -> dict[str, Any]:
    if kind in ("latest", "mean", "minimum", "maximum"):
        measure = draw(st.sampled_from([*MEASURES, *own]))
        return {kind: measure, "window": draw(_window(-1095, 0))}
    if kind == "count":
        if own and draw(st.booleans()):
            evidence = draw(own_threshold(draw(st.sampled_from(own))))
            return {"count": evidence, "window": draw(_window(-730, 0))}
        return {"count": {"encounter": {}}, "window": draw(_window(-730, 0))}
    if kind in ("condition", "days_since_first_evidence"):
        return {kind: draw(st.sampled_from(CONDITIONS))}
    weights = draw(st.sampled_from(["charlson_1987", "quan_2011"]))
    return {"charlson": {"weights": weights, "codes": ["ICD10"]}}


@st.composite
def matching(draw: Any, outcomes: list[str]) -> dict[str, Any]:
    """A ``matching:`` section: controls for the incident cases of one of the outcomes."""
    pool = draw(st.sampled_from([None, "cohort", "source_population"]))
    return ({"controls_from": pool} if pool else {}) | {
        "cases_of": draw(st.sampled_from(outcomes)),
        "controls_per_case": draw(st.integers(1, 5)),
        "birth_year_within": draw(st.integers(0, 10)),
        "same_practice": draw(st.booleans()),
        "reuse_controls": draw(st.booleans()),
        "seed": draw(st.integers(0, 2**31 - 1)),
        "contact_within_days": draw(st.integers(0, 1095)),
    }


@st.composite
def persontime(draw: Any, youngest: int) -> dict[str, Any]:
    """A ``persontime:`` section whose first age band admits the study's youngest patient.

    The first band must start at or below the highest lower bound of the age steps (the load
    check ``age-band-gap``), so every follow-up day falls in a band.
    """
    first = draw(st.integers(0, youngest))
    more = draw(st.lists(st.integers(first + 1, 110), max_size=5, unique=True))
    option: dict[str, Any] = {
        "age_bands": [first, *sorted(more)],
        "calendar_year": draw(st.booleans()),
    }
    if draw(st.booleans()):
        later = draw(st.lists(st.integers(1, 10), max_size=3, unique=True))
        option["since_index_years"] = [0, *sorted(later)]
    return option


@st.composite
def studies(draw: Any) -> dict[str, Any]:
    """A valid study file as a dict (extract and definitions are filled in when written)."""
    kinds = ("latest", "mean", "minimum", "maximum", "count", "condition",
             "days_since_first_evidence", "charlson")  # fmt: skip
    own = draw(st.lists(st.sampled_from(sorted(OWN_MEASURES)), max_size=2, unique=True))
    chosen = draw(st.lists(st.sampled_from(kinds), max_size=4))
    covariates = {f"cov_{i}": _covariate(kind, draw, own) for i, kind in enumerate(chosen)}
    conditions = st.lists(st.sampled_from(CONDITIONS), min_size=1, max_size=3, unique=True)
    outcomes: dict[str, Any] = {"conditions": draw(conditions)}
    if draw(st.booleans()):
        outcomes["horizon_days"] = draw(st.integers(30, 2000))
    else:
        outcomes["horizon_years"] = draw(st.integers(1, 5))
    outcomes["lookback"] = draw(st.one_of(st.just("all"), st.integers(1, 3650)))
    end_at = draw(st.permutations(["death", "end_of_data", "lost_contact", "horizon"]))
    lost_contact = draw(st.integers(90, 730))
    # A valid study never follows anyone from before their index (the build refuses it): the
    # patient is alive at index and, when the index is not an encounter, was seen recently.
    required: list[dict[str, Any]] = [{"alive_at_index": True}]
    index = draw(INDEX)
    if own and draw(st.booleans()):  # index at the first measurement past an own threshold
        evidence = draw(own_threshold(draw(st.sampled_from(own))))
        index = {"first_event": {"evidence": evidence, "between": draw(_years())}}
    if "first_encounter" not in index and "random_encounter" not in index:
        required.append({"in_contact_at_index": {"window": [-lost_contact, 0]}})
    excluded = draw(st.lists(EXCLUSION, max_size=3))
    for measure in own:  # sometimes exclude those with a value past an own threshold
        if draw(st.booleans()):
            evidence = draw(own_threshold(measure))
            excluded.append(
                {"no_evidence": {"evidence": evidence, "window": draw(_window(-1825, 0))}}
            )
    measures = {"measures": [f"measures/{m}.yaml" for m in own]} if own else {}
    options: dict[str, Any] = {}
    if draw(st.booleans()):  # person-time needs an age step at or above its first band
        ages = [step["age"]["between"][0] for step in excluded if "age" in step]
        if not ages:
            ages = [draw(st.integers(0, 70))]
            required.append({"age": {"between": [ages[0], draw(st.integers(ages[0], 110))]}})
        options["persontime"] = draw(persontime(max(ages)))
    exposure = {"exposure": draw(EXPOSURE)} if "exposure_start" in index else {}
    if draw(st.booleans()):
        options["matching"] = draw(matching(outcomes["conditions"]))
        if exposure and draw(st.booleans()):  # sets opened by new users of one group instead
            option = options["matching"]
            del option["cases_of"]
            option.pop("controls_from", None)
            option["exposed_in"] = draw(st.sampled_from(sorted(exposure["exposure"]["groups"])))
    return {
        "study": "property_study",
        "title": "a study drawn by hypothesis",
        "end_of_data": draw(st.dates(dt.date(2018, 1, 1), dt.date(2020, 12, 31))),
        "index": index,
        "eligibility": required + excluded,
        "covariates": covariates,
        "outcomes": outcomes,
        "followup": {
            "end_at": end_at,
            "lost_contact_after_days": lost_contact,
            "incomplete": draw(st.sampled_from(["censor", "exclude"])),
            "contact": draw(st.sampled_from(["encounters", "any_activity"])),
        },
        "output": {"folder": "out", "allow_empty_cohort": True},
        **measures,
        **options,
        **exposure,
    }


def _write(folder: Path, study: dict[str, Any], extract: Path, name: str = "study.yaml") -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    for own in study.get("measures", []):  # the study's own measure files, beside it
        file = folder / own
        file.parent.mkdir(exist_ok=True)
        file.write_text(yaml.safe_dump(OWN_MEASURES[file.stem], sort_keys=False), "utf-8")
    text = {"extract": str(extract), "definitions": str(ROOT / "definitions" / "conditions")}
    path = folder / name
    path.write_text(yaml.safe_dump({**study, **text}, sort_keys=False), encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def extract(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The two hand-made demo extracts side by side: 74 patients with every kind of evidence."""
    folder = tmp_path_factory.mktemp("property_extract")
    fixtures = ROOT / "tests" / "fixtures"
    for table in TABLES:
        first = (fixtures / "handmade" / f"{table}.csv").read_text(encoding="utf-8")
        second = (fixtures / "handmade_measures" / f"{table}.csv").read_text(encoding="utf-8")
        header, _, rows = second.partition("\n")
        assert first.startswith(header + "\n"), table
        if table == "measurements":  # the study's own measures, in both their units
            rows += "".join(f"{p},{d},{m},,{v},{u}\n" for p, d, m, v, u in OWN_ROWS)
        (folder / f"{table}.csv").write_text(first.rstrip("\n") + "\n" + rows, encoding="utf-8")
    return folder


@PROPERTY
@given(study=studies())
def test_compiling_twice_gives_the_same_sql(
    study: dict[str, Any], tmp_path: Path, extract: Path
) -> None:
    path = _write(tmp_path / "same", study, extract)
    first, second = plan_study(path), plan_study(path)
    assert first.describe("duckdb") == second.describe("duckdb")
    design = repr({k: v for k, v in study.items() if k != "measures"})
    for name in study.get("measures", []):  # an own measure in use reaches the plan's SQL
        measure = Path(name).stem
        if f"'{measure}'" in design:
            assert f"'{measure}'" in first.describe("duckdb"), measure
    assert first.content_hash() == second.content_hash()
    # the drawn options reach the plan: their stages are there exactly when the key is
    names = {stage.name for stage in first.stages}
    assert ("persontime" in names) == ("persontime" in study)
    assert ("matching_sets" in names) == ("matching" in study)


@PROPERTY
@given(study=studies())
def test_every_spark_stage_parses_back(
    study: dict[str, Any], tmp_path: Path, extract: Path
) -> None:
    plan = SparkEngine.prepare(plan_study(_write(tmp_path / "spark", study, extract)))
    assert plan.stages
    for stage in plan.stages:
        sql = stage.render("spark")
        parsed = sqlglot.parse_one(sql, read="spark")
        assert parsed is not None, stage.name


@PROPERTY
@given(study=studies())
def test_every_stage_reads_only_relations_made_earlier(
    study: dict[str, Any], tmp_path: Path, extract: Path
) -> None:
    # The fake engine runs the stage loop without a database and refuses a stage whose SQL
    # reads a relation this run has not made yet.
    plan = plan_study(_write(tmp_path / "reads", study, extract))
    engine = FakeEngine()
    engine.run(plan, {})
    assert engine.ledger.stages == [stage.name for stage in plan.stages]


def _cohort(path: Path, extract: Path) -> set[str]:
    plan = plan_study(path)
    run = DuckDBEngine(threads=1).run(plan, discover_extract(extract, plan.sources))
    return set(run.outputs["cohort"]["patient_id"].to_pylist())


@pytest.mark.slow
@settings(PROPERTY, max_examples=15)
@given(study=studies(), step=EXCLUSION, where=st.integers(0, 4))
def test_one_more_exclusion_step_never_grows_the_cohort(
    study: dict[str, Any], step: dict[str, Any], where: int, tmp_path: Path, extract: Path
) -> None:
    folder = tmp_path / "monotone"
    shutil.rmtree(folder, ignore_errors=True)
    steps = list(study["eligibility"])
    steps.insert(min(where, len(steps)), step)
    before = _cohort(_write(folder, study, extract, "before.yaml"), extract)
    after = _cohort(_write(folder, {**study, "eligibility": steps}, extract, "after.yaml"), extract)
    assert after <= before
