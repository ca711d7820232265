"""``ascertain explain``: why one patient is in or out, and which evidence made each case.

The trace runs the study's own plan on the engine with every source table restricted to the one
patient, and reads the intermediate stages; nothing is re-implemented in Python, so the trace
cannot drift from the build.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from typing import Any

from pipeline.compile import Plan
from pipeline.compile import names as plan_names
from pipeline.compile._context import evidence_key, evidence_number
from pipeline.config import Condition, Study
from pipeline.extract import open_extract
from pipeline.measures import DERIVED_FROM
from pipeline.outputs._write import DECIMALS
from pipeline.workflows.prepare import BuildOptions, prepare

Trace = dict[str, Any]


def _iso(value: Any) -> Any:
    """Dates as ISO text, floats rounded as the outputs round them (6 decimals)."""
    if isinstance(value, dt.date):
        return value.isoformat()
    return round(value, DECIMALS) if isinstance(value, float) else value


def _tie(entry: dict[str, Any]) -> tuple[tuple[str, str], ...]:
    """Every field as text: the last sort key, so rows equal on the others keep one order.

    The engine returns rows in no set order when it runs on several threads, so every list of
    the trace is sorted on its whole content.
    """
    return tuple((k, "" if v is None else str(v)) for k, v in sorted(entry.items()))


def _rows(result: dict[str, Any], name: str) -> list[dict[str, Any]]:
    table = result.get(name)
    if table is None:
        return []
    return [{k: _iso(v) for k, v in row.items()} for row in table.to_pylist()]


def _trace_stages(plan: Plan) -> tuple[str, ...]:
    wanted = [
        plan_names.ROWS_READ,
        plan_names.PATIENT_BASE,
        plan_names.ENCOUNTER_SUMMARY,
        plan_names.INDEX_DATES,
        plan_names.ELIGIBILITY,
        plan_names.ATTRITION,
        plan_names.COHORT,
        plan_names.EVIDENCE_EVENTS,
        plan_names.CODED_ROW_EVIDENCE,
        plan_names.MEASUREMENT_ROWS,
        plan_names.DERIVED_EGFR,
        plan_names.DERIVED_BMI,
    ]
    present = {s.name for s in plan.stages}
    rules = [s.name for s in plan.stages if s.name.startswith(plan_names.RULES_PREFIX)]
    return tuple(n for n in wanted if n in present) + tuple(rules)


def _measurements(measures: set[str], outputs: dict[str, Any]) -> list[dict[str, Any]]:
    rows = [
        {
            "date": r["obs_date"],
            "measure": r["measure"],
            "raw": " ".join(
                str(v) for v in (r["raw_value"], r["raw_value_text"], r["raw_unit"]) if v
            ),
            "value": r["value"],
            "status": r["problem"] or "used",
        }
        for r in _rows(outputs, plan_names.MEASUREMENT_ROWS)
        if r["measure"] in measures
    ]
    for derived in (plan_names.DERIVED_EGFR, plan_names.DERIVED_BMI):
        rows += [
            {
                "date": r["obs_date"],
                "measure": r["measure"],
                "raw": "derived",
                "value": r["value"],
                "status": "used",
            }
            for r in _rows(outputs, derived)
            if r["measure"] in measures
        ]
    return sorted(rows, key=lambda r: (r["date"] or "", r["measure"], r["raw"], _tie(r)))


def _outcome(
    condition: Condition, outputs: dict[str, Any], cohort: dict[str, Any] | None
) -> dict[str, Any]:
    name = condition.condition
    # The plan's tables hold evidence numbers; this condition's own give back their names.
    names = {evidence_number(evidence_key(name, e)): e for e in condition.evidence}
    coded = [
        {
            "date": r["event_date"],
            "kind": "prescription" if r["code_system"] == "ATC" else "diagnosis",
            "system": r["code_system"],
            "raw_code": r["raw_code"],
            "normalised": r["code"],
            "evidence": names[r["evidence"]],
            "counts": not r["excluded"],
        }
        for r in _rows(outputs, plan_names.CODED_ROW_EVIDENCE)
        if r["evidence"] in names
    ]
    measured = [
        {
            "date": r["event_date"],
            "kind": "evidence day",
            "evidence": names[r["evidence"]],
            "rows": r["n_rows"],
        }
        for r in _rows(outputs, plan_names.EVIDENCE_EVENTS)
        if r["evidence"] in names
        and not any(
            c["date"] == r["event_date"] and c["evidence"] == names[r["evidence"]] for c in coded
        )
    ]
    rules = [
        {"rule": r["rule"], "met_on": r["onset_date"]}
        for r in _rows(outputs, plan_names.rules_stage(name))
    ]
    measures = {e.measurement.measure for e in condition.evidence.values() if e.measurement}
    for measure in list(measures):
        measures.update(DERIVED_FROM.get(measure, ()))
    entry: dict[str, Any] = {
        "evidence": sorted(
            coded + measured, key=lambda e: (e["date"] or "", e["evidence"], _tie(e))
        ),
        "measurements": _measurements(measures, outputs),
        "rules_met": sorted(rules, key=lambda r: (r["met_on"], r["rule"], _tie(r))),
    }
    if cohort is not None:
        columns = plan_names.outcome_columns(name)
        entry |= {
            "onset": _iso(cohort[columns.onset]),
            "prevalent": cohort[columns.prevalent],
            "incident": cohort[columns.incident],
            "days_to": cohort[columns.days_to],
        }
    return entry


def explain_patient(
    study_file: Path, patient_id: str, *, extract: Path | str | None = None
) -> Trace:
    """Trace one patient through a study.

    Runs on DuckDB with the study's ``engine:`` settings (threads, memory limit), as a build.

    Raises:
        AscertainError: Bad config or extract (as for a build).
    """
    ready = prepare(study_file, BuildOptions(extract=extract))
    loaded, plan = ready.loaded, ready.plan
    with open_extract(ready.extract, plan.sources) as x:
        run = ready.engine.run(
            plan.with_outputs(_trace_stages(plan)), x.tables, patients=(patient_id,)
        )
    outputs = run.outputs
    patient = _rows(outputs, plan_names.PATIENT_BASE)
    eligibility = _rows(outputs, plan_names.ELIGIBILITY)
    cohort_rows = _rows(outputs, plan_names.COHORT)
    cohort = cohort_rows[0] if cohort_rows else None
    rows = {r["source_table"]: r["n_rows"] for r in _rows(outputs, plan_names.ROWS_READ)}
    encounters = _rows(outputs, plan_names.ENCOUNTER_SUMMARY)[:1] or None
    trace: Trace = {
        "trace_version": TRACE_VERSION,
        "study": loaded.study.study,
        "patient_id": patient_id,
        "in_extract": any(rows.values()),
        "rows_in_extract": rows,
        "in_patients_table": bool(patient),
        "patient": patient[0] if patient else None,
        "encounters": encounters,
        "index_date": eligibility[0]["index_date"] if eligibility else None,
        "in_source_population": bool(eligibility),
        "not_in_source_population": None
        if eligibility
        else _why_no_index(loaded.study, rows, in_patients=bool(patient), encounters=encounters),
        "eligibility": _steps(outputs),
        "values": {k: _iso(eligibility[0][k]) for k in _SHOWN if k in eligibility[0]}
        if eligibility
        else {},
        "in_cohort": cohort is not None,
        "outcomes": {
            c: _outcome(loaded.catalog.get(c), outputs, cohort)
            for c in loaded.study.outcomes.conditions
        },
        "followup": None
        if cohort is None
        else {
            "end": cohort["followup_end"],
            "days": cohort["followup_days"],
            "reason": cohort["end_reason"],
        },
    }
    trace["covariates"] = {}
    if cohort is not None:
        columns = list(cohort)
        prevalent = plan_names.PREVALENT_PREFIX
        first_outcome = next(i for i, n in enumerate(columns) if n.startswith(prevalent))
        covariates = columns[columns.index("sex") + 1 : first_outcome]
        trace["covariates"] = {n: cohort[n] for n in covariates}
    return trace


TRACE_VERSION = 2
_SHOWN = ("sex", "death_date", "age_at_index", "first_encounter", "practice_id")


def _why_no_index(
    study: Study,
    rows: dict[str, int],
    *,
    in_patients: bool,
    encounters: list[dict[str, Any]] | None,
) -> str:
    """Why a patient has no index date, in one sentence (the strategy's own terms)."""
    if not any(rows.values()):
        return "no row of the extract names this patient"
    if not in_patients:
        tables = ", ".join(f"{t}: {n}" for t, n in sorted(rows.items()) if n)
        return (
            f"not in the patients table: its rows ({tables}) are orphans, set aside in the "
            "quality log"
        )
    index = study.index
    start, end = index.possible
    if index.fixed_date is not None:
        return f"no usable encounter on or before the fixed index date {index.fixed_date}"
    if index.first_event is not None:
        what = "onset of " + index.first_event.condition if index.first_event.condition else ""
        return f"no {what or 'qualifying event'} from {start} to {end} (the index window)"
    if study.exposure is not None:
        groups = ", ".join(study.exposure.groups)
        return f"no record of an exposure group ({groups}) from {start} to {end} (the index window)"
    window = index.first_encounter or index.random_encounter
    types = getattr(window, "type", ())
    kind = f"encounter of type {' or '.join(types)}" if types else "usable encounter"
    seen = (
        f"; its usable encounters run from {encounters[0]['first_encounter']} to "
        f"{encounters[0]['last_encounter']}"
        if encounters and encounters[0].get("first_encounter")
        else "; it has no usable encounter"
    )
    return f"no {kind} from {start} to {end} (the index window), before death{seen}"


def _steps(outputs: dict[str, Any]) -> list[dict[str, Any]]:
    eligibility = _rows(outputs, plan_names.ELIGIBILITY)
    if not eligibility:
        return []
    row = eligibility[0]
    attrition = sorted(
        (r for r in _rows(outputs, plan_names.ATTRITION) if r["step_number"] > 0),
        key=lambda r: r["step_number"],
    )
    return [
        {
            "step": step["step"],
            "description": step["description"],
            "passed": bool(row[plan_names.step_column(i)]),
        }
        for i, step in enumerate(attrition, start=1)
    ]


def _render_outcome(name: str, outcome: dict[str, Any]) -> list[str]:
    lines = [f"  outcome {name}:"]
    for event in outcome["evidence"]:
        if event["kind"] == "evidence day":
            detail = f"{event['rows']} row(s)"
        else:
            detail = (
                f"{event['kind']} {event['system']} '{event['raw_code']}' -> "
                f"{event['normalised']}" + ("" if event["counts"] else " (excluded)")
            )
        lines.append(f"    {event['date']}  {event['evidence']:<18} {detail}")
    for m in outcome["measurements"]:
        value = "-" if m["value"] is None else f"{m['value']:.4g}"
        lines.append(f"    {m['date']}  {m['measure']:<18} {m['raw']} -> {value} ({m['status']})")
    lines += [f"    rule '{r['rule']}' met on {r['met_on']}" for r in outcome["rules_met"]]
    if "onset" in outcome:
        if outcome["prevalent"]:
            status = "prevalent at index"
        else:
            status = "incident" if outcome["incident"] else "not incident"
        lines.append(f"    onset {outcome['onset'] or '-'}: {status}")
    return lines


def _render_steps(trace: Trace) -> list[str]:
    steps = trace["eligibility"]
    values = trace["values"]
    lines = [f"  values: {', '.join(f'{k}={v}' for k, v in values.items())}"]
    for number, step in enumerate(steps, start=1):
        mark = "pass" if step["passed"] else "FAIL"
        lines.append(f"  step {number} {step['step']}: {mark} ({step['description']})")
        if not step["passed"]:
            lines.append("  excluded at this step")
            break
    return lines


def render_trace(trace: Trace) -> str:
    """The trace as plain text for a terminal."""
    lines = [f"Patient {trace['patient_id']} in study {trace['study']}"]
    if not trace["in_patients_table"]:
        return "\n".join(
            [*lines, f"  not in the source population: {trace['not_in_source_population']}"]
        )
    patient = trace["patient"]
    lines.append(
        f"  born {patient['birth_date']}, sex {patient['sex']}, died {patient['death_date'] or '-'}"
    )
    if not trace["in_source_population"]:
        reason = trace["not_in_source_population"]
        return "\n".join([*lines, f"  no index date, not in the source population: {reason}"])
    lines.append(f"  index date {trace['index_date']}")
    lines += _render_steps(trace)
    lines.append(f"  in the cohort: {'yes' if trace['in_cohort'] else 'no'}")
    for name, outcome in trace["outcomes"].items():
        lines += _render_outcome(name, outcome)
    if trace["followup"]:
        fu = trace["followup"]
        lines.append(f"  follow-up ends {fu['end']} ({fu['reason']}), {fu['days']} days")
    lines += [f"  {name} = {value}" for name, value in trace.get("covariates", {}).items()]
    return "\n".join(lines)
