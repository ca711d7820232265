"""Warnings for thresholds that, in the measure's canonical unit, no plausible value can meet.

A threshold in a unit the author did not mean still converts: ``at_least: 6.5 mmol/mol`` for
HbA1c is 2.75 %, below every plausible HbA1c, so the evidence matches every value. Loading
accepts it (the unit is valid); ``check`` says where it lies against the measure's plausible
range, which is usually enough to spot the slip.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

from pipeline.config._condition import Condition, Evidence, MeasurementEvidence
from pipeline.config._study import Study
from pipeline.config._yaml import PathKey, load_yaml
from pipeline.errors import Problem
from pipeline.measures import Comparison, MeasureRegistry

_WRITTEN: tuple[tuple[str, Comparison], ...] = (
    ("at_least", "at_least"),
    ("above", "above"),
    ("below", "below"),
    ("at_most", "at_most"),
)


def _limits(m: MeasurementEvidence) -> Iterator[tuple[PathKey, Comparison, str | float]]:
    for key, comparison in _WRITTEN:
        text = getattr(m, key)
        if text is not None:
            yield (key,), comparison, text
    if m.between is not None:
        yield ("between", 0), "at_least", m.between[0]
        yield ("between", 1), "at_most", m.between[1]


def _number(value: float) -> str:
    return f"{value:.6g}"


def measurement_warnings(
    doc_file: Path, at: PathKey, what: str, m: MeasurementEvidence, registry: MeasureRegistry
) -> list[Problem]:
    """One warning per threshold of ``m`` outside its measure's plausible range.

    Args:
        doc_file: The file the evidence is written in.
        at: The path of the ``measurement`` mapping in that file.
        what: How the message names the evidence, e.g. ``evidence 'a1c_high'``.
        m: The measurement evidence.
        registry: The measures it was loaded with.
    """
    measure = registry.get(m.measure)
    if measure is None or measure.is_coded:
        return []
    low, high = measure.plausible
    doc = None
    warnings = []
    for path, comparison, text in _limits(m):
        threshold = measure.threshold(comparison, text)
        value = threshold.canonical_value
        if low <= value <= high:
            continue
        doc = doc or load_yaml(doc_file)
        unit = measure.canonical_unit
        written = threshold.written
        message = (
            f"{what}: {path[0]} {written} is {_number(value)} {unit} for {m.measure}, outside "
            f"its plausible range {_number(low)} to {_number(high)} {unit}"
        )
        number = written.split(" ", 1)[0]
        if written != f"{number} {unit}" and low <= float(number) <= high:
            message += f"; was {number} {unit} meant?"
        warnings.append(doc.problem((*at, *path), "implausible-threshold", message, at_value=True))
    return warnings


def _evidence_warnings(
    file: Path, at: PathKey, what: str, ev: Evidence | None, registry: MeasureRegistry
) -> list[Problem]:
    if ev is None or ev.measurement is None:
        return []
    return measurement_warnings(file, (*at, "measurement"), what, ev.measurement, registry)


def condition_warnings(
    file: Path, condition: Condition, registry: MeasureRegistry
) -> list[Problem]:
    """Implausible thresholds in a definition file."""
    return [
        warning
        for name, ev in condition.evidence.items()
        for warning in _evidence_warnings(
            file, ("evidence", name), f"evidence '{name}'", ev, registry
        )
    ]


def study_warnings(file: Path, study: Study, registry: MeasureRegistry) -> list[Problem]:
    """Implausible thresholds in the evidence a study defines itself."""
    found = []
    for name, cov in study.covariates.items():
        found += _evidence_warnings(
            file, ("covariates", name, "count"), f"covariate '{name}'", cov.count, registry
        )
    for i, step in enumerate(study.eligibility):
        if step.no_evidence is not None:
            found += _evidence_warnings(
                file,
                ("eligibility", i, "no_evidence", "evidence"),
                f"eligibility step {i + 1}",
                step.no_evidence.evidence,
                registry,
            )
    event = study.index.first_event
    if event is not None:
        found += _evidence_warnings(
            file, ("index", "first_event", "evidence"), "the index event", event.evidence, registry
        )
    return found
