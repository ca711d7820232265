"""The names the compiler gives its stages and the columns it generates, kept in one place.

A stage's name is how later stages, the engines, the workflow commands (a patient's trace,
validation, the code audit) and the tests find it; a generated column's name is part of the
analysis table's contract with every reader (statistics, reports, diffs). Spelling each name
once here means a rename is one edit, and a reader asks this module for ``onset_X`` instead of
rebuilding the pattern. Pure strings, no imports from the rest of the package, so any module
(``pipeline.stats`` included) may import it without pulling in the compiler.
"""

from __future__ import annotations

from dataclasses import dataclass

# --- Stages of the source pass: one judgement per extract row, then the usable rows. -------

JUDGED_SUFFIX = "_judged"
"""Ending of each source table's row-judgement stage (``patients_judged``, ...)."""


def judged_stage(table: str) -> str:
    """The stage that gives every row of extract table ``table`` its reason (or ``used``).

    >>> judged_stage("encounters")
    'encounters_judged'
    """
    return f"{table}{JUDGED_SUFFIX}"


USED = "used"
"""The reason a row-judgement stage gives a row the study may use."""

PATIENT_BASE = "patient_base"
PATIENT_DUPLICATES = "patient_duplicates"
ENCOUNTER_ROWS = "encounter_rows"
ENCOUNTER_SUMMARY = "encounter_summary"
DISTINCT_CODES = "distinct_codes"
"""Each distinct raw code of the extract, normalised, with what is wrong with it."""
CODED_ROWS = "coded_rows"
"""The usable diagnosis and prescription rows, with their raw codes."""

# --- Measurements. ------------------------------------------------------------------------

MEASUREMENT_SHAPES = "measurement_shapes"
"""Each distinct measure, unit, value and value_text of the extract, parsed and judged once."""
MEASUREMENT_ROWS = "measurement_rows"
MEASUREMENTS_JUDGED = judged_stage("measurements")
MEASUREMENT_COPIES = "measurement_copies"
"""The distinct measurement rows whose row hash another row shares, with their copies."""
MEASUREMENT_VALUES = "measurement_values"


def derived_stage(measure: str) -> str:
    """The stage holding a measure's values derived from other measures (eGFR, BMI)."""
    return f"derived_{measure}"


DERIVED_EGFR = derived_stage("egfr")
DERIVED_BMI = derived_stage("bmi")

# --- Evidence. ----------------------------------------------------------------------------

CODES_TO_EVIDENCE = "codes_to_evidence"
"""Each distinct extract code with the evidence it is included in or excluded from."""
CODED_ROW_EVIDENCE = "coded_row_evidence"
"""Each usable coded row with the evidence its code matches."""
CODED_EVIDENCE_DAYS = "coded_evidence_days"
"""Matched coded rows counted per patient, evidence and day."""
EVIDENCE_EVENTS = "evidence_events"
EVIDENCE_COUNTS = "evidence_counts"

# --- Rules and onsets. --------------------------------------------------------------------

CONDITION_ONSETS = "condition_onsets"
LOOKBACK_SUFFIX = "_lookback"
ONSET_PREFIX = "onset_"
RULES_PREFIX = "rules_"


def rules_stage(condition: str, *, lookback: bool = False) -> str:
    """The stage holding the first date each rule of ``condition`` is met, per patient."""
    return f"{RULES_PREFIX}{condition}{LOOKBACK_SUFFIX if lookback else ''}"


def onset_stage(condition: str, *, lookback: bool = False) -> str:
    """The stage holding ``condition``'s onset per patient (``onset_date``)."""
    return f"{ONSET_PREFIX}{condition}{LOOKBACK_SUFFIX if lookback else ''}"


# --- Index, contact, baseline, cohort. ----------------------------------------------------

INDEX_DATES = "index_dates"
CONTACT_ROWS = "contact_rows"
LAST_CONTACT = "last_contact"
CONTACT_AT_INDEX = "contact_at_index"
WINDOW_COUNTS = "window_counts"
MEASURE_COVARIATES = "measure_covariates"
ELIGIBILITY = "eligibility"
ATTRITION = "attrition"
POPULATION = "population"
COHORT = "cohort"
FOLLOWUP_NOT_NEGATIVE = "followup_not_negative"

# --- Row accounting and person-time. ------------------------------------------------------

ROWS_READ = "rows_read"
QUALITY_LOG = "quality_log"
PERSONTIME_SPANS = "persontime_spans"
PERSONTIME = "persontime"
PERSONTIME_ACCOUNTING = "persontime_accounting"

# --- New users of exposure groups (``exposure:``). ------------------------------------------

EXPOSURE = "exposure"  # the cohort's column: the group started on the index date
EXPOSURE_GROUPS_AT_INDEX = "exposure_groups_at_index"  # groups recorded on the index day
EXPOSURE_WASHOUT_RECORDS = "exposure_washout_records"  # group-days in the washout before index
EPISODES = "episodes"  # treatment episodes, written as episodes.parquet
COHORT_AS_TREATED = "cohort_as_treated"  # the cohort with as-treated follow-up (the output then)
AS_TREATED_SUFFIX = "_as_treated"  # followup_end_as_treated, time_X_as_treated, ...

# --- Generated columns. -------------------------------------------------------------------

FOLLOWUP_COLUMNS = ("followup_end", "followup_days", "end_reason")
"""The analysis table's follow-up columns (each also suffixed ``_as_treated`` as treated)."""

PREVALENT_PREFIX = "prevalent_"
AT_RISK_PREFIX = "at_risk_"
INCIDENT_PREFIX = "incident_"


def onset_column(condition: str) -> str:
    """A condition's onset date as a column (``condition_onsets``, ``eligibility``, cohort)."""
    return f"{ONSET_PREFIX}{condition}"


def prevalent_column(condition: str) -> str:
    """Whether ``condition``'s onset is on or before the index date."""
    return f"{PREVALENT_PREFIX}{condition}"


def clear_evidence_column(condition: str) -> str:
    """Evidence of an outcome in its ``clear_before`` window (counts against being at risk)."""
    return f"clear_evidence_{condition}"


def step_column(number: int) -> str:
    """Pass/fail of eligibility step ``number`` (1-based) in ``eligibility``."""
    return f"step_{number}"


def step_evidence_column(number: int) -> str:
    """The count an eligibility step ``number`` reads from ``window_counts``."""
    return f"step_evidence_{number}"


def count_column(covariate: str) -> str:
    """A count covariate's column in ``window_counts`` and the analysis table."""
    return f"count_{covariate}"


@dataclass(frozen=True)
class OutcomeColumns:
    """The analysis table's columns for one outcome, in the order the table writes them.

    Attributes:
        prevalent: Onset on or before the index date.
        at_risk: Not prevalent (and, with ``clear_before``, no evidence just before index).
        incident: Onset after index within follow-up; empty when not at risk.
        onset: The onset date, whenever it is.
        days_to: Days from index to an incident onset.
        time: Days to the onset or the end of follow-up (survival time).
        event: 1 the outcome, 2 death first (competing), 0 censored.
    """

    prevalent: str
    at_risk: str
    incident: str
    onset: str
    days_to: str
    time: str
    event: str

    def all(self) -> tuple[str, ...]:
        """Every column, in the analysis table's order."""
        return (
            self.prevalent,
            self.at_risk,
            self.incident,
            self.onset,
            self.days_to,
            self.time,
            self.event,
        )


OUTCOME_PREFIXES = (
    PREVALENT_PREFIX,
    AT_RISK_PREFIX,
    INCIDENT_PREFIX,
    ONSET_PREFIX,
    "days_to_",
    "time_",
    "event_",
)
"""Prefixes of the per-outcome columns, in the order :class:`OutcomeColumns` lists them.

Readers that find the outcomes of an analysis table by its columns (the report, ``diff``,
``explain``) test these prefixes instead of spelling them again.
"""


def outcome_columns(outcome: str) -> OutcomeColumns:
    """The names of one outcome's columns in the analysis table.

    >>> outcome_columns("ckd").incident
    'incident_ckd'
    """
    return OutcomeColumns(*(f"{prefix}{outcome}" for prefix in OUTCOME_PREFIXES))


def persontime_columns(outcome: str) -> tuple[str, str]:
    """One outcome's columns in ``persontime`` (a cell's days at risk and its events).

    >>> persontime_columns("ckd")
    ('days_at_risk_ckd', 'events_ckd')
    """
    return f"days_at_risk_{outcome}", f"events_{outcome}"
