"""The Orvane Bay scenario: every rate the generator uses, in one frozen value.

The parameters live here, apart from the generating code, so that ``scenario.json`` can record
all of them (the truth a methodologist checks a case definition against) and so that a test can
compare realised rates with the stated ones. Nothing here draws random numbers except
:func:`draw_frank_copula`, which is kept beside the Kendall's tau formula it must agree with.

The Orvane Bay Primary Care Network is fictional: 14 practices on an invented coast. The rates
are plausible round numbers chosen by hand ("from memory" where they resemble published
figures), not estimates from any real population.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from typing import Any

import numpy as np

GENERATOR_VERSION = "3"

CONDITIONS: tuple[str, ...] = (
    "atrial_fibrillation",
    "ckd",
    "copd",
    "depression",
    "heart_failure",
    "hypertension",
    "type2_diabetes",
)
"""Latent conditions, in the (alphabetical) order of the copula's columns and the truth table."""


@dataclass(frozen=True)
class Condition:
    """How one latent condition arises and how it shows up in the record.

    Attributes:
        hazard_at_50: Onset hazard per year at age 50 and BMI 27 (Gompertz in age, from 18).
        age_log_hr: Log hazard ratio per year of age.
        bmi_log_hr: Log hazard ratio per kg/m2 of BMI above 27.
        mortality_hr: Hazard ratio for death when the condition is present at registration.
        p_coded: Probability that a recognised case ever gets a diagnosis code.
        p_treated: Probability that a recognised case gets the condition's drug (independent of
            coding, so ``p_treated * (1 - p_coded)`` of cases are "drug only").
        p_late: Probability that recognition is late (long lag) rather than prompt.
        lag_days: Mean of the exponential lag from onset (or registration) to recognition.
        late_lag_days: Mean lag when recognition is late.
        codes_per_year: Repeat code rows per year after recognition (first code always at it).
        rx_per_year: Repeat prescriptions per year once treated.
        p_false_code: Probability that a non-case gets one rule-out code.
        p_off_target_rx: Probability that a non-case adult of 50+ gets a short course of the
            condition's first drug for another reason (e.g. a loop diuretic for oedema).
        icd9: Codes (dotted) used before the ICD-10 switch.
        icd10: Codes (dotted) used from the switch on.
        atc: Drugs (ATC) for treated cases; the first is also the off-target drug.
    """

    hazard_at_50: float
    age_log_hr: float
    bmi_log_hr: float
    mortality_hr: float
    p_coded: float
    p_treated: float
    p_late: float
    lag_days: float
    late_lag_days: float
    codes_per_year: float
    rx_per_year: float
    p_false_code: float
    p_off_target_rx: float
    icd9: tuple[str, ...]
    icd10: tuple[str, ...]
    atc: tuple[str, ...]


DRUG_TEXT: dict[str, str] = {
    "A02BC01": "omeprazole 20 mg capsule",
    "A10AE04": "insulin glargine 100 U/mL pen",
    "A10BA02": "metformin 500 mg tablet",
    "A10BB01": "glibenclamide 5 mg tablet",
    "A10BH01": "sitagliptin 100 mg tablet",
    "B01AA03": "warfarin 3 mg tablet",
    "B01AF01": "apixaban 5 mg tablet",
    "C03AA03": "hydrochlorothiazide 25 mg tablet",
    "C03CA01": "furosemide 40 mg tablet",
    "C03CA02": "bumetanide 1 mg tablet",
    "C07AB07": "bisoprolol 5 mg tablet",
    "C08CA01": "amlodipine 5 mg tablet",
    "C09AA05": "ramipril 5 mg capsule",
    "C09CA01": "losartan 50 mg tablet",
    "C10AA01": "simvastatin 40 mg tablet",
    "J01CA04": "amoxicillin 500 mg capsule",
    "N02BE01": "paracetamol 500 mg tablet",
    "N06AB04": "citalopram 20 mg tablet",
    "N06AB06": "sertraline 50 mg tablet",
    "R03AC02": "salbutamol 100 mcg inhaler",
    "R03AK06": "salmeterol/fluticasone 50/500 mcg inhaler",
    "R03BB04": "tiotropium 18 mcg inhalation powder",
}
"""ATC code to the free text a prescriber's system would show (invented strengths)."""


def _default_conditions() -> dict[str, Condition]:
    return {
        "atrial_fibrillation": Condition(
            hazard_at_50=0.0008,
            age_log_hr=0.1,
            bmi_log_hr=0.03,
            mortality_hr=1.6,
            p_coded=0.8,
            p_treated=0.65,
            p_late=0.25,
            lag_days=60,
            late_lag_days=800,
            codes_per_year=1.5,
            rx_per_year=8.0,
            p_false_code=0.01,
            p_off_target_rx=0.01,
            icd9=("427.31",),
            icd10=("I48.0", "I48.2", "I48.91"),
            atc=("B01AF01", "B01AA03"),
        ),
        "ckd": Condition(
            hazard_at_50=0.0015,
            age_log_hr=0.085,
            bmi_log_hr=0.03,
            mortality_hr=1.5,
            p_coded=0.45,
            p_treated=0.0,
            p_late=0.3,
            lag_days=180,
            late_lag_days=900,
            codes_per_year=0.8,
            rx_per_year=0.0,
            p_false_code=0.005,
            p_off_target_rx=0.0,
            icd9=("585.3", "585.4", "585.5"),
            icd10=("N18.3", "N18.4", "N18.5"),
            atc=(),
        ),
        "copd": Condition(
            hazard_at_50=0.0012,
            age_log_hr=0.07,
            bmi_log_hr=0.0,
            mortality_hr=1.8,
            p_coded=0.75,
            p_treated=0.7,
            p_late=0.25,
            lag_days=180,
            late_lag_days=1200,
            codes_per_year=1.5,
            rx_per_year=4.0,
            p_false_code=0.02,
            p_off_target_rx=0.04,
            icd9=("491.20", "491.21", "496"),
            icd10=("J44.0", "J44.1", "J44.9"),
            atc=("R03AC02", "R03BB04", "R03AK06"),
        ),
        "depression": Condition(
            hazard_at_50=0.004,
            age_log_hr=0.01,
            bmi_log_hr=0.02,
            mortality_hr=1.2,
            p_coded=0.65,
            p_treated=0.6,
            p_late=0.2,
            lag_days=120,
            late_lag_days=600,
            codes_per_year=1.0,
            rx_per_year=6.0,
            p_false_code=0.03,
            p_off_target_rx=0.05,
            icd9=("296.20", "296.22", "311"),
            icd10=("F32.1", "F32.9", "F33.1"),
            atc=("N06AB06", "N06AB04"),
        ),
        "heart_failure": Condition(
            hazard_at_50=0.0004,
            age_log_hr=0.095,
            bmi_log_hr=0.04,
            mortality_hr=2.5,
            p_coded=0.85,
            p_treated=0.8,
            p_late=0.1,
            lag_days=45,
            late_lag_days=400,
            codes_per_year=2.0,
            rx_per_year=5.0,
            p_false_code=0.02,
            p_off_target_rx=0.02,
            icd9=("428.0", "428.22", "428.9"),
            icd10=("I50.0", "I50.22", "I50.9"),
            atc=("C03CA01", "C03CA02"),
        ),
        "hypertension": Condition(
            hazard_at_50=0.012,
            age_log_hr=0.05,
            bmi_log_hr=0.05,
            mortality_hr=1.1,
            p_coded=0.8,
            p_treated=0.75,
            p_late=0.2,
            lag_days=120,
            late_lag_days=700,
            codes_per_year=1.5,
            rx_per_year=5.0,
            p_false_code=0.03,
            p_off_target_rx=0.02,
            icd9=("401.1", "401.9"),
            icd10=("I10",),
            atc=("C07AB07", "C03AA03", "C08CA01", "C09AA05", "C09CA01"),
        ),
        "type2_diabetes": Condition(
            hazard_at_50=0.004,
            age_log_hr=0.04,
            bmi_log_hr=0.09,
            mortality_hr=1.3,
            p_coded=0.85,
            p_treated=0.7,
            p_late=0.15,
            lag_days=90,
            late_lag_days=700,
            codes_per_year=2.0,
            rx_per_year=5.0,
            p_false_code=0.03,
            p_off_target_rx=0.005,
            icd9=("250.00", "250.02", "250.40"),
            icd10=("E11.9", "E11.65", "E11.22", "E11"),
            atc=("A10BA02", "A10BB01", "A10BH01", "A10AE04"),
        ),
    }


@dataclass(frozen=True)
class Scenario:
    """Every parameter of the Orvane Bay scenario, with the defaults the demo uses.

    Rates are per patient per year unless the name says otherwise; probabilities are per row
    for the ``p_*_row`` fields and per patient elsewhere. Changing any field changes the data;
    all fields are written to ``scenario.json`` so an extract can always be traced back.
    """

    practices: tuple[str, ...] = tuple(f"P{i:02d}" for i in range(1, 15))
    practice_weights: tuple[float, ...] = (
        9,
        8,
        8,
        7,
        7,
        7,
        6,
        6,
        6,
        5,
        5,
        4,
        4,
        3,
    )
    practices_reporting_egfr: tuple[str, ...] = ("P02", "P05", "P09", "P11", "P13")
    p_female: float = 0.53
    p_sex_lower_f: float = 0.003
    p_sex_padded_m: float = 0.002
    p_sex_unknown_u: float = 0.002
    p_sex_missing: float = 0.003
    p_birth_year_only: float = 0.01
    p_child_at_entry: float = 0.17
    adult_age_beta: tuple[float, float] = (1.3, 2.3)
    adult_age_span: tuple[float, float] = (18.0, 100.0)
    p_registered_at_start: float = 0.6
    first_contact_window_days: int = 180
    transfer_out_rate: float = 0.03
    death_hazard_at_50: float = 0.0025
    death_age_log_hr: float = 0.09
    bmi_adult_median: float = 26.8
    bmi_child_median: float = 18.0
    bmi_log_sd: float = 0.18
    height_cm: dict[str, tuple[float, float]] = field(
        default_factory=lambda: {"F": (163.0, 7.0), "M": (177.0, 7.0)}
    )
    encounter_base_rate: float = 2.8
    encounter_rate_per_year_of_age: float = 0.08
    encounter_rate_per_condition: float = 1.5
    encounter_types: tuple[str, ...] = ("home", "phone", "visit")
    encounter_type_probs: tuple[float, ...] = (0.04, 0.21, 0.75)
    copula_theta: float = 3.0
    conditions: dict[str, Condition] = field(default_factory=_default_conditions)
    icd10_switch_date: str = "2013-01-01"
    p_code_undotted_row: float = 0.2
    p_code_lower_row: float = 0.1
    p_icd10_labelled_icd9_row: float = 0.002
    recognition_visit_days: int = 60
    other_dx_rate: float = 3.0
    other_dx_icd9: dict[str, float] = field(
        default_factory=lambda: {
            "250.01": 0.01,
            "272.4": 0.15,
            "300.00": 0.02,
            "465.9": 0.25,
            "466.0": 0.05,
            "585.2": 0.01,
            "724.2": 0.2,
            "786.2": 0.2,
            "V70.0": 0.13,
        }
    )
    """Background codes and their weights; near misses (type 1 diabetes, CKD stage 2,
    prediabetes, acute bronchitis for COPD, anxiety for depression) are rare so that they test
    a definition's precision without dominating."""
    other_dx_icd10: dict[str, float] = field(
        default_factory=lambda: {
            "E10.9": 0.01,
            "E78.5": 0.15,
            "F41.9": 0.02,
            "J06.9": 0.25,
            "J20.9": 0.05,
            "M54.5": 0.2,
            "N18.2": 0.01,
            "R05": 0.2,
            "R73.09": 0.02,
            "Z00.0": 0.11,
        }
    )
    dx_sources_icd9: tuple[float, float, float] = (0.7, 0.0, 0.3)
    dx_sources_icd10: tuple[float, float, float] = (0.3, 0.5, 0.2)
    dx_source_names: tuple[str, str, str] = ("billing", "problem_list", "visit")
    acute_rx_rate: float = 1.5
    acute_rx_atc: tuple[str, ...] = ("J01CA04", "N02BE01", "A02BC01")
    """Short courses for anyone; inhalers and antidepressants for non-cases come only from
    the conditions' ``p_off_target_rx`` (asthma or bronchitis, pain or anxiety)."""
    p_statin_age_50: float = 0.3
    statin_rx_per_year: float = 4.0
    rx_supply_days: tuple[int, ...] = (28, 56, 84)
    p_rx_stop_missing_row: float = 0.2
    hba1c_screen_rate: float = 0.3
    hba1c_case_rate: float = 2.0
    p_hba1c_mmol_row: float = 0.3
    creatinine_screen_rate: float = 0.5
    creatinine_case_rate: float = 2.0
    creatinine_units: tuple[str, ...] = ("mg/dL", "umol/L", "µmol/L")
    creatinine_unit_probs: tuple[float, ...] = (0.55, 0.35, 0.10)
    p_creatinine_below_06_as_text_row: float = 0.5
    p_egfr_reported_row: float = 0.95
    p_egfr_above_90_as_text_row: float = 0.5
    p_transient_low_egfr_row: float = 0.01
    bp_rate: float = 1.5
    bp_case_rate: float = 2.0
    anthropometry_rate: float = 0.7
    p_bmi_row: float = 0.6
    p_weight_height_row: float = 0.5
    p_duplicate_row: float = 0.005
    p_events_after_death: float = 0.03
    p_orphan_patient: float = 0.001
    p_value_text_comma_row: float = 0.02
    p_implausible_row: float = 0.003
    p_unreadable_date_row: float = 0.0005
    """Share of event rows whose date is unreadable; CSV output only (Parquet dates are typed)."""
    chunk_size: int = 50_000

    def to_dict(self) -> dict[str, Any]:
        """All parameters plus the Kendall's tau implied by the copula parameter.

        Returns:
            A JSON-ready dict; tuples become lists.
        """
        out = dataclasses.asdict(self)
        out["copula_family"] = f"frank (exchangeable, all {len(CONDITIONS)} conditions)"
        out["copula_kendall_tau"] = round(frank_kendall_tau(self.copula_theta), 10)
        out["generator_version"] = GENERATOR_VERSION
        return out


def _debye1(theta: float) -> float:
    """First Debye function D1(theta) = theta^-1 * integral_0^theta t / (e^t - 1) dt.

    Gauss-Legendre quadrature with numpy only, so that ``scenario.json`` is byte-identical
    whether or not scipy is installed (the tests check it against ``scipy.integrate.quad``).
    """
    if theta == 0:
        return 1.0
    nodes, weights = np.polynomial.legendre.leggauss(64)
    t = 0.5 * theta * (nodes + 1.0)
    f = np.where(t == 0, 1.0, t / np.expm1(t))
    return float(0.5 * theta * np.dot(weights, f) / theta)


def frank_kendall_tau(theta: float) -> float:
    """Kendall's tau of a Frank copula with parameter ``theta`` (Genest 1987).

    Args:
        theta: Frank parameter; 0 is independence.

    Returns:
        ``1 - 4/theta * (1 - D1(theta))``.

    >>> round(frank_kendall_tau(5.0), 6)
    0.456701
    """
    if theta == 0:
        return 0.0
    return 1.0 - 4.0 / theta * (1.0 - _debye1(theta))


def draw_frank_copula(rng: np.random.Generator, n: int, dim: int, theta: float) -> np.ndarray:
    """Uniforms with an exchangeable Frank copula, by the Marshall-Olkin frailty method.

    The frailty is logarithmic-series with ``p = 1 - exp(-theta)``; the generator of the Frank
    copula then maps ``Exp(1) / V`` back to uniforms. Valid for ``theta > 0`` in any dimension,
    which is why the scenario's theta must be positive.

    Args:
        rng: The generator to draw from (draws ``n`` frailties, then ``n * dim`` exponentials).
        n: Number of rows.
        dim: Number of columns (conditions).
        theta: Frank parameter, > 0.

    Returns:
        Array of shape ``(n, dim)`` in (0, 1).
    """
    if theta <= 0:
        raise ValueError("the Frank copula sampler needs theta > 0")
    v = rng.logseries(-np.expm1(-theta), size=n).astype(np.float64)
    e = rng.standard_exponential(size=(n, dim))
    s = e / v[:, None]
    u = -np.log1p(np.expm1(-theta) * np.exp(-s)) / theta
    return np.clip(u, 1e-12, 1 - 1e-12)
