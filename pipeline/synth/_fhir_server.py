"""Make the synthetic FHIR export look like a real server's bulk export, deterministically.

:func:`pipeline.synth._fhir_export.write_fhir_export` given a seed passes each table's rows
through :class:`ServerLook`. It varies how a row is written the way servers do, without
changing the canonical row the FHIR reader gives back (so a study built on the export gets the
cohort of the Parquet build), and adds a few resources the reader must set aside. Each choice
is drawn from a hash of the seed and the row's content, not from a stream: the same input gives
the same bytes, and exact duplicate rows are written alike, so they stay exact duplicates.

Varied forms (a share of the rows that allow each; :attr:`ServerLook.forms` counts them):

- Encounters are ``finished``. Conditions carry ``clinicalStatus`` (mostly active) and
  ``verificationStatus`` (mostly confirmed; some provisional, unconfirmed or differential,
  which the reader uses); some ICD-10 codes are given by the ICD-10-CM OID and some ICD-9
  codes by the ICD-9-CM OID (the reader reads both as the edition it already was).
- MedicationRequests are ``active``, or ``completed`` when they have a stop date. A request
  with an ATC code and a drug text may name its drug by ``medicationReference``: to a contained
  Medication (``#med1``) or to one of ``Medication.ndjson`` (one per distinct code and text).
- Weights in ``kg``, heights in ``cm`` and creatinine in ``mg/dL`` may be written in
  ``[lb_av]``, ``[in_i]`` and ``mmol/L`` (UCUM codes; printed ``lb``, ``in``): only when a value
  exists that the registry's conversion (:mod:`pipeline.measures`) turns back into exactly the
  same canonical double, else the row keeps its unit. Only values whose text is the shortest
  form of their double are converted, so two rows never become one.
- Smoking status written ``current``, ``former`` or ``never`` is a SNOMED CT concept. A whole
  number without a unit (written as one) is a ``valueInteger``: a valueInteger has no unit,
  so a value with a unit keeps its quantity.
- Some observations are dated by ``issued`` alone, with no ``effective[x]``. A systolic and a
  diastolic pressure of the same patient, day and plain numeric form may be written together:
  as a blood pressure panel whose two components carry the values, or as the systolic
  observation with its own value and the diastolic as its component.

Extra resources, copies of a row that names a patient with a status that makes the reader set
them aside (:attr:`ServerLook.set_aside` counts them per table and reason): refuted and
entered-in-error Conditions; cancelled and entered-in-error MedicationRequests; not-taken and
entered-in-error MedicationStatements; cancelled and entered-in-error Observations (a whole
number is written there as a valueInteger: set aside anyway, so its unit is not needed).
"""

from __future__ import annotations

import hashlib
import json
import math
import re
from collections import Counter
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from itertools import groupby

from pipeline.config import shipped_measures
from pipeline.extract.readers.fhir import (
    LOINC_SYSTEM,
    SNOMED_SYSTEM,
    STATUS_SET_ASIDE,
    UCUM_SYSTEM,
)
from pipeline.measures._registry import UnitConversion
from pipeline.synth._fhir_resources import ICD9_SYSTEM, ICD10_SYSTEM, WRITERS, Resource, Row

# HL7 OIDs the reader knows (its ICD_SYSTEMS): ICD-10-CM and ICD-9-CM diagnoses.
ICD10_CM_OID = "urn:oid:2.16.840.1.113883.6.90"
ICD9_CM_OID = "urn:oid:2.16.840.1.113883.6.103"
CLINICAL_SYSTEM = "http://terminology.hl7.org/CodeSystem/condition-clinical"
VERIFICATION_SYSTEM = "http://terminology.hl7.org/CodeSystem/condition-ver-status"
# LOINC's blood pressure panel (from memory; not a measure the reader maps, so the panel itself
# gives no row, only its components do).
BP_PANEL = ("85354-9", "Blood pressure panel with all children optional")
# A SNOMED CT concept per smoking category (each in the reader's SNOMED_SMOKING, from memory).
SMOKING_CONCEPTS = {
    "current": ("77176002", "Smoker"),
    "former": ("8517006", "Ex-smoker"),
    "never": ("266919005", "Never smoked tobacco"),
}
# measure -> (unit converted from, UCUM code written, unit printed).
UNIT_FORMS = {
    "weight": ("kg", "[lb_av]", "lb"),
    "height": ("cm", "[in_i]", "in"),
    "creatinine": ("mg/dL", "mmol/L", "mmol/L"),
}
# Shares of the rows that allow each form (drawn per row), chosen to look plausible.
VERIFICATION = (
    ("confirmed", 0.9),
    ("provisional", 0.05),
    ("unconfirmed", 0.03),
    ("differential", 0.02),
)
CLINICAL = (("active", 0.8), ("resolved", 0.12), ("inactive", 0.05), ("remission", 0.03))
SHARE_OID = 0.2
SHARE_REFERENCE = 0.3  # half contained, half Medication.ndjson
SHARE_UNIT = 0.25
SHARE_SMOKING_CODED = 0.9
SHARE_ISSUED_ONLY = 0.1
SHARE_PANEL = 0.3
SHARE_PARENT_VALUE = 0.2
SHARE_EXTRA = 0.006
# Per table: the extra resources written (resource type, status), one drawn per extra.
EXTRAS: dict[str, tuple[tuple[str, str], ...]] = {
    "diagnoses": (("Condition", "refuted"), ("Condition", "entered-in-error")),
    "prescriptions": (
        ("MedicationRequest", "cancelled"),
        ("MedicationRequest", "entered-in-error"),
        ("MedicationStatement", "not-taken"),
        ("MedicationStatement", "entered-in-error"),
    ),
    "measurements": (("Observation", "cancelled"), ("Observation", "entered-in-error")),
}
_ISO_DAY = re.compile(r"^[0-9]{4}-[0-9]{2}-[0-9]{2}$")
_INTEGER = re.compile(r"^-?(?:0|[1-9][0-9]{0,8})$")  # fits FHIR's 32-bit integer

Typed = tuple[str, Resource]


def exact_value(canonical: float, target: UnitConversion) -> float | None:
    """A value in ``target``'s unit that converts back to exactly ``canonical``, or None.

    The engine converts with ``factor * value / divisor + offset`` in doubles (IEEE 754, as
    Python does); the shortest rounding of the inverse that gives the same double is chosen,
    else the inverse or one of its neighbours.
    """
    guess = (canonical - target.offset) * target.divisor / target.factor
    if not math.isfinite(guess):
        return None
    candidates = [round(guess, digits) for digits in range(16)]
    candidates += [guess, math.nextafter(guess, math.inf), math.nextafter(guess, -math.inf)]
    return next((c for c in candidates if target.to_canonical(c) == canonical), None)


def _pick(u: float, shares: tuple[tuple[str, float], ...]) -> str:
    for value, share in shares:
        if u < share:
            return value
        u -= share
    return shares[-1][0]


def _ordered(resource: Resource, after: str, **fields: object) -> Resource:
    """The resource with ``fields`` placed right after the key ``after`` (as servers order)."""
    out: Resource = {}
    for key, value in resource.items():
        out[key] = value
        if key == after:
            out.update(fields)
    return out


def _renamed(resource: Resource, old: str, new: str, value: object) -> Resource:
    return {(new if k == old else k): (value if k == old else v) for k, v in resource.items()}


def _coded(system: str, code: str) -> Resource:
    return {"coding": [{"system": system, "code": code}]}


def _concept(system: str, code: str, display: str) -> Resource:
    return {"coding": [{"system": system, "code": code, "display": display}], "text": display}


def _pairable(row: Row, measure: str) -> bool:
    number = row["value_number"]
    return (
        row["measure"] == measure
        and row["patient_id"] is not None
        and row["value_text"] is None
        and number is not None
        and math.isfinite(number)
        and _ISO_DAY.match(row["obs_date"] or "") is not None
    )


def _component(observation: Resource) -> Resource:
    values = {k: v for k, v in observation.items() if k.startswith("value")}
    return {"code": observation["code"], **values}


@dataclass
class ServerLook:
    """The varied forms and extra resources of one export (see the module docstring).

    Attributes:
        seed: Seed of the per-row draws.
        set_aside: Extra resources written, per (canonical table, the reader's reason).
        forms: Rows written in each varied form, by a short description.
        medications: The Medication resources referenced, per (ATC code, drug text).
    """

    seed: int
    set_aside: Counter[tuple[str, str]] = field(default_factory=Counter)
    forms: Counter[str] = field(default_factory=Counter)
    medications: dict[tuple[str, str], Resource] = field(default_factory=dict)
    _numbers: Counter[str] = field(default_factory=Counter)

    def _next(self, resource_type: str) -> int:
        self._numbers[resource_type] += 1
        return self._numbers[resource_type]

    def _draws(self, table: str, row: Row) -> tuple[float, ...]:
        """Eight uniform draws in [0, 1) from the seed and the row's content."""
        text = json.dumps([self.seed, table, *row.values()], ensure_ascii=False, default=str)
        digest = hashlib.blake2b(text.encode("utf-8"), digest_size=64).digest()
        return tuple(int.from_bytes(digest[i : i + 8], "little") / 2.0**64 for i in range(0, 64, 8))

    def resources(self, table: str, rows: Iterable[Row]) -> Iterator[Typed]:
        """The resources (with their type) written for one canonical table's sorted rows."""
        if table == "measurements":
            yield from self._observations(rows)
            return
        resource_type, write = WRITERS[table]
        for row in rows:
            draws = self._draws(table, row)
            resource = write(row, self._next(resource_type))
            if table == "encounters":
                resource["status"] = "finished"
            elif table == "diagnoses":
                resource = self._condition(resource, row, draws)
            elif table == "prescriptions":
                resource = self._request(resource, row, draws)
            yield resource_type, resource
            yield from self._extras(table, row, draws)

    def _condition(self, resource: Resource, row: Row, draws: tuple[float, ...]) -> Resource:
        clinical = _pick(draws[1], CLINICAL)
        verification = _pick(draws[2], VERIFICATION)
        self.forms[f"Condition {verification}"] += 1
        coding = resource.get("code", {}).get("coding", [{}])[0]
        oid = {ICD10_SYSTEM: ICD10_CM_OID, ICD9_SYSTEM: ICD9_CM_OID}.get(coding.get("system"))
        if oid is not None and draws[0] < SHARE_OID:
            coding["system"] = oid
            self.forms[f"Condition coded by {oid}"] += 1
        return _ordered(
            resource,
            "id",
            clinicalStatus=_coded(CLINICAL_SYSTEM, clinical),
            verificationStatus=_coded(VERIFICATION_SYSTEM, verification),
        )

    def _request(self, resource: Resource, row: Row, draws: tuple[float, ...]) -> Resource:
        resource["status"] = "completed" if row["stop_date"] is not None else "active"
        key = (row["atc"], row["drug_text"])
        if key[0] is None or key[1] is None or draws[0] >= SHARE_REFERENCE:
            return resource
        concept = resource["medicationCodeableConcept"]
        if draws[0] < SHARE_REFERENCE / 2:
            self.forms["MedicationRequest with a contained Medication"] += 1
            contained = [{"resourceType": "Medication", "id": "med1", "code": concept}]
            resource = _ordered(resource, "id", contained=contained)
            return _renamed(
                resource, "medicationCodeableConcept", "medicationReference", {"reference": "#med1"}
            )
        self.forms["MedicationRequest with a Medication reference"] += 1
        if key not in self.medications:
            number = len(self.medications) + 1
            self.medications[key] = {
                "resourceType": "Medication",
                "id": f"med-{number}",
                "code": concept,
            }
        reference = {"reference": f"Medication/{self.medications[key]['id']}"}
        return _renamed(resource, "medicationCodeableConcept", "medicationReference", reference)

    def _extras(self, table: str, row: Row, draws: tuple[float, ...]) -> Iterator[Typed]:
        """A resource the reader sets aside, copied from the row, for a few rows."""
        if table not in EXTRAS or row["patient_id"] is None or draws[3] >= SHARE_EXTRA:
            return
        choices = EXTRAS[table]
        resource_type, status = choices[int(draws[4] * len(choices))]
        kind, write = WRITERS[table]
        resource = write(row, self._next(kind))
        if resource_type == "Condition":
            # An entered-in-error Condition has no clinicalStatus (FHIR R4 invariant con-5).
            fields: Resource = {}
            if status == "refuted":
                fields["clinicalStatus"] = _coded(CLINICAL_SYSTEM, "inactive")
            fields["verificationStatus"] = _coded(VERIFICATION_SYSTEM, status)
            resource = _ordered(resource, "id", **fields)
        elif resource_type == "MedicationStatement":
            resource = self._statement(resource, status)
        else:
            resource["status"] = status
        if resource_type == "Observation":
            resource = self._integer(resource, row, set_aside=True)
        self.set_aside[table, STATUS_SET_ASIDE[resource_type][status]] += 1
        yield resource_type, resource

    def _statement(self, request: Resource, status: str) -> Resource:
        """A MedicationStatement saying what ``request`` says, with ``status``."""
        start = request.get("authoredOn")
        end = request.get("dosageInstruction", [{}])[0].get("timing", {})
        end = end.get("repeat", {}).get("boundsPeriod", {}).get("end")
        statement: Resource = {
            "resourceType": "MedicationStatement",
            "id": f"ms-{self._next('MedicationStatement')}",
            "status": status,
            "medicationCodeableConcept": request["medicationCodeableConcept"],
            "subject": request["subject"],
        }
        if end is not None:
            statement["effectivePeriod"] = {"start": start} if start else {}
            statement["effectivePeriod"]["end"] = end
        elif start is not None:
            statement["effectiveDateTime"] = start
        return statement

    def _observations(self, rows: Iterable[Row]) -> Iterator[Typed]:
        """Observations, a patient and day at a time (so the two pressures can be paired)."""
        for _, grouped in groupby(rows, key=lambda r: (r["patient_id"], r["obs_date"])):
            group = list(grouped)
            partners = self._pairs(group)
            done: set[int] = set()
            for i, row in enumerate(group):
                if i in done:
                    continue
                draws = self._draws("measurements", row)
                if i in partners:
                    j, form = partners[i]
                    done.add(j)
                    resource = self._panel(row, group[j], form)
                else:
                    resource = self._observation(row, draws)
                if draws[5] < SHARE_ISSUED_ONLY and "effectiveDateTime" in resource:
                    day = resource["effectiveDateTime"]
                    if _ISO_DAY.match(day):
                        self.forms["Observation dated by issued only"] += 1
                        resource = _renamed(
                            resource, "effectiveDateTime", "issued", f"{day}T12:00:00Z"
                        )
                yield "Observation", resource
                yield from self._extras("measurements", row, draws)
                if i in partners:
                    partner = group[partners[i][0]]
                    yield from self._extras(
                        "measurements", partner, self._draws("measurements", partner)
                    )

    def _pairs(self, group: list[Row]) -> dict[int, tuple[int, str]]:
        """Systolic and diastolic rows written together: first index -> (other, form)."""
        systolic = [i for i, r in enumerate(group) if _pairable(r, "sbp")]
        diastolic = [i for i, r in enumerate(group) if _pairable(r, "dbp")]
        pairs: dict[int, tuple[int, str]] = {}
        for s, d in zip(systolic, diastolic, strict=False):
            u = self._draws("blood pressure", group[s])[6]
            if u < SHARE_PANEL + SHARE_PARENT_VALUE:
                pairs[min(s, d)] = (max(s, d), "panel" if u < SHARE_PANEL else "parent")
        return pairs

    def _panel(self, first: Row, second: Row, form: str) -> Resource:
        sbp, dbp = (second, first) if first["measure"] == "dbp" else (first, second)
        number = self._next("Observation")
        write = WRITERS["measurements"][1]
        systolic, diastolic = write(sbp, number), write(dbp, number)
        if form == "parent":
            self.forms["Observation with its own value and a component"] += 1
            return {**systolic, "component": [_component(diastolic)]}
        self.forms["Observation panel with two components"] += 1
        code, display = BP_PANEL
        return {
            "resourceType": "Observation",
            "id": systolic["id"],
            "status": "final",
            "code": _concept(LOINC_SYSTEM, code, display),
            "subject": systolic["subject"],
            "effectiveDateTime": systolic["effectiveDateTime"],
            "component": [_component(systolic), _component(diastolic)],
        }

    def _observation(self, row: Row, draws: tuple[float, ...]) -> Resource:
        number = self._next("Observation")
        write = WRITERS["measurements"][1]
        key, text = row["measure"], row["value_text"]
        if key == "smoking" and row["value"] is None and row["unit"] is None:
            concept = SMOKING_CONCEPTS.get(text or "")
            if concept is not None and draws[0] < SHARE_SMOKING_CODED:
                self.forms["Observation smoking status as SNOMED CT"] += 1
                resource = write(row, number)
                value = _concept(SNOMED_SYSTEM, *concept)
                return _renamed(resource, "valueString", "valueCodeableConcept", value)
        if key in UNIT_FORMS and draws[0] < SHARE_UNIT:
            converted = self._converted(row)
            if converted is not None:
                resource = write(converted, number)
                code, printed = UNIT_FORMS[key][1:]
                resource["valueQuantity"] = {
                    "value": converted["value_number"],
                    "unit": printed,
                    "system": UCUM_SYSTEM,
                    "code": code,
                }
                return resource
        return self._integer(write(row, number), row, set_aside=False)

    def _converted(self, row: Row) -> Row | None:
        """The row with its value in the other unit of UNIT_FORMS, when exactly possible."""
        source, code, _ = UNIT_FORMS[row["measure"]]
        number = row["value_number"]
        if row["unit"] != source or row["value_text"] is not None or number is None:
            return None
        if not math.isfinite(number) or row["value"] != repr(number):
            return None
        measure = shipped_measures()[row["measure"]]
        source_unit, target = measure.conversion(source), measure.conversion(code)
        if source_unit is None or target is None:  # the registry no longer reads one of them
            return None
        value = exact_value(source_unit.to_canonical(number), target)
        if value is None:
            self.forms[f"Observation kept in {source} (no exact {code} value)"] += 1
            return None
        self.forms[f"Observation in {code}"] += 1
        return {**row, "value": repr(value), "value_number": value, "unit": code}

    def _integer(self, resource: Resource, row: Row, *, set_aside: bool) -> Resource:
        """A whole number as a valueInteger: without a unit, or for a row set aside anyway."""
        quantity = resource.get("valueQuantity")
        number = row["value_number"]
        if quantity is None or "comparator" in quantity or number is None:
            return resource
        if not math.isfinite(number) or not number.is_integer() or abs(number) >= 2**31:
            return resource
        if not set_aside and (row["unit"] is not None or not _INTEGER.match(row["value"])):
            return resource
        self.forms["Observation valueInteger" + (" (set aside)" if set_aside else "")] += 1
        return _renamed(resource, "valueQuantity", "valueInteger", int(number))
