"""Measurements of one chunk: HbA1c, kidney function, blood pressure and body size.

Values follow the latent truth: after a diabetes onset HbA1c is mostly at or above 6.5 %,
after a CKD onset eGFR is below 60, after a hypertension onset blood pressure is raised, and
non-cases have normal values (apart from a stated share of transient low eGFR results).
Then the record's mess is laid on top: units, text values and implausible entries.
"""

from __future__ import annotations

import numpy as np

from pipeline.synth._events import Columns, Visits, concat, expand, uniform_days, years_between
from pipeline.synth._population import NEVER, Population
from pipeline.synth._scenario import CONDITIONS, Scenario

MEASURES: tuple[str, ...] = (
    "bmi",
    "creatinine",
    "dbp",
    "egfr",
    "hba1c",
    "height",
    "sbp",
    "weight",
)
UNITS: tuple[str, ...] = (
    "%",
    "cm",
    "kg",
    "kg/m2",
    "lb",
    "mL/min/1.73m2",
    "mg/dL",
    "mmHg",
    "mmol/mol",
    "umol/L",
    "µmol/L",
)
CREATININE_UMOL_PER_MG = 88.42  # the demo spec (§4.2) divides µmol/L by 88.42
IFCC_SLOPE, IFCC_INTERCEPT = 0.09148, 2.152  # NGSP = 0.09148 * IFCC + 2.152 (demo spec §4.1)
_COMMA = [f"{i / 10:.1f}".replace(".", ",") for i in range(301)]
TEXTS: tuple[str, ...] = tuple(sorted([*_COMMA, "<0.6", ">90"]))
"""Every ``value_text`` the generator writes, sorted; rows hold an index, NO_TEXT for null."""
NO_TEXT = len(TEXTS)
_COMMA_INDEX = np.array([TEXTS.index(t) for t in _COMMA], dtype=np.int64)


def _rows(
    owner: np.ndarray, day: np.ndarray, measure: str, value: np.ndarray, unit: str
) -> Columns:
    n = owner.shape[0]
    return {
        "pidx": owner,
        "day": day,
        "measure": np.full(n, MEASURES.index(measure), dtype=np.int64),
        "value": value.astype(np.float64),
        "text": np.full(n, NO_TEXT, dtype=np.int64),
        "unit": np.full(n, UNITS.index(unit), dtype=np.int64),
    }


def _test_days(
    rng: np.random.Generator,
    pop: Population,
    base_rate: np.ndarray,
    extra_rate: float,
    extra_from: np.ndarray,
    visits: Visits | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Test dates: background testing, plus closer monitoring after recognition.

    ``extra_from`` is the recognition day, NEVER when the condition is not recognised. With
    ``visits`` the dates are encounter days (vital signs); without, any day (lab samples).
    """

    def days(owner: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
        if visits is None:
            return uniform_days(rng, lo, hi)
        return visits.days(rng.random(owner.shape[0]), owner, lo, hi)

    counts = rng.poisson(base_rate * years_between(pop.entry_day, pop.exit_day))
    owner, _ = expand(counts)
    day = days(owner, pop.entry_day[owner], pop.exit_day[owner])
    first = np.minimum(extra_from, pop.exit_day)
    counts = np.where(
        extra_from != NEVER, rng.poisson(extra_rate * years_between(first, pop.exit_day)), 0
    )
    owner2, _ = expand(counts)
    day2 = days(owner2, first[owner2], pop.exit_day[owner2])
    return np.concatenate([owner, owner2]), np.concatenate([day, day2])


def _hba1c(rng: np.random.Generator, sc: Scenario, pop: Population, seen: np.ndarray) -> Columns:
    """HbA1c in % or mmol/mol; comma decimals as text; mmol/mol numbers labelled '%'."""
    j = CONDITIONS.index("type2_diabetes")
    adult = pop.age_at(pop.entry_day) >= 18
    owner, day = _test_days(rng, pop, sc.hba1c_screen_rate * adult, sc.hba1c_case_rate, seen[:, j])
    n = owner.shape[0]
    case = pop.onset_day[owner, j] <= day
    controlled = rng.random(n) < 0.15
    high = np.where(
        controlled,
        np.clip(rng.normal(6.2, 0.15, n), 5.7, 6.4),
        np.minimum(6.5 + rng.gamma(2.0, 0.5, n), 19.0),
    )
    normal = np.clip(rng.normal(5.4, 0.3, n), 4.3, 6.2)
    pct = np.round(np.where(case, high, normal), 1)
    mmol = np.round((pct - IFCC_INTERCEPT) / IFCC_SLOPE)
    in_mmol = rng.random(n) < sc.p_hba1c_mmol_row
    rows = _rows(owner, day, "hba1c", np.where(in_mmol, mmol, pct), "%")
    rows["unit"] = np.where(in_mmol, UNITS.index("mmol/mol"), rows["unit"])
    wrong = ~in_mmol & (rng.random(n) < sc.p_implausible_row)
    rows["value"] = np.where(wrong, mmol, rows["value"])
    comma = ~in_mmol & ~wrong & (rng.random(n) < sc.p_value_text_comma_row)
    rows["text"][comma] = _COMMA_INDEX[np.round(pct[comma] * 10).astype(np.int64)]
    rows["value"][comma] = np.nan
    return rows


def creatinine_from_egfr(egfr: np.ndarray, age: np.ndarray, male: np.ndarray) -> np.ndarray:
    """Serum creatinine (mg/dL) that gives ``egfr`` under CKD-EPI 2021, solved piecewise.

    CKD-EPI 2021 (Inker et al., N Engl J Med 2021): ``142 * min(S/k, 1)^a * max(S/k, 1)^-1.2
    * 0.9938^age * 1.012[F]`` with k = 0.7 (F) / 0.9 (M), a = -0.241 (F) / -0.302 (M).
    Generating creatinine this way makes derived eGFR agree with the latent kidney state.
    """
    kappa = np.where(male, 0.9, 0.7)
    alpha = np.where(male, -0.302, -0.241)
    top = 142.0 * 0.9938**age * np.where(male, 1.0, 1.012)
    ratio = egfr / top
    return kappa * np.where(ratio <= 1.0, ratio ** (-1.0 / 1.2), ratio ** (1.0 / alpha))


def _kidney(rng: np.random.Generator, sc: Scenario, pop: Population, seen: np.ndarray) -> Columns:
    """Creatinine in mg/dL or µmol/L, plus a reported eGFR at some practices."""
    j = CONDITIONS.index("ckd")
    age40 = pop.age_at(pop.entry_day) >= 40
    owner, day = _test_days(
        rng, pop, sc.creatinine_screen_rate * age40, sc.creatinine_case_rate, seen[:, j]
    )
    n = owner.shape[0]
    age = np.floor(pop.age_at(day, owner))
    case = pop.onset_day[owner, j] <= day
    low = 15.0 + 44.0 * rng.beta(2.0, 1.5, n)
    normal = np.maximum(61.0, 125.0 - 0.8 * age + rng.normal(0.0, 10.0, n))
    transient = rng.random(n) < sc.p_transient_low_egfr_row
    normal = np.where(transient, 45.0 + 14.0 * rng.random(n), normal)
    egfr = np.where(case, low, normal)
    scr = creatinine_from_egfr(egfr, age, pop.male[owner])
    unit = rng.choice(len(sc.creatinine_units), size=n, p=sc.creatinine_unit_probs)
    in_mg = unit == 0
    value = np.where(in_mg, np.round(scr, 2), np.round(scr * CREATININE_UMOL_PER_MG))
    rows = _rows(owner, day, "creatinine", value, "mg/dL")
    rows["unit"] = np.asarray([UNITS.index(u) for u in sc.creatinine_units])[unit]
    below = in_mg & (value < 0.6) & (rng.random(n) < sc.p_creatinine_below_06_as_text_row)
    rows["text"][below] = TEXTS.index("<0.6")
    rows["value"][below] = np.nan
    wrong = in_mg & ~below & (rng.random(n) < sc.p_implausible_row)
    rows["value"] = np.where(wrong, np.round(scr * CREATININE_UMOL_PER_MG), rows["value"])
    reporting = np.isin(
        pop.practice[owner], [sc.practices.index(p) for p in sc.practices_reporting_egfr]
    )
    rep = reporting & (rng.random(n) < sc.p_egfr_reported_row)
    e_rows = _rows(owner[rep], day[rep], "egfr", np.round(egfr[rep]), "mL/min/1.73m2")
    as_text = (e_rows["value"] > 90) & (
        rng.random(e_rows["value"].shape[0]) < sc.p_egfr_above_90_as_text_row
    )
    e_rows["text"][as_text] = TEXTS.index(">90")
    e_rows["value"][as_text] = np.nan
    return concat([rows, e_rows])


def _blood_pressure(
    rng: np.random.Generator, sc: Scenario, pop: Population, seen: np.ndarray, visits: Visits
) -> Columns:
    """Systolic and diastolic pairs at encounters; raised after hypertension onset; typo x10."""
    j = CONDITIONS.index("hypertension")
    adult = pop.age_at(pop.entry_day) >= 18
    owner, day = _test_days(rng, pop, sc.bp_rate * adult, sc.bp_case_rate, seen[:, j], visits)
    n = owner.shape[0]
    case = pop.onset_day[owner, j] <= day
    sbp = np.where(case, rng.normal(146.0, 13.0, n), np.clip(rng.normal(122.0, 10.0, n), 90, 139))
    sbp = np.round(sbp)
    dbp = np.round(np.clip(0.45 * sbp + rng.normal(22.0, 5.0, n), 45.0, 125.0))
    typo = rng.random(n) < sc.p_implausible_row
    s_rows = _rows(owner, day, "sbp", np.where(typo, sbp * 10, sbp), "mmHg")
    return concat([s_rows, _rows(owner, day, "dbp", dbp, "mmHg")])


def _body_size(rng: np.random.Generator, sc: Scenario, pop: Population, visits: Visits) -> Columns:
    """BMI, weight and height rows at encounters; heights in metres as cm, weights in pounds."""
    counts = rng.poisson(sc.anthropometry_rate * years_between(pop.entry_day, pop.exit_day))
    owner, _ = expand(counts)
    day = visits.days(rng.random(owner.shape[0]), owner, pop.entry_day[owner], pop.exit_day[owner])
    n = owner.shape[0]
    age = pop.age_at(day, owner)
    height = np.where(age < 18, np.minimum(75.0 + 5.8 * age, pop.height[owner]), pop.height[owner])
    bmi = pop.bmi[owner] * np.exp(rng.normal(0.0, 0.03, n))
    weight = bmi * (height / 100.0) ** 2
    with_bmi = rng.random(n) < sc.p_bmi_row
    with_wh = rng.random(n) < sc.p_weight_height_row
    b = _rows(owner[with_bmi], day[with_bmi], "bmi", np.round(bmi[with_bmi], 1), "kg/m2")
    h_val = np.round(height[with_wh] + rng.normal(0.0, 0.8, int(with_wh.sum())), 1)
    in_m = rng.random(h_val.shape[0]) < sc.p_implausible_row
    h = _rows(
        owner[with_wh],
        day[with_wh],
        "height",
        np.where(in_m, np.round(h_val / 100, 2), h_val),
        "cm",
    )
    w_val = np.round(weight[with_wh], 1)
    in_lb = rng.random(w_val.shape[0]) < sc.p_implausible_row
    w = _rows(
        owner[with_wh],
        day[with_wh],
        "weight",
        np.where(in_lb, np.round(w_val * 2.2046, 1), w_val),
        "kg",
    )
    w["unit"] = np.where(in_lb, UNITS.index("lb"), w["unit"])
    return concat([b, h, w])


def draw_measurements(
    rng: np.random.Generator,
    sc: Scenario,
    pop: Population,
    recognised: np.ndarray,
    visits: Visits,
) -> Columns:
    """All measurement rows of the chunk (``text`` indexes :data:`TEXTS`, NO_TEXT for null).

    Vital signs are taken at encounters; lab results carry the sample day, any day.

    Args:
        rng: The chunk's generator.
        sc: Scenario parameters.
        pop: The chunk's people.
        recognised: Recognition day per condition (closer monitoring from then on).
        visits: The chunk's encounter days.

    Returns:
        Column dict with ``pidx, day, measure, value, text, unit``.
    """
    return concat(
        [
            _hba1c(rng, sc, pop, recognised),
            _kidney(rng, sc, pop, recognised),
            _blood_pressure(rng, sc, pop, recognised, visits),
            _body_size(rng, sc, pop, visits),
        ]
    )
