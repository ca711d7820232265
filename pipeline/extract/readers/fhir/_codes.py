"""The codes, systems and statuses the FHIR reader knows (constants only).

Kept apart from the builders in :mod:`pipeline.extract.readers.fhir._resources` so each
module stays small.
"""

from __future__ import annotations

# System URIs (from the FHIR R4 terminology pages) and OIDs (from the HL7 OID registry, from
# memory: 2.16.840.1.113883.6.3 ICD-10, .6.90 ICD-10-CM, .6.103 ICD-9-CM diagnoses).
ICD_SYSTEMS = {
    "http://hl7.org/fhir/sid/icd-10": "ICD10",
    "http://hl7.org/fhir/sid/icd-10-cm": "ICD10",
    "http://hl7.org/fhir/sid/icd-9-cm": "ICD9",
    "urn:oid:2.16.840.1.113883.6.3": "ICD10",
    "urn:oid:2.16.840.1.113883.6.90": "ICD10",
    "urn:oid:2.16.840.1.113883.6.103": "ICD9",
}
ATC_SYSTEM = "http://www.whocc.no/atc"
LOINC_SYSTEM = "http://loinc.org"
UCUM_SYSTEM = "http://unitsofmeasure.org"
SNOMED_SYSTEM = "http://snomed.info/sct"

# LOINC codes read as our measures (codes and their meaning from loinc.org, as of 2024).
LOINC_MEASURES = {
    "4548-4": "hba1c",  # Hemoglobin A1c/Hemoglobin.total in Blood (%)
    "17856-6": "hba1c",  # Hemoglobin A1c/Hemoglobin.total in Blood by HPLC (%)
    "2160-0": "creatinine",  # Creatinine [Mass/volume] in Serum or Plasma (mg/dL)
    "14682-9": "creatinine",  # Creatinine [Moles/volume] in Serum or Plasma (umol/L)
    "33914-3": "egfr",  # eGFR/1.73 sq M, MDRD
    "62238-1": "egfr",  # eGFR/1.73 sq M, CKD-EPI
    "98979-8": "egfr",  # eGFR/1.73 sq M, CKD-EPI 2021
    "8480-6": "sbp",
    "8462-4": "dbp",
    "39156-5": "bmi",
    "29463-7": "weight",
    "8302-2": "height",
    "2093-3": "total_cholesterol",
    "13457-7": "ldl",  # calculated
    "18262-6": "ldl",  # direct assay
    "72166-2": "smoking",  # Tobacco smoking status
}

# SNOMED CT smoking status values (the US Core / HL7 smoking status value set, from memory)
# as the smoking measure's categories. Other codes fall back to the concept's text.
SNOMED_SMOKING = {
    "449868002": "current",  # Smokes tobacco daily
    "428041000124106": "current",  # Occasional tobacco smoker
    "77176002": "current",  # Smoker
    "65568007": "current",  # Cigarette smoker
    "428071000124103": "current",  # Heavy tobacco smoker
    "428061000124105": "current",  # Light tobacco smoker
    "8517006": "former",  # Ex-smoker
    "266919005": "never",  # Never smoked tobacco
}

# Statuses whose resources did not happen, or were recorded by mistake: set aside with the
# reason given. For Condition, the codes of verificationStatus.
STATUS_SET_ASIDE: dict[str, dict[str, str]] = {
    "Encounter": {"entered-in-error": "entered in error", "cancelled": "cancelled"},
    "Condition": {"entered-in-error": "entered in error", "refuted": "refuted"},
    "MedicationRequest": {"entered-in-error": "entered in error", "cancelled": "cancelled"},
    "MedicationStatement": {"entered-in-error": "entered in error", "not-taken": "not taken"},
    "Observation": {"entered-in-error": "entered in error", "cancelled": "cancelled"},
}

# Every reason the reader gives in source_problem (each is classified in SET_ASIDE_REASONS).
READER_REASONS = (
    "malformed line",
    "other resource type",
    "no patient reference",
    "missing date",
    "year-only date",
    "stop date before start date",
    "medication not found",
    "unknown code system",
    *sorted({r for statuses in STATUS_SET_ASIDE.values() for r in statuses.values()}),
)
