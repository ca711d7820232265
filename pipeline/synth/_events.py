"""Encounters, diagnosis codes and prescriptions of one chunk, drawn column-wise.

Each kind of row is made the same way: draw a count per person, ``np.repeat`` the person index
by the counts, then draw every row's date and attributes in one vectorised call. There is no
loop over people; the only Python loops run over the conditions or a few row kinds.

Rows are returned as dicts of equal-length numpy arrays ("columns"); strings are held as indices
into sorted vocabularies, so that sorting by index is sorting by the string.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from pipeline.synth._population import DAYS_PER_YEAR, NEVER, Population
from pipeline.synth._scenario import CONDITIONS, DRUG_TEXT, Scenario

Columns = dict[str, np.ndarray]

SYSTEMS: tuple[str, str] = ("ICD10", "ICD9")
"""Code systems, sorted; index 0 is ICD10."""


def expand(counts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Repeat person indices by their counts.

    Args:
        counts: Non-negative row count per person.

    Returns:
        ``(owner, position)``: the person index of each row, and the row's 0-based position
        within its person's rows (position 0 marks each person's first row).
    """
    counts = counts.astype(np.int64)
    owner = np.repeat(np.arange(counts.shape[0], dtype=np.int64), counts)
    starts = np.cumsum(counts) - counts
    return owner, np.arange(owner.shape[0], dtype=np.int64) - starts[owner]


def uniform_days(rng: np.random.Generator, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """A day drawn uniformly from ``[lo, hi]`` per row (``lo`` where ``hi < lo``)."""
    width = np.maximum(hi - lo + 1, 1)
    return lo + np.floor(rng.random(lo.shape[0]) * width).astype(np.int64)


def years_between(lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Length of ``[lo, hi]`` in years, 0 when empty."""
    return np.maximum(hi - lo + 1, 0) / DAYS_PER_YEAR


def concat(parts: Sequence[Columns]) -> Columns:
    """Concatenate column dicts that share their keys."""
    keys = parts[0].keys()
    return {k: np.concatenate([p[k] for p in parts]) for k in keys}


def add_duplicates(rng: np.random.Generator, cols: Columns, rate: float) -> Columns:
    """Repeat a random ``rate`` share of rows once (exact duplicates, as from a double feed)."""
    n = next(iter(cols.values())).shape[0]
    reps = 1 + (rng.random(n) < rate).astype(np.int64)
    return {k: np.repeat(v, reps) for k, v in cols.items()}


def count_conditions_at(pop: Population, day: np.ndarray) -> np.ndarray:
    """Number of conditions each person has had by ``day``."""
    return (pop.onset_day <= day[:, None]).sum(axis=1)


def draw_encounters(rng: np.random.Generator, sc: Scenario, pop: Population) -> Columns:
    """Encounters: one at registration, then a Poisson number spread over the registration.

    The rate grows with age and with the number of conditions present at mid-registration,
    so long-registered older, sicker people have the most contacts.
    """
    mid = (pop.entry_day + pop.exit_day) // 2
    age = np.maximum(pop.age_at(mid), 0.0)
    rate = (
        sc.encounter_base_rate
        + sc.encounter_rate_per_year_of_age * age
        + sc.encounter_rate_per_condition * count_conditions_at(pop, mid)
    )
    counts = 1 + rng.poisson(rate * years_between(pop.entry_day, pop.exit_day))
    owner, pos = expand(counts)
    day = uniform_days(rng, pop.entry_day[owner], pop.exit_day[owner])
    day = np.where(pos == 0, pop.entry_day[owner], day)
    etype = rng.choice(len(sc.encounter_types), size=owner.shape[0], p=sc.encounter_type_probs)
    etype = np.where(pos == 0, sc.encounter_types.index("visit"), etype)
    return {"pidx": owner, "day": day, "etype": etype.astype(np.int64)}


class Visits:
    """A chunk's encounter days, for putting codes and vital signs on days the patient came in.

    A diagnosis code is written during a contact, so code and vital-sign rows are moved onto
    encounter days: a row drawn at random in ``[lo, hi]`` takes a random encounter of its
    patient in that range, and a first code (recognition) takes the patient's first encounter
    within ``Scenario.recognition_visit_days`` of the day. Rows with no encounter in range keep
    their day, and an encounter is added on it (:meth:`added`), so every code has a contact.
    """

    _BITS = 17  # days after the chunk's first day; 2**17 days is 358 years

    def __init__(self, enc: Columns, first_day: int) -> None:
        self.first_day = first_day
        keys = np.sort(self._key(enc["pidx"], enc["day"]))  # np.unique hashes: 10x slower
        self.keys = keys[np.concatenate([[True], keys[1:] != keys[:-1]])]
        self._added: list[tuple[np.ndarray, np.ndarray]] = []

    def _key(self, owner: np.ndarray, day: np.ndarray) -> np.ndarray:
        return (owner.astype(np.int64) << self._BITS) | (day - self.first_day)

    def days(
        self,
        u: np.ndarray,
        owner: np.ndarray,
        lo: np.ndarray,
        hi: np.ndarray,
    ) -> np.ndarray:
        """The encounter at quantile ``u`` among the patient's encounters in ``[lo, hi]``.

        Rows without one get the day at quantile ``u`` of ``[lo, hi]`` and a new encounter.
        """
        a = np.searchsorted(self.keys, self._key(owner, lo), side="left")
        b = np.searchsorted(self.keys, self._key(owner, np.maximum(hi, lo)), side="right")
        m = b - a
        found = m > 0
        at = np.minimum(a + np.floor(u * m).astype(np.int64), self.keys.shape[0] - 1)
        visit = (self.keys[at] & ((1 << self._BITS) - 1)) + self.first_day
        width = np.maximum(hi - lo + 1, 1)
        day = np.where(found, visit, lo + np.floor(u * width).astype(np.int64))
        self._added.append((owner[~found], day[~found]))
        return day

    def added(self) -> tuple[np.ndarray, np.ndarray]:
        """Patients and days of the encounters added for rows that had none in range."""
        if not self._added:
            return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
        return (
            np.concatenate([o for o, _ in self._added]),
            np.concatenate([d for _, d in self._added]),
        )


class CodeBook:
    """Sorted vocabularies for diagnosis codes (with spelling variants) and ATC codes.

    Every base code appears as written, undotted, lower case, and lower case undotted; a row's
    spelling is chosen by index arithmetic (``4 * base + variant``) and mapped to the sorted
    vocabulary, so spellings cost nothing per row.
    """

    def __init__(self, sc: Scenario) -> None:
        base: set[str] = set(sc.other_dx_icd9) | set(sc.other_dx_icd10)
        for cond in sc.conditions.values():
            base |= set(cond.icd9) | set(cond.icd10)
        self.base = sorted(base)
        spellings = [
            s
            for code in self.base
            for s in (code, code.replace(".", ""), code.lower(), code.lower().replace(".", ""))
        ]
        self.codes = sorted(set(spellings))
        self.spelling_index = np.array([self.codes.index(s) for s in spellings], dtype=np.int64)
        self.atc = sorted(DRUG_TEXT)
        self.drug_text = [DRUG_TEXT[a] for a in self.atc]

    def base_ids(self, codes: Sequence[str]) -> np.ndarray:
        """Indices of dotted base codes."""
        return np.array([self.base.index(c) for c in codes], dtype=np.int64)

    def atc_ids(self, codes: Sequence[str]) -> np.ndarray:
        """Indices of ATC codes."""
        return np.array([self.atc.index(c) for c in codes], dtype=np.int64)


def _diagnosis_rows(
    rng: np.random.Generator,
    sc: Scenario,
    book: CodeBook,
    *,
    owner: np.ndarray,
    day: np.ndarray,
    icd9: Sequence[str] | dict[str, float],
    icd10: Sequence[str] | dict[str, float],
    force_visit: bool = False,
) -> Columns:
    """Code rows: system by date, a code from the system's list, a spelling and a source.

    ``icd9``/``icd10`` are lists (equally likely codes) or dicts of code to weight.
    """
    n = owner.shape[0]
    is9 = day < _switch_day(sc)
    base = np.where(is9, _pick(rng, book, icd9, n), _pick(rng, book, icd10, n))
    variant = (rng.random(n) < sc.p_code_undotted_row).astype(np.int64)
    variant += 2 * (rng.random(n) < sc.p_code_lower_row)
    code = book.spelling_index[4 * base + variant]
    r = rng.random(n)
    p9 = np.cumsum(sc.dx_sources_icd9)
    p10 = np.cumsum(sc.dx_sources_icd10)
    source = np.where(
        is9, np.searchsorted(p9, r, side="right"), np.searchsorted(p10, r, side="right")
    )
    source = np.minimum(source, 2)
    if force_visit:
        source = np.full(n, sc.dx_source_names.index("visit"))
    # a few ICD-10 codes arrive labelled ICD9 (a feed that fills the system column by default)
    mislabelled = ~is9 & (rng.random(n) < sc.p_icd10_labelled_icd9_row)
    system = np.where(is9 | mislabelled, SYSTEMS.index("ICD9"), SYSTEMS.index("ICD10"))
    return {"pidx": owner, "day": day, "system": system, "code": code, "source": source}


def _pick(
    rng: np.random.Generator, book: CodeBook, codes: Sequence[str] | dict[str, float], n: int
) -> np.ndarray:
    """``n`` base-code indices drawn from a list (uniform) or a dict of weights."""
    ids = book.base_ids(list(codes))
    if isinstance(codes, dict):
        w = np.asarray(list(codes.values()), dtype=np.float64)
        return ids[rng.choice(len(ids), size=n, p=w / w.sum())]
    return ids[rng.integers(0, len(ids), size=n)]


def _switch_day(sc: Scenario) -> np.int64:
    return np.datetime64(sc.icd10_switch_date, "D").astype(np.int64)


def _rx_rows(
    rng: np.random.Generator, sc: Scenario, *, owner: np.ndarray, day: np.ndarray, atc: np.ndarray
) -> Columns:
    """Prescription rows: a supply length per row, and a missing stop date at a stated rate."""
    n = owner.shape[0]
    supply = np.asarray(sc.rx_supply_days)[rng.integers(0, len(sc.rx_supply_days), size=n)]
    stop = np.where(rng.random(n) < sc.p_rx_stop_missing_row, NEVER, day + supply)
    return {"pidx": owner, "start": day, "stop": stop, "atc": atc}


def _repeats(
    rng: np.random.Generator,
    first: np.ndarray,
    last: np.ndarray,
    rate: float,
    who: np.ndarray,
    visits: tuple[Visits, int] | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """One row at ``first`` and a Poisson(rate * years) more in ``[first, last]``, for ``who``.

    With ``visits = (index, window)`` the first row moves to the first encounter within
    ``window`` days on or after ``first`` and the others onto encounters in ``[first, last]``.
    """
    counts = np.where(who, 1 + rng.poisson(rate * years_between(first, last)), 0)
    owner, pos = expand(counts)
    if visits is None:
        day = uniform_days(rng, first[owner], last[owner])
        return owner, np.where(pos == 0, first[owner], day)
    index, window = visits
    start = first[owner]
    is_first = pos == 0
    hi = np.where(is_first, np.minimum(start + window, last[owner]), last[owner])
    u = np.where(is_first, 0.0, rng.random(owner.shape[0]))
    return owner, index.days(u, owner, start, hi)


def recognition_day(rng: np.random.Generator, sc: Scenario, pop: Population) -> np.ndarray:
    """Day each condition is recognised by the practice (NEVER if not while registered).

    Recognition follows onset (or registration, for conditions already present) after an
    exponential lag; a stated share of cases is recognised late.
    """
    n = pop.size
    out = np.empty((n, len(CONDITIONS)), dtype=np.int64)
    for j, name in enumerate(CONDITIONS):
        cond = sc.conditions[name]
        late = rng.random(n) < cond.p_late
        lag = rng.standard_exponential(n) * np.where(late, cond.late_lag_days, cond.lag_days)
        seen = np.maximum(pop.onset_day[:, j], pop.entry_day) + np.floor(lag).astype(np.int64)
        ok = (pop.onset_day[:, j] <= pop.exit_day) & (seen <= pop.exit_day)
        out[:, j] = np.where(ok, seen, NEVER)
    return out


def draw_diagnoses_and_prescriptions(
    rng: np.random.Generator,
    sc: Scenario,
    pop: Population,
    book: CodeBook,
    recognised: np.ndarray,
    visits: Visits,
) -> tuple[Columns, Columns]:
    """Condition codes, rule-out codes, treatment, off-target drugs and background rows.

    Diagnosis codes are put on encounter days (see :class:`Visits`); prescriptions are not
    (repeat prescriptions are usually issued without a contact).

    Args:
        rng: The chunk's generator.
        sc: Scenario parameters.
        pop: The chunk's people.
        book: Vocabularies.
        recognised: Output of :func:`recognition_day`.
        visits: The chunk's encounter days.

    Returns:
        ``(diagnoses, prescriptions)`` column dicts.
    """
    dx: list[Columns] = []
    rx: list[Columns] = []
    n = pop.size
    mid = (pop.entry_day + pop.exit_day) // 2
    adult = pop.age_at(mid) >= 18.0
    adult50 = pop.age_at(mid) >= 50.0
    for j, name in enumerate(CONDITIONS):
        cond = sc.conditions[name]
        seen = recognised[:, j]
        is_seen = seen != NEVER
        coded = is_seen & (rng.random(n) < cond.p_coded)
        treated = is_seen & (rng.random(n) < cond.p_treated)
        owner, day = _repeats(
            rng,
            seen,
            pop.exit_day,
            cond.codes_per_year,
            coded,
            visits=(visits, sc.recognition_visit_days),
        )
        dx.append(
            _diagnosis_rows(rng, sc, book, owner=owner, day=day, icd9=cond.icd9, icd10=cond.icd10)
        )
        non_case = pop.onset_day[:, j] > pop.exit_day
        false_code = non_case & adult & (rng.random(n) < cond.p_false_code)
        owner = np.flatnonzero(false_code)
        day = visits.days(
            rng.random(owner.shape[0]), owner, pop.entry_day[owner], pop.exit_day[owner]
        )
        dx.append(
            _diagnosis_rows(
                rng,
                sc,
                book,
                owner=owner,
                day=day,
                icd9=cond.icd9,
                icd10=cond.icd10,
                force_visit=True,
            )
        )
        if not cond.atc:
            continue
        drugs = book.atc_ids(cond.atc)
        w = 0.5 ** np.arange(len(drugs))
        drug = drugs[rng.choice(len(drugs), size=n, p=w / w.sum())]
        first = np.minimum(seen + rng.integers(0, 31, size=n), pop.exit_day)
        owner, day = _repeats(rng, first, pop.exit_day, cond.rx_per_year, treated)
        rx.append(_rx_rows(rng, sc, owner=owner, day=day, atc=drug[owner]))
        off = non_case & adult50 & (rng.random(n) < cond.p_off_target_rx)
        counts = np.where(off, 1 + rng.poisson(1.0, size=n), 0)
        owner, _ = expand(counts)
        day = uniform_days(rng, pop.entry_day[owner], pop.exit_day[owner])
        rx.append(_rx_rows(rng, sc, owner=owner, day=day, atc=np.full(owner.shape[0], drugs[0])))

    years = years_between(pop.entry_day, pop.exit_day)
    owner, _ = expand(rng.poisson(sc.other_dx_rate * years))
    day = visits.days(rng.random(owner.shape[0]), owner, pop.entry_day[owner], pop.exit_day[owner])
    dx.append(
        _diagnosis_rows(
            rng, sc, book, owner=owner, day=day, icd9=sc.other_dx_icd9, icd10=sc.other_dx_icd10
        )
    )
    owner, _ = expand(rng.poisson(sc.acute_rx_rate * years))
    day = uniform_days(rng, pop.entry_day[owner], pop.exit_day[owner])
    acute = book.atc_ids(sc.acute_rx_atc)
    rx.append(
        _rx_rows(
            rng,
            sc,
            owner=owner,
            day=day,
            atc=acute[rng.integers(0, len(acute), size=owner.shape[0])],
        )
    )
    statin = adult50 & (rng.random(n) < sc.p_statin_age_50)
    first = uniform_days(rng, pop.entry_day, pop.exit_day)
    owner, day = _repeats(rng, first, pop.exit_day, sc.statin_rx_per_year, statin)
    rx.append(
        _rx_rows(
            rng, sc, owner=owner, day=day, atc=np.full(owner.shape[0], book.atc.index("C10AA01"))
        )
    )
    return concat(dx), concat(rx)
