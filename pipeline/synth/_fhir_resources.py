"""The FHIR resource written for each canonical row (see :mod:`pipeline.synth._fhir_export`).

Each writer turns one row of a canonical table, as :mod:`pipeline.synth._fhir_export` selects
it, into one resource shaped so that :mod:`pipeline.extract.readers.fhir` reads back the same
row. Kept apart from the export's reading and writing so that each module stays small.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Callable
from typing import Any

from pipeline.compile import READING_PATTERN
from pipeline.extract.readers.fhir import ATC_SYSTEM, LOINC_MEASURES, LOINC_SYSTEM, UCUM_SYSTEM

Resource = dict[str, Any]
Row = dict[str, Any]

ICD10_SYSTEM = "http://hl7.org/fhir/sid/icd-10"
ICD9_SYSTEM = "http://hl7.org/fhir/sid/icd-9-cm"
CATEGORY_SYSTEM = "http://terminology.hl7.org/CodeSystem/condition-category"
# Local code systems for what FHIR has no standard code for (URNs: nothing to resolve).
ENCOUNTER_TYPE_SYSTEM = "urn:ascertain:encounter-type"
DIAGNOSIS_SOURCE_SYSTEM = "urn:ascertain:diagnosis-source"
MEASURE_SYSTEM = "urn:ascertain:measure"
_ABSENT = {
    "extension": [
        {
            "url": "http://hl7.org/fhir/StructureDefinition/data-absent-reason",
            "valueCode": "unknown",
        }
    ]
}

# The LOINC code each measure is written with: the first the reader maps to it (reversed, so
# the first wins), except eGFR, written as CKD-EPI, the equation labs report.
MEASURE_LOINC: dict[str, str] = {
    **{measure: code for code, measure in reversed(LOINC_MEASURES.items())},
    "egfr": "62238-1",
}
_CREATININE_MOLAR = ("14682-9", ("umol/l", "µmol/l", "mmol/l"))

# Printed units that are also their UCUM code (so system + code can be given with no change).
UCUM_AS_PRINTED = frozenset(
    {"%", "cm", "m", "kg", "g", "kg/m2", "mg/dL", "mg/L", "g/dL", "g/L", "mmol/L", "umol/L",
     "mmol/mol", "mL/min"}
)  # fmt: skip

# Text the reader gives back unchanged from a quantity with a comparator: ``<`` + JSON number.
_COMPARATOR_TEXT = re.compile(r"^(<=|>=|<|>)(.+)$")
_PLAIN_NUMBER = re.compile(r"^-?(?:0|[1-9][0-9]*)(?:\.[0-9]+)?$")
# How the pipeline reads a value_text: qualifier, number, unit (group 4).
_READING = re.compile(READING_PATTERN)


def _subject(patient_id: str | None) -> Resource:
    return {"reference": f"Patient/{patient_id}"} if patient_id is not None else dict(_ABSENT)


def _patient(row: Row, _: int) -> Resource:
    resource: Resource = {"resourceType": "Patient"}
    if row["patient_id"] is not None:
        resource["id"] = row["patient_id"]
    sex = row["sex"]
    if sex is not None:
        resource["gender"] = {"F": "female", "M": "male", "U": "unknown"}.get(sex, "other")
    year = row["birth_year"]
    if row["birth_readable"] or (row["birth_date"] is not None and year is None):
        resource["birthDate"] = row["birth_date"]
    elif year is not None:
        resource["birthDate"] = f"{year:04d}" if 0 <= year <= 9999 else str(year)
    if row["death_date"] is not None:
        resource["deceasedDateTime"] = row["death_date"]
    if row["practice_id"] is not None:
        resource["managingOrganization"] = {"reference": f"Organization/{row['practice_id']}"}
    return resource


def _encounter(row: Row, number: int) -> Resource:
    kind = row["encounter_type"]
    resource: Resource = {
        "resourceType": "Encounter",
        "id": f"enc-{number}",
        "status": "unknown",
        "class": {"system": ENCOUNTER_TYPE_SYSTEM, "code": kind} if kind else dict(_ABSENT),
        "subject": _subject(row["patient_id"]),
    }
    if row["encounter_date"] is not None:
        resource["period"] = {"start": row["encounter_date"]}
    return resource


def _condition(row: Row, number: int) -> Resource:
    resource: Resource = {"resourceType": "Condition", "id": f"cond-{number}"}
    key = row["source_key"]
    if key is not None:
        codings = [{"system": DIAGNOSIS_SOURCE_SYSTEM, "code": row["source"]}]
        if key in ("problem_list", "visit", "billing"):
            hl7 = "problem-list-item" if key == "problem_list" else "encounter-diagnosis"
            codings.insert(0, {"system": CATEGORY_SYSTEM, "code": hl7})
        resource["category"] = [{"coding": codings}]
    system = {"ICD10": ICD10_SYSTEM, "ICD9": ICD9_SYSTEM}.get(
        row["system_label"], row["code_system"]
    )
    coding = {"system": system, "code": row["code"]}
    coding = {k: v for k, v in coding.items() if v is not None}
    if coding:
        resource["code"] = {"coding": [coding]}
    resource["subject"] = _subject(row["patient_id"])
    if row["event_date"] is not None:
        resource["onsetDateTime"] = row["event_date"]
    return resource


def _medication_request(row: Row, number: int) -> Resource:
    medication: Resource = {}
    if row["atc"] is not None:
        medication["coding"] = [{"system": ATC_SYSTEM, "code": row["atc"]}]
    if row["drug_text"] is not None:
        medication["text"] = row["drug_text"]
    resource: Resource = {
        "resourceType": "MedicationRequest",
        "id": f"rx-{number}",
        "status": "unknown",
        "intent": "order",
        "medicationCodeableConcept": medication or dict(_ABSENT),
        "subject": _subject(row["patient_id"]),
    }
    if row["start_date"] is not None:
        resource["authoredOn"] = row["start_date"]
    if row["stop_date"] is not None:
        resource["dosageInstruction"] = [
            {"timing": {"repeat": {"boundsPeriod": {"end": row["stop_date"]}}}}
        ]
    return resource


def _observation_code(measure: str | None, key: str | None, unit: str | None) -> Resource:
    if key is None or measure is None:
        return dict(_ABSENT)
    if key == "creatinine" and unit is not None and unit.lower() in _CREATININE_MOLAR[1]:
        loinc: str | None = _CREATININE_MOLAR[0]
    elif key.startswith("loinc:") and key[6:]:
        loinc = measure.strip()[6:]
    else:
        loinc = MEASURE_LOINC.get(key)
    if loinc is None:
        return {"coding": [{"system": MEASURE_SYSTEM, "code": measure}], "text": measure}
    return {"coding": [{"system": LOINC_SYSTEM, "code": loinc}], "text": measure}


def _quantity(value: float | str | None, unit: str | None) -> Resource:
    quantity: Resource = {} if value is None else {"value": value}
    if unit is not None:
        quantity["unit"] = unit
        if unit in UCUM_AS_PRINTED:
            quantity.update(system=UCUM_SYSTEM, code=unit)
    return quantity


def _literal(text: str) -> int | float | None:
    """The JSON number written exactly as ``text`` (which the reader gives back), if any."""
    if not _PLAIN_NUMBER.match(text) or len(text) > 15:
        return None
    number = float(text) if "." in text else int(text)
    return number if json.dumps(number) == text else None


def _observation_value(row: Row) -> Resource:
    """The value[x] (and note) of one measurement row."""
    unit, text = row["unit"], row["value_text"]
    if row["value"] is not None:
        number = row["value_number"]
        value: float | str = row["value"]
        if number is not None and math.isfinite(number):
            literal = _literal(row["value"])
            value = number if literal is None else literal
        fields: Resource = {"valueQuantity": _quantity(value, unit)}
        if text is not None:
            fields["note"] = [{"text": text}]
        return fields
    if text is None:
        return {"valueQuantity": _quantity(None, unit)} if unit is not None else {}
    comparator = _COMPARATOR_TEXT.match(text)
    bound = _literal(comparator[2]) if comparator else None
    if comparator and bound is not None:
        return {"valueQuantity": {"comparator": comparator[1], **_quantity(bound, unit)}}
    reading = _READING.match(text.strip())
    if unit is not None and reading and not reading[4].strip():
        return {"valueString": f"{text.strip()} {unit}"}
    return {"valueString": text}


def _observation(row: Row, number: int) -> Resource:
    return {
        "resourceType": "Observation",
        "id": f"obs-{number}",
        "status": "final",
        "code": _observation_code(row["measure"], row["measure_key"], row["unit"]),
        "subject": _subject(row["patient_id"]),
        **({"effectiveDateTime": row["obs_date"]} if row["obs_date"] is not None else {}),
        **_observation_value(row),
    }


# Canonical table -> (resource type, the resource written for each row).
WRITERS: dict[str, tuple[str, Callable[[Row, int], Resource]]] = {
    "patients": ("Patient", _patient),
    "encounters": ("Encounter", _encounter),
    "diagnoses": ("Condition", _condition),
    "prescriptions": ("MedicationRequest", _medication_request),
    "measurements": ("Observation", _observation),
}
