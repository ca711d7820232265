"""An attack on the released summary tables: can a reader work out a hidden count?

The attacker reads only what was written (``summary/*.csv``, the numbers-at-risk tables under
the curves in ``report.html``, and the cohort size in ``manifest.json``), knows what each table
counts, and writes the identities between the tables from that meaning alone (this file does
not use the suppression code's relations). Each patient of the cohort falls in one *atom*: a
state per outcome (E incident, F at risk without the event, P prevalent, so not at risk) and,
for each Table 1 variable, a level; and, per outcome with a numbers-at-risk table, in a *bin*:
the year (from one column's day to the next, or from the last on) in which follow-up ended, by
the event or otherwise. Every released count is a sum of atoms or bins; shown counts are
equations, hidden ones unknowns. An exact integer solver (``scipy.optimize.milp``) then
minimises and maximises each hidden count. The release passes when no hidden count is pinned
to fewer than ``threshold`` + 1 values (``max - min >= 5``); the markers' own bounds ("<5"
means 1 to 4) are not used, as in the suppression rule. Common practice in statistical
disclosure control (interval/"protection level" audits), written here from memory.
"""

from __future__ import annotations

import csv
import html
import json
import math
import re
import shutil
from collections.abc import Callable
from html.parser import HTMLParser
from itertools import product, takewhile
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from scipy.optimize import Bounds, LinearConstraint, milp

from pipeline.errors import AscertainError
from pipeline.outputs._manifest import read_manifest
from pipeline.outputs.report import write_report
from pipeline.outputs.report._tables import check_matched_cases, flow_block, incidence_block
from pipeline.outputs.report._write import matched_outcome, read_study
from pipeline.synth import generate_extract
from pipeline.workflows.build import BuildOptions, build_study

from .conftest import DEMO_STUDY, HANDMADE, ROOT
from .helpers import demo_study_variant

THRESHOLD = 5
MARKERS = ("<5", "*")
State = tuple[str, ...]
MATCH_LINES = ("match_cases", "match_any_control", "match_all_controls")
FLOW_REST = ("flow", (), "rest", "")


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("attack_demo") / "out"
    build_study(DEMO_STUDY, BuildOptions(out=out))
    write_report(out)
    return out


PERSONTIME = "{age_bands: [40, 50, 60, 70, 80], calendar_year: true}"
SINCE = (
    "{age_bands: [40, 50, 60, 70, 80], calendar_year: true, since_index_years: [0, 1, 3], "
    "reference_rates: ../rates.csv}"
)
"""Rates by year since index, and SMRs against the demo's (fictional) reference rates."""


def _build_with_rates(
    folder: Path, extract: Path | None = None, persontime: str = PERSONTIME
) -> Path:
    """The demo study with a ``persontime:`` section, built and reported (rates included)."""
    out = folder / "out"
    study = demo_study_variant(folder, persontime=persontime)
    shutil.copy(
        ROOT / "definitions" / "studies" / "orvane_reference_rates.csv", folder / "rates.csv"
    )
    build_study(study, BuildOptions(extract=extract, out=out))
    write_report(out)
    assert (out / "summary" / "rates.csv").is_file()
    return out


@pytest.fixture(scope="module")
def demo_rates(tmp_path_factory: pytest.TempPathFactory) -> Path:
    # Years since index up to the horizon (1461 days): the last band, 4+, holds a few days of
    # follow-up, so its events are few while the outcome's total is large.
    option = SINCE.replace("[0, 1, 3]", "[0, 1, 2, 3, 4]")
    return _build_with_rates(tmp_path_factory.mktemp("attack_demo_rates"), persontime=option)


@pytest.fixture(scope="module")
def tiny_rates(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return _build_with_rates(tmp_path_factory.mktemp("attack_tiny_rates"), HANDMADE)


@pytest.fixture(scope="module")
def tiny_since(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The hand-made extract with rates by age band, year and years since index."""
    return _build_with_rates(tmp_path_factory.mktemp("attack_tiny_since"), HANDMADE, SINCE)


@pytest.fixture(scope="module")
def few_rates(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """5,000 synthetic patients with SMRs: heart failure's 10 events, few of them men's.

    Its events by sex are small where its total is shown, so the SMR table's sex rows must be
    hidden together (a shown sex gives the other away through the total) and with Table 1's
    incident cases of each sex, which count the same patients.
    """
    base = tmp_path_factory.mktemp("attack_few_rates")
    generate_extract(base / "extract", patients=5000, seed=5)
    return _build_with_rates(base, base / "extract", SINCE)


@pytest.fixture(scope="module")
def tiny(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("attack_tiny") / "out"
    build_study(DEMO_STUDY, BuildOptions(extract=HANDMADE, out=out))
    write_report(out)
    return out


@pytest.fixture(scope="module")
def sparse(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """3,000 synthetic patients: the curves are drawn, some numbers at risk are small."""
    base = tmp_path_factory.mktemp("attack_sparse")
    generate_extract(base / "extract", patients=3000, seed=5)
    build_study(DEMO_STUDY, BuildOptions(extract=base / "extract", out=base / "out"))
    write_report(base / "out")
    return base / "out"


MATCHED_STUDY = ROOT / "definitions" / "studies" / "orvane_hf_matched.yaml"
NEW_USERS_STUDY = ROOT / "definitions" / "studies" / "orvane_new_users.yaml"


@pytest.fixture(scope="module")
def new_users(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The new-user example on 3,000 synthetic patients: Table 1 by exposure group as well.

    A cohort of a few dozen, so both tables by group have small cells to protect.
    """
    base = tmp_path_factory.mktemp("attack_new_users")
    generate_extract(base / "extract", patients=3000, seed=5)
    build_study(NEW_USERS_STUDY, BuildOptions(extract=base / "extract", out=base / "out"))
    write_report(base / "out")
    by_exposure = _rows(base / "out" / "summary" / "table_one_by_exposure.csv")
    assert any(r["n"] in MARKERS for r in by_exposure)
    return base / "out"


@pytest.fixture(scope="module")
def matched_few(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The matched example study on 3,000 synthetic patients: six matched sets.

    The flow's sets line counts the same six cases as the incidence table's events of heart
    failure, which are hidden (``*``) to protect small cells of Table 1's incident group; the
    sets line must be hidden with them, or the flow gives the events away.
    """
    base = tmp_path_factory.mktemp("attack_matched")
    generate_extract(base / "extract", patients=3000, seed=5)
    build_study(MATCHED_STUDY, BuildOptions(extract=base / "extract", out=base / "out"))
    write_report(base / "out")
    return base / "out"


# A numbers-at-risk cell of report.html: outcome, day, count, and the text printed.
AT_RISK_CELL = re.compile(r'data-outcome="(\w+)" data-day="(\w+)" data-count="(\w+)"[^>]*>([^<]*)<')


def _rows(path: Path) -> list[dict[str, str]]:
    with path.open(encoding="utf-8") as handle:
        return list(csv.DictReader(handle))


class Attack:
    """The attacker's model of one output folder: atoms, released cells and equations."""

    def __init__(self, folder: Path) -> None:
        self.incidence = _rows(folder / "summary" / "incidence.csv")
        self.outcomes = [r["outcome"] for r in self.incidence]
        self.table_one = _rows(folder / "summary" / "table_one.csv")
        # A new-user study's Table 1 by exposure group: each patient's group is one more part
        # of its atom (the last letter of a state), like an outcome's state.
        by_exposure = folder / "summary" / "table_one_by_exposure.csv"
        self.table_one_x = _rows(by_exposure) if by_exposure.is_file() else []
        groups = [r["group"].split("=", 1)[1] for r in self.table_one_x if r["group"] != "overall"]
        self.levels: dict[str, set[str]] = {}
        for r in self.table_one + self.table_one_x:
            v = r["variable"]
            if v in ("patients", "exposure") or v.startswith("prevalent_"):
                continue
            self.levels.setdefault(v, {"missing"}).add(r["level"] or "non-missing")
        self.states = list(product("EFP", repeat=len(self.outcomes)))
        if groups:
            self.states = [(*s, g) for s in self.states for g in dict.fromkeys(groups)]
        self.names = [("s", s, "", "") for s in self.states]
        for v, levels in sorted(self.levels.items()):
            self.names += [("l", s, v, lv) for s in self.states for lv in sorted(levels)]
        self.flow = _rows(folder / "summary" / "flow.csv")
        self.names += [("flow", (), c, str(i)) for i in range(len(self.flow)) for c in ("b", "r")]
        self.names.append(FLOW_REST)  # the last line's remaining (not the cohort when matched)
        page = (folder / "report.html").read_text(encoding="utf-8")
        self.at_risk = {
            (o, d, c): html.unescape(text).replace(",", "")
            for o, d, c, text in AT_RISK_CELL.findall(page)
        }
        # each outcome's bins: [day, next day) for the days of its columns, the last one open
        self.bins: dict[str, list[tuple[int, float]]] = {}
        for o in sorted({o for o, _, _ in self.at_risk}):
            days = sorted(int(d) for x, d, c in self.at_risk if x == o and c == "at_risk")
            self.bins[o] = list(zip(days, [*days[1:], math.inf], strict=True))
            self.names += [("bin", (), o, f"{lo}|{k}") for lo, _ in self.bins[o] for k in "ec"]
        # Events by age band and calendar year (when the build wrote person-time): each band's
        # events over one year, or over all years, are unknowns of their own.
        rates = folder / "summary" / "rates.csv"
        self.rates = _rows(rates) if rates.is_file() else []
        smr = folder / "summary" / "smr.csv"  # with reference rates: observed, expected, SMR
        self.smr = _rows(smr) if smr.is_file() else []
        self.names += [
            ("pt", (), r["outcome"], f"{r['age_band']}|{r['calendar_year']}")
            for r in self.rates
            if r["age_band"] != "all"
        ]
        # events by years since index (when the study split by it): unknowns of their own too
        self.names += [
            ("pt", (), r["outcome"], f"since|{r['since_index']}")
            for r in self.rates
            if r.get("since_index", "all") != "all"
        ]
        self.index = {n: i for i, n in enumerate(self.names)}
        # (coefficients, released text, description); a cell is a sum of atoms
        self.cells: list[tuple[dict[int, int], str, str]] = []
        self.identities: list[dict[int, int]] = []
        # sums of atoms known to lie in a range (an SMR shown beside its expected count)
        self.ranges_known: list[tuple[dict[int, int], float, float]] = []
        for v, levels in self.levels.items():  # each state's patients, split by a variable
            for s in self.states:
                eq = {self.index[("l", s, v, lv)]: 1 for lv in levels}
                self.identities.append(eq | {self.index[("s", s, "", "")]: -1})
        self._read_tables(folder)
        # The manifest states the exact cohort size: the attacker knows every patient's atom
        # sums to it.
        manifest = json.loads((folder / "manifest.json").read_text(encoding="utf-8"))
        cohort = {self.index[("s", s, "", "")]: 1 for s in self.states}
        self.cells.append((cohort, str(manifest["rows"]["cohort"]), "manifest rows.cohort"))

    def _of(self, keep: Callable[[State], bool], variable: str = "", level: str = "") -> dict:
        if variable:
            return {self.index[("l", s, variable, level)]: 1 for s in self.states if keep(s)}
        return {self.index[("s", s, "", "")]: 1 for s in self.states if keep(s)}

    def _state(self, outcome: str) -> int:
        return self.outcomes.index(outcome)

    def _read_tables(self, folder: Path) -> None:
        group_state = {"false": "F", "true": "E", "null": "P"}
        for r in self.table_one:
            o = self._state(r["by"].removeprefix("incident_"))
            g = r["group"].rsplit("=", 1)[-1]

            def in_group(s: State, o: int = o, g: str = g) -> bool:
                return g == "overall" or s[o] == group_state[g]

            self._read_table_one_row(r, in_group)
        for r in self.table_one_x:
            g = r["group"].split("=", 1)[-1]
            self._read_table_one_row(r, lambda s, g=g: g == "overall" or s[-1] == g)
        self._read_other_tables(folder)

    def _read_table_one_row(self, r: dict[str, str], in_group: Callable[[State], bool]) -> None:
        v, level = r["variable"], r["level"]
        what = f"table_one {r['by']} {v} {level} {r['group']}"
        if v == "exposure":  # a group of a new-user study: every cohort patient has one
            chosen = self._of(lambda s, f=in_group, g=level: f(s) and s[-1] == g)
            self.cells.append((chosen, r["n"], what))
            self.cells.append((self._of(lambda s: False), r["missing"], what + " missing"))
            return
        if v == "patients":
            self.cells.append((self._of(in_group), r["n"], what))
        elif v.startswith("prevalent_"):
            p = self._state(v.removeprefix("prevalent_"))
            want = {"true": "P", "false": "EF"}[level]
            self.cells.append(
                (self._of(lambda s, p=p, w=want, f=in_group: f(s) and s[p] in w), r["n"], what)
            )
            self.cells.append(
                (self._of(lambda s: False), r["missing"], what + " missing")
            )  # the attacker knows prevalence is never missing: 0 patients
        else:
            self.cells.append((self._of(in_group, v, level or "non-missing"), r["n"], what))
            self.cells.append((self._of(in_group, v, "missing"), r["missing"], what + " missing"))

    def _read_other_tables(self, folder: Path) -> None:
        for r in self.incidence:
            o = self._state(r["outcome"])
            self.cells.append((self._of(lambda s, o=o: s[o] in "EF"), r["at_risk"], "at_risk"))
            self.cells.append((self._of(lambda s, o=o: s[o] == "E"), r["events"], "events"))
        for r in _rows(folder / "summary" / "combinations.csv"):
            members = set() if r["combination"] == "none" else set(r["combination"].split("+"))
            wanted = tuple("E" if o in members else "F" for o in self.outcomes)
            self.cells.append(
                (
                    self._of(lambda s, w=wanted: s[: len(w)] == w),
                    r["n"],
                    f"combination {r['combination']}",
                )
            )
        for r in _rows(folder / "summary" / "dependence.csv"):
            i, j = self._state(r["outcome_1"]), self._state(r["outcome_2"])
            for column, (x, y) in {
                "n": ("EF", "EF"),
                "both": ("E", "E"),
                "first_only": ("E", "F"),
                "second_only": ("F", "E"),
                "neither": ("F", "F"),
            }.items():
                self.cells.append(
                    (
                        self._of(lambda s, i=i, j=j, x=x, y=y: s[i] in x and s[j] in y),
                        r[column],
                        f"dependence {r['outcome_1']} {r['outcome_2']} {column}",
                    )
                )
        self._read_rates()
        self._read_smr()
        self._read_flow()
        self._read_at_risk()

    def _read_flow(self) -> None:
        """Before = removed + remaining; remaining = next before; the matching lines' meaning.

        The last eligibility line leaves the cohort (the manifest's size). A matched study's
        lines follow it: ``match_cases`` leaves the incident cases of the outcome its
        description names (one set each), the lines after it count sets.
        """
        last = len(self.flow) - 1
        steps = [r["step"] for r in self.flow]
        first_match = next((i for i, s in enumerate(steps) if s in MATCH_LINES), len(steps))
        for i, r in enumerate(self.flow):
            before, removed = (
                self.index[("flow", (), "b", str(i))],
                self.index[("flow", (), "r", str(i))],
            )
            self.cells.append(({before: 1}, r["patients_before"], f"flow {i} before"))
            self.cells.append(({removed: 1}, r["removed"], f"flow {i} removed"))
            remaining = self.index[("flow", (), "b", str(i + 1)) if i < last else FLOW_REST]
            self.cells.append(({remaining: 1}, r["remaining"], f"flow {i} {steps[i]} remaining"))
            self.identities.append({before: 1, removed: -1, remaining: -1})
            if i == first_match - 1:  # the cohort
                self.identities.append(dict.fromkeys(self._of(lambda s: True), 1) | {remaining: -1})
            if steps[i] == "match_cases":
                found = re.match(r"incident (\w+) cases", r["description"])
                assert found, r["description"]
                o = self._state(found.group(1))
                events = self._of(lambda s, o=o: s[o] == "E")
                self.identities.append(dict.fromkeys(events, 1) | {remaining: -1})

    def _bin(self, o: str, low: int, kind: str) -> int:
        return self.index[("bin", (), o, f"{low}|{kind}")]

    def _read_at_risk(self) -> None:
        """At risk on a day: the bins from it on; before a day: the bins before; End: all."""
        for o, bins in self.bins.items():
            k = self._state(o)
            events = {self._bin(o, lo, "e"): 1 for lo, _ in bins}
            others = {self._bin(o, lo, "c"): 1 for lo, _ in bins}
            at_risk = self._of(lambda s, k=k: s[k] in "EF")
            self.identities.append(events | others | dict.fromkeys(at_risk, -1))
            self.identities.append(events | dict.fromkeys(self._of(lambda s, k=k: s[k] == "E"), -1))
        for (o, day, count), text in self.at_risk.items():
            kinds = "ec" if count == "at_risk" else {"events": "e", "left": "c"}[count]
            if count == "at_risk":
                chosen = [lo for lo, _ in self.bins[o] if lo >= int(day)]
            else:
                chosen = [lo for lo, _ in self.bins[o] if day == "end" or lo < int(day)]
            coefficients = {self._bin(o, lo, kind): 1 for lo in chosen for kind in kinds}
            self.cells.append((coefficients, text, f"at risk table {o} {day} {count}"))

    def bin_truth(self, folder: Path) -> dict[int, int]:
        """The true size of every bin, from the cohort (to judge which bins are small)."""
        cohort = pl.read_parquet(folder / "cohort.parquet")
        truth = {}
        for o, bins in self.bins.items():
            rows = cohort.filter(pl.col(f"at_risk_{o}"))
            incident = rows[f"incident_{o}"].to_numpy()
            days = np.where(incident, rows[f"days_to_{o}"].fill_null(-1), rows["followup_days"])
            for lo, hi in bins:
                inside = (days >= lo) & (days < hi)
                truth[self._bin(o, lo, "e")] = int((inside & incident).sum())
                truth[self._bin(o, lo, "c")] = int((inside & ~incident).sum())
        return truth

    def _read_rates(self) -> None:
        """A band's years add up to the band; the bands to the outcome's incident events.

        Person-time ends at onset, so every incident case's event falls in one band and year
        of its outcome, and no other event does.
        """
        bands: dict[tuple[str, str], list[int]] = {}
        since: dict[str, list[int]] = {}
        for r in self.rates:
            o, band, year = r["outcome"], r["age_band"], r["calendar_year"]
            what = f"rates {o} {band} {year}"
            if r.get("since_index", "all") != "all":  # a band of years since index
                k = self.index[("pt", (), o, f"since|{r['since_index']}")]
                self.cells.append(({k: 1}, r["events"], f"{what} since {r['since_index']}"))
                since.setdefault(o, []).append(k)
                continue
            if band == "all":
                i = self._state(o)
                events = self._of(lambda s, i=i: s[i] == "E")
                self.cells.append((events, r["events"], what))
                continue
            k = self.index[("pt", (), o, f"{band}|{year}")]
            self.cells.append(({k: 1}, r["events"], what))
            if year != "all":
                bands.setdefault((o, band), []).append(k)
        for o in dict.fromkeys(r["outcome"] for r in self.rates):
            totals = [
                self.index[("pt", (), o, f"{r['age_band']}|all")]
                for r in self.rates
                if r["outcome"] == o and r["age_band"] != "all" and r["calendar_year"] == "all"
            ]
            i = self._state(o)
            events = self._of(lambda s, i=i: s[i] == "E")
            self.identities.append(dict.fromkeys(totals, 1) | dict.fromkeys(events, -1))
        for (o, band), years in bands.items():
            total = self.index[("pt", (), o, f"{band}|all")]
            self.identities.append(dict.fromkeys(years, 1) | {total: -1})
        for o, keys in since.items():  # every incident event falls in one since-index band
            i = self._state(o)
            events = self._of(lambda s, i=i: s[i] == "E")
            self.identities.append(dict.fromkeys(keys, 1) | dict.fromkeys(events, -1))

    def _read_smr(self) -> None:
        """Observed events are incident cases: of the outcome, an age band, or one sex.

        The outcome's are its incident cases (every atom in state E); a band's are the rates
        table's events of that band over all years (the same unknown); a sex's are the incident
        cases of that sex, the level atoms Table 1's incident column counts on its sex row. An
        SMR shown bounds its observed count too: it is printed to 2 decimals beside the
        expected count (also to 2), so the observed count lies within (SMR +- 0.005) x
        (expected +- 0.005): a range, not an equation.
        """
        for r in self.smr:
            i = self._state(r["outcome"])
            band, sex = r.get("age_band", "all"), r.get("sex", "all")
            if band != "all":
                events = {self.index[("pt", (), r["outcome"], f"{band}|all")]: 1}
            elif sex != "all":
                events = self._of(lambda s, i=i: s[i] == "E", "sex", sex)
            else:
                events = self._of(lambda s, i=i: s[i] == "E")
            what = f"smr {r['outcome']} {band} {sex} observed"
            self.cells.append((events, r["observed"], what))
            if r["smr"] and r["expected"]:
                smr, expected = float(r["smr"]), float(r["expected"])
                low = max(smr - 0.005, 0) * max(expected - 0.005, 0)
                high = (smr + 0.005) * (expected + 0.005)
                self.ranges_known.append((events, math.ceil(low - 1e-9), math.floor(high + 1e-9)))

    def ranges(self) -> list[tuple[str, float, float]]:
        """Every hidden cell's exact (min, max) given all shown cells and identities."""
        hidden = [(c, what) for c, text, what in self.cells if text in MARKERS]
        return self.extremes(hidden)

    def bin_leaks(self, truth: dict[int, int]) -> list[tuple[str, float, float]]:
        """Bins of 1 to 4 patients (never printed) that the released counts pin below 5 values."""
        small = [({i: 1}, self.names[i]) for i, n in truth.items() if 0 < n < THRESHOLD]
        return [(str(w), lo, hi) for w, lo, hi in self.extremes(small) if hi - lo < THRESHOLD]

    def extremes(self, targets: list[tuple[dict[int, int], object]]) -> list[tuple]:
        """The exact (min, max) of each sum of unknowns, given all shown cells and identities."""
        n = len(self.names)
        rows = [dict(eq) for eq in self.identities]
        rhs = [0.0] * len(rows)
        for coefficients, text, _ in self.cells:
            if text not in MARKERS:
                rows.append(coefficients)
                rhs.append(float(text))
        lows, highs = list(rhs), list(rhs)
        for coefficients, low, high in self.ranges_known:
            rows.append(coefficients)
            lows.append(low)
            highs.append(high)
        matrix = np.zeros((len(rows), n))
        for r, eq in enumerate(rows):
            for k, c in eq.items():
                matrix[r, k] = c
        constraints = LinearConstraint(matrix, lows, highs)
        out = []
        for coefficients, what in targets:
            objective = np.zeros(n)
            for k, c in coefficients.items():
                objective[k] = c
            ends = []
            for sign in (1.0, -1.0):
                result = milp(
                    sign * objective,
                    constraints=constraints,
                    integrality=np.ones(n),
                    bounds=Bounds(0, np.inf),
                )
                assert result.status in (0, 4), (what, result.message)  # 4: unbounded
                ends.append(sign * result.fun if result.status == 0 else math.inf)
            out.append((what, ends[0], ends[1]))
        return out


def _state_mask(outcomes: list[str], s: State) -> pl.Expr:
    """The cohort's patients in state ``s`` (each outcome's letter, then any exposure group)."""
    mask = pl.lit(value=True)
    for o, x in zip(outcomes, s[: len(outcomes)], strict=True):
        inc = pl.col(f"incident_{o}")
        mask &= {"E": inc.fill_null(value=False), "F": inc.not_().fill_null(value=False)}.get(
            x, inc.is_null()
        )
    if len(s) > len(outcomes):  # a new-user study's exposure group
        mask &= pl.col("exposure") == s[-1]
    return mask


def _naive(folder: Path) -> Attack:
    """The same released cells with primary suppression only: the counts 1 to 4 hidden."""
    cohort = pl.read_parquet(folder / "cohort.parquet")
    outcomes = [r["outcome"] for r in _rows(folder / "summary" / "incidence.csv")]
    truth = Attack(folder)
    states = {s: _state_mask(outcomes, s) for s in truth.states}
    levels = {}
    for v, names in truth.levels.items():
        for lv in names:
            if lv == "missing":
                levels[(v, lv)] = pl.col(v).is_null()
            elif lv == "non-missing":
                levels[(v, lv)] = pl.col(v).is_not_null()
            else:
                levels[(v, lv)] = pl.col(v).cast(pl.String) == lv
    count: dict[int, int] = {}
    for name, k in truth.index.items():
        if name[0] == "s":
            count[k] = cohort.filter(states[name[1]]).height
        elif name[0] == "l":
            count[k] = cohort.filter(states[name[1]] & levels[(name[2], name[3])]).height
    count |= truth.bin_truth(folder)
    for i, r in enumerate(_rows(folder / "attrition.csv")):
        count[truth.index[("flow", (), "b", str(i))]] = int(r["patients_before"])
        count[truth.index[("flow", (), "r", str(i))]] = int(r["removed"])
        count[truth.index[FLOW_REST]] = int(r["remaining"])  # the last line's, in the end
    naive = []
    for coefficients, _, what in truth.cells:
        value = sum(c * count[k] for k, c in coefficients.items())
        naive.append((coefficients, "<5" if 0 < value < THRESHOLD else str(value), what))
    truth.cells = naive
    return truth


@pytest.mark.parametrize(
    "which",
    [
        "demo",
        "tiny",
        "tiny_rates",
        "tiny_since",
        "matched_few",
        "new_users",
        pytest.param("sparse", marks=pytest.mark.slow),
        pytest.param("demo_rates", marks=pytest.mark.slow),
        pytest.param("few_rates", marks=pytest.mark.slow),
    ],
)
def test_no_hidden_count_can_be_narrowed_down(which: str, request: pytest.FixtureRequest) -> None:
    attack = Attack(request.getfixturevalue(which))
    ranges = attack.ranges()
    assert ranges  # every cohort has hidden counts
    narrow = [(what, lo, hi) for what, lo, hi in ranges if hi - lo < THRESHOLD]
    assert not narrow


@pytest.mark.parametrize("which", ["demo", pytest.param("sparse", marks=pytest.mark.slow)])
def test_no_small_bin_of_the_numbers_at_risk_can_be_narrowed_down(
    which: str, request: pytest.FixtureRequest
) -> None:
    # The year in which follow-up ended is never printed, but differences of the printed
    # columns give it; where it holds 1 to 4 patients, the tables must not pin it.
    folder = request.getfixturevalue(which)
    attack = Attack(folder)
    assert attack.bins  # the curves and their tables are drawn
    assert attack.bin_leaks(attack.bin_truth(folder)) == []


def _tampered(folder: Path, tmp_path: Path, cell: tuple[str, str, str], text: str) -> Path:
    """A copy of the folder whose report.html prints ``text`` in one numbers-at-risk cell."""
    copy = tmp_path / "copy"
    shutil.copytree(folder, copy)
    page = (copy / "report.html").read_text(encoding="utf-8")
    o, day, count = cell
    pattern = rf'(data-outcome="{o}" data-day="{day}" data-count="{count}"[^>]*>)[^<]*<'
    page, n = re.subn(pattern, lambda m: f"{m.group(1)}{html.escape(text)}<", page)
    assert n == 1
    (copy / "report.html").write_text(page, encoding="utf-8")
    return copy


def test_the_attack_finds_a_lone_hidden_number_at_risk(demo: Path, tmp_path: Path) -> None:
    # Hand case: hide only heart failure's at risk at one year. At risk at 0 minus events
    # and censored before day 365 gives it back; the attack must say so.
    cell = ("heart_failure", "365", "at_risk")
    value = float(Attack(demo).at_risk[cell])
    attack = Attack(_tampered(demo, tmp_path, cell, "*"))
    found = [(what, lo, hi) for what, lo, hi in attack.ranges() if "at risk table" in what]
    assert found == [(f"at risk table {' '.join(cell)}", value, value)]


@pytest.mark.slow
def test_the_attack_finds_a_small_bin_given_away(sparse: Path, tmp_path: Path) -> None:
    # Hand case: print a hidden count of the sparse report as its true value. The year bins
    # it protected are then pinned, and the attack must find one of 1 to 4 patients. (The
    # sparse report has hidden numbers at risk and small bins, so the tests above judge them.)
    attack = Attack(sparse)
    truth = attack.bin_truth(sparse)
    assert any(0 < n < THRESHOLD for n in truth.values())
    hidden = [
        (c, w.split()[3:]) for c, text, w in attack.cells if text in MARKERS and "at risk" in w
    ]
    assert hidden
    leaked = []
    for coefficients, (o, day, count) in hidden:
        value = str(sum(truth[k] * c for k, c in coefficients.items()))
        copy = _tampered(sparse, tmp_path / f"{o}{day}{count}", (o, day, count), value)
        leaked += Attack(copy).bin_leaks(truth)
    assert leaked


@pytest.mark.slow
def test_the_attack_finds_a_lone_hidden_band_since_index(demo_rates: Path, tmp_path: Path) -> None:
    # Hand case: hide only heart failure's events in the first year since index. The outcome's
    # total less the other since-index bands gives it back; the attack must say so.
    copy = tmp_path / "copy"
    shutil.copytree(demo_rates, copy)
    rates = _rows(copy / "summary" / "rates.csv")
    (row,) = [r for r in rates if r["outcome"] == "heart_failure" and r["since_index"] == "0-1"]
    value = float(row["events"])
    row["events"] = "*"
    with (copy / "summary" / "rates.csv").open("w", encoding="utf-8", newline="") as handle:
        writer = csv.DictWriter(handle, fieldnames=list(rates[0]), lineterminator="\n")
        writer.writeheader()
        writer.writerows(rates)
    found = [(w, lo, hi) for w, lo, hi in Attack(copy).ranges() if w.endswith("since 0-1")]
    assert found == [("rates heart_failure all all since 0-1", value, value)]


def _flow_line(folder: Path, step: str) -> dict[str, str]:
    (line,) = [r for r in _rows(folder / "summary" / "flow.csv") if r["step"] == step]
    return line


def test_the_matching_lines_hide_the_events_they_repeat(matched_few: Path) -> None:
    # Six sets: the sets line counts the six incident cases the incidence table hides as a
    # complement (not as a small count). Every matching line is hidden with them, and the
    # cohort line before them is printed exactly.
    size = json.loads((matched_few / "manifest.json").read_text(encoding="utf-8"))
    (sets,) = [r for r in _rows(matched_few / "attrition.csv") if r["step"] == "match_cases"]
    assert sets["remaining"] == "6"
    (incidence,) = _rows(matched_few / "summary" / "incidence.csv")
    assert incidence["events"] == "*"
    for step in ("match_cases", "match_any_control", "match_all_controls"):
        assert _flow_line(matched_few, step)["remaining"] in MARKERS
    assert _flow_line(matched_few, "not_prevalent")["remaining"] == str(size["rows"]["cohort"])
    assert _flow_line(matched_few, "match_cases")["patients_before"] == str(size["rows"]["cohort"])


def test_the_attack_reads_the_events_off_a_printed_sets_line(
    matched_few: Path, tmp_path: Path
) -> None:
    # Hand case: print the sets line as its true count (as a report that did not tie it to the
    # events would). The events of heart failure, hidden in the incidence table, are then
    # pinned to that count; the attack must say so.
    copy = tmp_path / "copy"
    shutil.copytree(matched_few, copy)
    truth = {r["step"]: r for r in _rows(copy / "attrition.csv")}
    flow = _rows(copy / "summary" / "flow.csv")
    for r in flow:
        if r["step"].startswith("match_"):
            r |= {c: truth[r["step"]][c] for c in ("patients_before", "removed", "remaining")}
    with (copy / "summary" / "flow.csv").open("w", encoding="utf-8", newline="") as handle:
        writer = csv.DictWriter(handle, fieldnames=list(flow[0]), lineterminator="\n")
        writer.writeheader()
        writer.writerows(flow)
    pinned = [(w, lo, hi) for w, lo, hi in Attack(copy).ranges() if w == "events"]
    assert pinned == [("events", 6.0, 6.0)]


def test_the_matched_outcome_comes_from_the_study_or_from_the_matched_cases(
    matched_few: Path, tmp_path: Path
) -> None:
    # The fixture's report could not find the study (built far from it), so it named the
    # matched outcome from matched.parquet's cases; given the study, it reads cases_of there,
    # and the flow is the same.
    cohort = pl.read_parquet(matched_few / "cohort.parquet")
    found = read_study(read_manifest(matched_few), cohort, matched_few)
    assert found.cases_of is None
    assert found.notes
    attrition = pl.read_csv(matched_few / "attrition.csv")
    assert matched_outcome(matched_few, cohort, attrition, found) == "heart_failure"
    given = read_study(read_manifest(matched_few), cohort, matched_few, MATCHED_STUDY)
    assert given.cases_of == "heart_failure"
    copy = tmp_path / "copy"
    shutil.copytree(matched_few, copy)
    write_report(copy, MATCHED_STUDY)
    flow = (copy / "summary" / "flow.csv").read_text(encoding="utf-8")
    assert flow == (matched_few / "summary" / "flow.csv").read_text(encoding="utf-8")
    # without the study and without matched.parquet the sets line cannot be tied: refused
    (copy / "matched.parquet").unlink()
    with pytest.raises(AscertainError, match="cannot be tied to an outcome"):
        write_report(copy)


def _matched_attrition(cases: int) -> pl.DataFrame:
    rows = [
        (1, "patients_in_extract", 100, 0, 100),
        (2, "not_prevalent", 100, 10, 90),
        (3, "match_cases", 90, 90 - cases, cases),
        (4, "match_any_control", cases, 0, cases),
        (5, "match_all_controls", cases, 1, cases - 1),
    ]
    return pl.DataFrame(
        [(n, step, "", *counts) for n, step, *counts in rows],
        schema=["step_number", "step", "description", "patients_before", "removed", "remaining"],
        orient="row",
    )


def test_the_flow_keys_the_cohort_and_the_matched_cases_as_the_tables_do() -> None:
    # The cohort line stays the known total N although matching lines follow it, and the sets
    # line is the incidence table's events of the matched outcome (one key: one count).
    flow = flow_block(_matched_attrition(7), 90, "heart_failure")
    keys = flow.frame.select("step", "patients_before#key", "remaining#key").rows()
    assert keys == [
        ("patients_in_extract", "src", "flow|0"),
        ("not_prevalent", "flow|0", "N"),
        ("match_cases", "N", "events|heart_failure"),
        ("match_any_control", "events|heart_failure", "flow|3"),
        ("match_all_controls", "flow|3", "flow|4"),
    ]
    assert flow.meanings["N"] == ()
    assert flow.meanings["events|heart_failure"] == (
        ("at|heart_failure", "true"),
        ("inc|heart_failure", "true"),
    )


def test_a_sets_line_that_differs_from_the_cohorts_cases_is_refused() -> None:
    cohort = pl.DataFrame(
        {
            "at_risk_heart_failure": [True] * 90,
            "incident_heart_failure": [True] * 6 + [False] * 84,
            "days_to_heart_failure": [10] * 6 + [None] * 84,
            "followup_days": [100] * 90,
            "end_reason": ["horizon"] * 90,
        }
    )
    _, incidence = incidence_block(cohort, ["heart_failure"])
    check_matched_cases(flow_block(_matched_attrition(6), 90, "heart_failure"), incidence)
    with pytest.raises(AscertainError, match="counts 7 matched sets but the cohort has 6"):
        check_matched_cases(flow_block(_matched_attrition(7), 90, "heart_failure"), incidence)


def test_the_attack_breaks_primary_suppression_alone(tiny: Path) -> None:
    attack = _naive(tiny)
    ranges = attack.ranges()
    determined = [what for what, lo, hi in ranges if lo == hi]
    assert determined, "the attack found nothing: it could not fail"


def test_the_demo_report_hides_few_counts(demo: Path) -> None:
    # Complements chosen greedily hid 127 counts of the demo's summaries (105 of them in
    # Table 1) for its 7 small ones; chosen by optimisation, 25. The bound leaves a little room.
    hidden = sum(
        text in MARKERS
        for path in (demo / "summary").glob("*.csv")
        for r in _rows(path)
        for text in r.values()
    )
    assert 7 <= hidden <= 35


def test_a_cohort_below_the_threshold_is_shown_as_the_manifest_states_it(tmp_path: Path) -> None:
    # manifest.json states the exact cohort size (rows.cohort); hiding it in the report would
    # protect nothing, and a complement chosen to protect it would hide counts for nothing.
    study = demo_study_variant(tmp_path / "defs")
    text = study.read_text(encoding="utf-8")
    assert "small_cell_threshold: 5\n" in text
    study.write_text(text.replace("small_cell_threshold: 5\n", "small_cell_threshold: 50\n"))
    out = tmp_path / "out"
    build_study(study, BuildOptions(extract=HANDMADE, out=out))
    write_report(out, study)
    size = json.loads((out / "manifest.json").read_text(encoding="utf-8"))["rows"]["cohort"]
    assert 0 < size < 50
    last = _rows(out / "summary" / "flow.csv")[-1]
    assert last["remaining"] == str(size)


class _QualityTable(HTMLParser):
    """The report's quality table as (source table, status, reason, rows as printed)."""

    def __init__(self) -> None:
        super().__init__()
        self.rows: list[list[str]] = []
        self._row: list[str] | None = None
        self._inside = False

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        if tag == "tr":
            self._row = []
        elif tag in ("td", "th") and self._row is not None:
            self._row.append("")
            self._inside = True

    def handle_endtag(self, tag: str) -> None:
        if tag in ("td", "th"):
            self._inside = False
        elif tag == "tr" and self._row is not None:
            self.rows.append(self._row)
            self._row = None

    def handle_data(self, data: str) -> None:
        if self._inside and self._row is not None:
            self._row[-1] += data


SOURCE_TABLES = ("patients", "encounters", "diagnoses", "prescriptions", "measurements")


def _quality_leaks(lines: list[list[str]], read: dict[str, int], threshold: int) -> list[str]:
    """Hidden quality counts an attacker narrows below the threshold (exact, by hand).

    Each table's lines add up to its rows read, which the manifest states; that is the only
    identity among them, so with k hidden lines summing to R each ranges over [0, R] when
    k >= 2 and is R itself when k = 1.
    """
    hidden: dict[str, int] = {}
    remaining = dict(read)
    for table, _status, _reason, shown in lines:
        if shown.replace(",", "").isdigit():
            remaining[table] -= int(shown.replace(",", ""))
        else:
            hidden[table] = hidden.get(table, 0) + 1
    return [
        f"{table}: {k} hidden, summing to {remaining[table]}"
        for table, k in hidden.items()
        if k == 1 or remaining[table] < threshold
    ]


def test_the_quality_attack_finds_a_lone_hidden_line() -> None:
    lines = [["diagnoses", "used", "used", "120"], ["diagnoses", "set aside", "x", "<5"]]
    assert _quality_leaks(lines, {"diagnoses": 123}, 5) == ["diagnoses: 1 hidden, summing to 3"]


@pytest.mark.parametrize("which", ["demo", "tiny"])
def test_no_hidden_quality_count_can_be_narrowed_down(
    which: str, request: pytest.FixtureRequest
) -> None:
    # The report's quality table is released in report.html only (not in summary/).
    folder = request.getfixturevalue(which)
    parser = _QualityTable()
    parser.feed((folder / "report.html").read_text(encoding="utf-8"))
    start = next(i for i, r in enumerate(parser.rows) if r[:1] == ["Source table"])
    lines = list(
        takewhile(lambda r: len(r) == 4 and r[0] in SOURCE_TABLES, parser.rows[start + 1 :])
    )
    read = json.loads((folder / "manifest.json").read_text(encoding="utf-8"))["rows"]
    tables = {line[0] for line in lines}
    assert tables
    assert tables <= set(read), (tables, read)
    assert _quality_leaks(lines, {t: read[t] for t in tables}, 5) == []
