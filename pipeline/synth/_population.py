"""People of one chunk: demographics, registration, death and the latent disease onsets.

Everything is drawn column-wise with numpy for a whole chunk at once; dates are integer days
since 1970-01-01 (``int64``), with :data:`NEVER` standing for "no such date", so that interval
arithmetic stays vectorised and comparisons with "never" need no masks.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from pipeline.synth._scenario import CONDITIONS, Scenario, draw_frank_copula

NEVER = np.int64(2**31 - 1)
"""Marker day number for a date that does not happen (later than any real date)."""

DAYS_PER_YEAR = 365.25

SEX_VALUES: tuple[str, ...] = (" M", "F", "M", "U", "f")
"""Recorded sex strings (sorted); a recorded index of -1 means a missing value."""


@dataclass(frozen=True)
class Population:
    """The people of one chunk, one array element per person (ghosts included).

    Attributes:
        number: Patient number used in ``patient_id`` (``OB-`` + 7 digits).
        ghost: True for people whose ``patients`` row is dropped (their rows become orphans).
        practice: Index into ``Scenario.practices``.
        male: True sex (used by the disease and lab models).
        sex_recorded: Index into :data:`SEX_VALUES`, -1 for missing.
        birth_day: True birth date.
        birth_date_missing: The extract keeps only the birth year.
        entry_day: Registration, which is the first encounter.
        exit_day: Earliest of death, transfer out and end of data.
        death_day: Death, or :data:`NEVER` when alive at end of data.
        bmi: Usual BMI (kg/m2).
        height: Adult height (cm).
        latent_u: Frank-copula uniforms, shape ``(n, k)``, columns in ``CONDITIONS`` order.
        onset_day: Latent onset per condition, shape ``(n, k)``; may be after exit or NEVER.
        end_day: Last day of the extract.
    """

    number: np.ndarray
    ghost: np.ndarray
    practice: np.ndarray
    male: np.ndarray
    sex_recorded: np.ndarray
    birth_day: np.ndarray
    birth_date_missing: np.ndarray
    entry_day: np.ndarray
    exit_day: np.ndarray
    death_day: np.ndarray
    bmi: np.ndarray
    height: np.ndarray
    latent_u: np.ndarray
    onset_day: np.ndarray
    end_day: int

    @property
    def size(self) -> int:
        """Number of people in the chunk."""
        return int(self.number.shape[0])

    def age_at(self, day: np.ndarray, who: np.ndarray | None = None) -> np.ndarray:
        """Age in (fractional) years on ``day`` of the people ``who`` (all when None)."""
        birth = self.birth_day if who is None else self.birth_day[who]
        return (day - birth) / DAYS_PER_YEAR

    def true_onset_day(self) -> np.ndarray:
        """Onsets that happen while alive and by end of data, else :data:`NEVER`."""
        limit = np.minimum(self.death_day, self.end_day)
        return np.where(self.onset_day <= limit[:, None], self.onset_day, NEVER)


def _onset_age(
    u: np.ndarray, hazard_at_50: float, age_log_hr: float, rel: np.ndarray
) -> np.ndarray:
    """Invert a Gompertz cumulative hazard that starts at age 18.

    ``H(a) = b r / g * (exp(g (a - 50)) - exp(g (18 - 50)))``; solving ``H(a) = -log(1 - u)``
    turns a copula uniform into an onset age, so dependence between the uniforms becomes
    dependence between onsets.
    """
    e = -np.log1p(-u)
    g = age_log_hr
    return 50.0 + np.log(e * g / (hazard_at_50 * rel) + np.exp(g * (18.0 - 50.0))) / g


def _recorded_sex(rng: np.random.Generator, sc: Scenario, male: np.ndarray) -> np.ndarray:
    """Recorded sex with the usual mess: lower case, padding, 'U' and missing values."""
    r = rng.random(male.shape[0])
    idx = np.where(male, SEX_VALUES.index("M"), SEX_VALUES.index("F"))
    c1 = sc.p_sex_lower_f
    c2 = c1 + sc.p_sex_padded_m
    c3 = c2 + sc.p_sex_unknown_u
    c4 = c3 + sc.p_sex_missing
    idx = np.where((r < c1) & ~male, SEX_VALUES.index("f"), idx)
    idx = np.where((r >= c1) & (r < c2) & male, SEX_VALUES.index(" M"), idx)
    idx = np.where((r >= c2) & (r < c3), SEX_VALUES.index("U"), idx)
    return np.where((r >= c3) & (r < c4), -1, idx)


def draw_population(
    rng: np.random.Generator,
    sc: Scenario,
    *,
    numbers: np.ndarray,
    ghost: np.ndarray,
    start_day: int,
    end_day: int,
) -> Population:
    """Draw the people of one chunk.

    Args:
        rng: The chunk's generator; the draw order below is part of the output's identity.
        sc: Scenario parameters.
        numbers: Patient numbers of the chunk, ascending.
        ghost: Which of them lose their ``patients`` row.
        start_day: First day of the extract.
        end_day: Last day of the extract.

    Returns:
        The chunk's :class:`Population`.
    """
    n = numbers.shape[0]
    weights = np.asarray(sc.practice_weights, dtype=np.float64)
    practice = rng.choice(len(sc.practices), size=n, p=weights / weights.sum())
    male = rng.random(n) >= sc.p_female
    sex_recorded = _recorded_sex(rng, sc, male)

    at_start = rng.random(n) < sc.p_registered_at_start
    early = start_day + rng.integers(0, sc.first_contact_window_days, size=n)
    later = rng.integers(start_day, end_day - 30, size=n, endpoint=True)
    entry_day = np.where(at_start, early, later).astype(np.int64)

    child = rng.random(n) < sc.p_child_at_entry
    a, b = sc.adult_age_beta
    lo, hi = sc.adult_age_span
    age_entry = np.where(child, rng.random(n) * 18.0, lo + (hi - lo) * rng.beta(a, b, size=n))
    birth_day = entry_day - np.floor(age_entry * DAYS_PER_YEAR).astype(np.int64)
    birth_date_missing = rng.random(n) < sc.p_birth_year_only

    median = np.where(child, sc.bmi_child_median, sc.bmi_adult_median)
    bmi = median * np.exp(rng.normal(0.0, sc.bmi_log_sd, size=n))
    f_mean, f_sd = sc.height_cm["F"]
    m_mean, m_sd = sc.height_cm["M"]
    z = rng.normal(0.0, 1.0, size=n)
    height = np.where(male, m_mean + m_sd * z, f_mean + f_sd * z)

    latent_u = draw_frank_copula(rng, n, len(CONDITIONS), sc.copula_theta)
    onset_day = np.empty((n, len(CONDITIONS)), dtype=np.int64)
    for j, name in enumerate(CONDITIONS):  # loop over the conditions, not over patients
        cond = sc.conditions[name]
        rel = np.exp(cond.bmi_log_hr * (np.where(child, 27.0, bmi) - 27.0))
        age = _onset_age(latent_u[:, j], cond.hazard_at_50, cond.age_log_hr, rel)
        days = birth_day + np.floor(np.minimum(age, 200.0) * DAYS_PER_YEAR).astype(np.int64)
        onset_day[:, j] = np.where(age > 130.0, NEVER, days)

    hr = np.ones(n)
    for j, name in enumerate(CONDITIONS):
        hr = np.where(onset_day[:, j] <= entry_day, hr * sc.conditions[name].mortality_hr, hr)
    g = sc.death_age_log_hr
    base = sc.death_hazard_at_50 * hr * np.exp(g * (age_entry - 50.0))
    t_death = np.log1p(rng.standard_exponential(n) * g / base) / g
    death_day = entry_day + np.floor(t_death * DAYS_PER_YEAR).astype(np.int64)
    death_day = np.where(death_day <= end_day, death_day, NEVER)
    t_move = rng.standard_exponential(n) / sc.transfer_out_rate
    move_day = entry_day + np.floor(t_move * DAYS_PER_YEAR).astype(np.int64)
    exit_day = np.minimum(np.minimum(death_day, move_day), end_day)

    return Population(
        number=numbers,
        ghost=ghost,
        practice=practice,
        male=male,
        sex_recorded=sex_recorded,
        birth_day=birth_day,
        birth_date_missing=birth_date_missing,
        entry_day=entry_day,
        exit_day=exit_day,
        death_day=death_day,
        bmi=bmi,
        height=height,
        latent_u=latent_u,
        onset_day=onset_day,
        end_day=end_day,
    )
