"""The report's count tables other than Table 1: flow, incidence, combinations, dependence, quality.

Each ``*_block`` function returns the table's raw counts with a key per count, the relations
between them and whom each count describes (a :class:`._suppression.Block`); the
``*_summary`` functions turn a block into the table as published once the hidden keys are
chosen, leaving out every number derived from a hidden count.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from typing import Any

import polars as pl

from pipeline.compile import names
from pipeline.errors import AscertainError
from pipeline.outputs._matched import EXPOSED_SETS_STEP, MATCHING_LINES, MATCHING_STEPS
from pipeline.outputs.report._cells import Spec
from pipeline.outputs.report._suppression import Block, keyed_frame, masked
from pipeline.outputs.report._table_one import exposure_size_key
from pipeline.stats import (
    crude_proportion,
    cumulative_incidence_at_horizon,
    incidence_rate,
    outcome_combinations,
    pairwise_dependence,
)
from pipeline.stats._disclosure import shown

_DERIVED_DEPENDENCE = (
    "odds_ratio",
    "or_low",
    "or_high",
    "phi",
    "expected",
    "oe_ratio",
    "oe_low",
    "oe_high",
)


def _events_spec(outcome: str) -> Spec:
    """Whom an outcome's events count: its incident cases among the patients at risk."""
    return ((f"at|{outcome}", "true"), (f"inc|{outcome}", "true"))


def flow_block(
    attrition: pl.DataFrame,
    cohort_size: int,
    cases_of: str | None = None,
    *,
    exposed_in: str | None = None,
) -> Block:
    """The attrition log; each step's remaining count is the next step's patients_before.

    The last eligibility step's remaining count is the cohort size (key ``N``, known). A study
    with matched controls adds the matching lines after it (``MATCHING_STEPS``): their first,
    the sets, counts the incident cases of ``cases_of`` in the cohort, the same patients as
    the incidence table's events of that outcome, so it takes that key and is hidden or shown
    with them. The two lines after it count sets, which no other table counts.

    Args:
        attrition: The build's attrition log, counts as integers.
        cohort_size: Rows of the analysis table.
        cases_of: The matched outcome, when the log has matching lines (else they are tied to
            nothing, which would let a reader see a hidden events count there).
        exposed_in: The exposure group whose new users opened the sets (``match_exposed``):
            that line counts the group's patients in the cohort, Table 1 by exposure's column
            size (``exposure_size_key``), so it takes that key.

    Raises:
        AscertainError: The matching lines' cases differ from the cohort's incident cases of
            ``cases_of`` (the two files do not come from one build).
    """
    steps = attrition["step"].to_list()
    first_match = next((i for i, s in enumerate(steps) if s in MATCHING_LINES), len(steps))
    meanings: dict[str, Spec] = {}
    rows: list[dict[str, Any]] = []
    before_key = "src"
    for i, r in enumerate(attrition.iter_rows(named=True)):
        rem_key = f"flow|{i}"
        if i == first_match - 1 and r["remaining"] == cohort_size:
            rem_key, meanings["N"] = "N", ()
        elif r["step"] == MATCHING_STEPS[0] and cases_of is not None:
            rem_key = f"events|{cases_of}"
            meanings[rem_key] = _events_spec(cases_of)
        elif r["step"] == EXPOSED_SETS_STEP and exposed_in is not None:
            rem_key = exposure_size_key(exposed_in)
            meanings[rem_key] = ((names.EXPOSURE, exposed_in),)
        rows.append(
            r
            | {
                "patients_before#key": before_key,
                "removed#key": f"removed|{i}",
                "remaining#key": rem_key,
            }
        )
        before_key = rem_key
    schema = dict(attrition.schema) | {
        f"{c}#key": pl.String for c in ("patients_before", "removed", "remaining")
    }
    frame = keyed_frame(rows, schema)
    return Block(frame, ("removed", "remaining"), total="patients_before", meanings=meanings)


def check_matched_cases(flow: Block, incidence: Block) -> None:
    """Refuse a flow whose matched cases differ from the incidence table's events they share.

    The two are tied by one key (:func:`flow_block`); a key holds one count, so a mismatch
    would silently keep one of them. It can only come from files of different builds.
    """
    events = incidence.values()
    for key, value in flow.values().items():
        if key.startswith("events|") and events.get(key) != value:
            raise AscertainError(
                f"attrition.csv counts {value} matched sets but the cohort has "
                f"{events.get(key)} incident cases of {key.removeprefix('events|')}; "
                "the build folder's files do not come from one build"
            )


def incidence_block(cohort: pl.DataFrame, outcomes: Sequence[str]) -> tuple[list[Any], Block]:
    """Cumulative incidence, crude proportions and rates per outcome.

    Events and non-events add up to at-risk. Each result is ``(outcome, crude proportion,
    Aalen-Johansen cumulative incidence at the horizon, rate)``.
    """
    results, rows = [], []
    meanings: dict[str, Spec] = {}
    for o in outcomes:
        ci, rate = crude_proportion(cohort, o), incidence_rate(cohort, o)
        results.append((o, ci, cumulative_incidence_at_horizon(cohort, o), rate))
        rows.append(
            {
                "outcome": o,
                "events": ci.events,
                "nonevents": ci.at_risk - ci.events,
                "at_risk": ci.at_risk,
                "events#key": f"events|{o}",
                "nonevents#key": f"nonevents|{o}",
                "at_risk#key": f"atrisk|{o}",
            }
        )
        meanings |= {
            f"events|{o}": _events_spec(o),
            f"nonevents|{o}": ((f"at|{o}", "true"), (f"inc|{o}", "false")),
            f"atrisk|{o}": ((f"at|{o}", "true"),),
        }
    schema = {
        "outcome": pl.String,
        "events": pl.Int64,
        "nonevents": pl.Int64,
        "at_risk": pl.Int64,
    } | {f"{c}#key": pl.String for c in ("events", "nonevents", "at_risk")}
    frame = keyed_frame(rows, schema)
    return results, Block(frame, ("events", "nonevents"), "at_risk", meanings=meanings)


def combinations_block(cohort: pl.DataFrame, outcomes: Sequence[str]) -> Block:
    """Patients at risk of every outcome, by exact combination of incident outcomes."""
    table = outcome_combinations(cohort, outcomes, include_none=True)
    table = table.with_columns(("comb|" + pl.col("combination")).alias("n#key"))
    meanings: dict[str, Spec] = {}
    for name in table["combination"]:
        members = set(name.split("+"))
        meanings[f"comb|{name}"] = tuple(
            (f"{p}|{o}", "true" if p == "at" or o in members else "false")
            for o in outcomes
            for p in ("at", "inc")
        )
    return Block(table, ("n",), meanings=meanings)


def dependence_block(cohort: pl.DataFrame, outcomes: Sequence[str]) -> Block:
    """Pairwise 2x2 tables; the four cells of a pair add up to the pair's n."""
    table = pairwise_dependence(cohort, outcomes)
    pair = pl.col("outcome_1") + "|" + pl.col("outcome_2")
    table = table.with_columns(
        ("dep|" + pair + f"|{c}").alias(f"{c}#key") for c in ("a", "b", "c", "d", "n")
    )
    meanings: dict[str, Spec] = {}
    cells = {"a": ("true", "true"), "b": ("true", "false"), "c": ("false", "true")}
    cells |= {"d": ("false", "false")}
    for first, second in table.select("outcome_1", "outcome_2").iter_rows():
        at_risk = ((f"at|{first}", "true"), (f"at|{second}", "true"))
        meanings[f"dep|{first}|{second}|n"] = at_risk
        for c, (x, y) in cells.items():
            meanings[f"dep|{first}|{second}|{c}"] = (
                *at_risk,
                (f"inc|{first}", x),
                (f"inc|{second}", y),
            )
    return Block(table, ("a", "b", "c", "d"), total="n", meanings=meanings)


def quality_blocks(quality: pl.DataFrame) -> list[Block]:
    """Rows used and set aside, one block per source table; they add up to the rows read.

    The rows read of each table are not printed, but a reader may know them, so they are a
    count of the system (``qtotal|<table>``) that the lines add up to.
    """
    key = "q|" + pl.col("source_table") + "|" + pl.col("outcome") + "|" + pl.col("reason")
    table = quality.with_columns(pl.col("n_rows").cast(pl.Int64), key.alias("n_rows#key"))
    blocks = []
    for part in table.partition_by("source_table", maintain_order=True):
        total = f"qtotal|{part['source_table'][0]}"
        relation = ((total, -1), *((k, 1) for k in part["n_rows#key"]))
        extra = {total: int(part["n_rows"].sum())}
        blocks.append(Block(part, ("n_rows",), relations=(relation,), extra=extra))
    return blocks


def incidence_summary(
    results: Iterable[Any], titles: dict[str, str], hidden: frozenset[str], threshold: int
) -> pl.DataFrame:
    """Incidence as published; estimates from a hidden count are left empty."""
    rows = []
    for o, ci, aj, rate in results:
        gone = f"events|{o}" in hidden or f"atrisk|{o}" in hidden

        def keep(x: float, digits: int, *, gone: bool = gone) -> float | None:
            return None if gone or math.isnan(x) else round(x, digits)

        rows.append(
            {
                "outcome": o,
                "title": titles.get(o, o),
                "at_risk": shown(ci.at_risk, f"atrisk|{o}", hidden, threshold),
                "events": shown(ci.events, f"events|{o}", hidden, threshold),
                "cumulative_incidence_percent": keep(100 * aj.estimate, 2),
                "ci_low_percent": keep(100 * aj.low, 2),
                "ci_high_percent": keep(100 * aj.high, 2),
                "crude_percent": keep(100 * ci.proportion, 2),
                "crude_low_percent": keep(100 * ci.low, 2),
                "crude_high_percent": keep(100 * ci.high, 2),
                "person_years": round(rate.person_years, 1),
                "rate_per_1000_py": keep(rate.rate, 2),
                "rate_low": keep(rate.low, 2),
                "rate_high": keep(rate.high, 2),
            }
        )
    return pl.DataFrame(rows)


def dependence_summary(block: Block, hidden: frozenset[str], threshold: int) -> pl.DataFrame:
    """Pairwise dependence as published; measures from a table with a hidden cell are empty.

    The expected co-occurrence is computed from stratum counts that are not released; it is
    left empty with the other measures when a cell of its pair is hidden, because with a
    single stratum it is ``(a + b)(a + c) / n``, a function of the hidden cells.
    """
    out = masked(block, hidden, threshold)
    gone = pl.any_horizontal(
        pl.col(c).str.starts_with("<") | (pl.col(c) == "*") for c in ("a", "b", "c", "d", "n")
    )
    return out.with_columns(
        pl.when(gone).then(None).otherwise(pl.col(c).round(3)).alias(c) for c in _DERIVED_DEPENDENCE
    ).rename({"a": "both", "b": "first_only", "c": "second_only", "d": "neither"})
