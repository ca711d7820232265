"""The numbers-at-risk table under each cumulative incidence curve, as released counts.

At day 0 and at each whole year since index (day ``round(365.25 k)``, while someone is still
followed), the table gives the patients at risk (followed to that day without the outcome:
duration >= day), and the cumulative events and patients censored or dead without the outcome
(duration <= day). When follow-up goes on after the last whole year, a last column gives the
totals at the end of follow-up (no number at risk: its day would be chosen by the data).

These are counts of cohort patients, so they join the report's linked suppression system
(:mod:`._report_suppression`): the table's counts at day 0 and at the end are the incidence
table's at-risk, events and non-events counts (the same keys), and every other count is a sum
of latent *bins*, the patients whose follow-up ends (by the event, or otherwise) exactly on a
column's day or strictly between two columns' days. The bins imply every identity between
the columns (at risk on a day = at risk at 0 - events before it - censored before it) and to
the incidence table. Small counts are hidden and complements chosen by
:func:`pipeline.stats.protect_cells` with every other table's counts.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from html import escape
from itertools import pairwise

import polars as pl

from pipeline.outputs._report_html_cells import n_cell
from pipeline.outputs._report_suppression import Block, keyed_frame, shown
from pipeline.stats import DAYS_PER_YEAR, OUTCOME, competing_risk_data

__all__ = ["END", "at_risk_block", "at_risk_days", "at_risk_note", "render_at_risk"]

END = "end"
"""The ``day`` of the last column when follow-up goes on after the last whole year."""

FIELDS = {
    "at_risk": "At risk",
    "events": "Events, cumulative",
    "left": "Censored or died, cumulative",
}


def at_risk_days(longest: float) -> tuple[list[int], bool]:
    """The columns' days: 0 and every whole year up to ``longest``; and whether an end follows.

    Args:
        longest: The longest follow-up of the outcome's patients at risk, in days.

    Returns:
        The days ``floor(365.25 k)`` not after ``longest``, and whether ``longest`` is later
        than the last of them (then an end column gives the totals).

    Examples:
        >>> at_risk_days(1461)
        ([0, 365, 730, 1095, 1461], False)
        >>> at_risk_days(800)
        ([0, 365, 730], True)
    """
    days = [0]
    while (nxt := math.floor(len(days) * DAYS_PER_YEAR)) <= longest:
        days.append(nxt)
    return days, longest > days[-1]


def _bins(days: list[int], *, end: bool) -> list[tuple[str, float, float, bool]]:
    """The bins as (name, low, high, open): on each column's day, or strictly between two.

    Follow-up ending in an open bin lies strictly between ``low`` and ``high``, in a closed one
    on the day itself. Every column day is one bin's low or high, so a column's at-risk count is
    the bins with ``low >= day`` and its cumulative counts the bins with ``high <= day``.
    """
    out = [(f"on{days[0]}", float(days[0]), float(days[0]), False)]
    for before, day in pairwise(days):
        out += [(f"in{day}", float(before), float(day), True), (f"on{day}", day, day, False)]
    if end:
        out.append(("after", float(days[-1]), math.inf, True))
    return out


def _cells(days: list[int], *, end: bool) -> list[tuple[str, str, float, float]]:
    """Each released count as (day, field, low, high): it adds up the bins inside that range."""
    out = [(str(days[0]), "at_risk", float(days[0]), math.inf)]
    for day in days[1:]:
        out += [(str(day), "at_risk", day, math.inf), (str(day), "events", -1.0, day)]
        out.append((str(day), "left", -1.0, day))
    if end:
        out += [(END, "events", -1.0, math.inf), (END, "left", -1.0, math.inf)]
    return out


def at_risk_block(cohort: pl.DataFrame, outcomes: Sequence[str]) -> Block:
    """The numbers-at-risk tables of every outcome as one block, with their latent bins.

    Rows are ``(outcome, day, field, n)``: day 0 has the at-risk count only; the end column
    (``day`` :data:`END`) has events and censored only. The count at day 0 is the incidence
    table's ``atrisk|X`` and the last column's events and censored are its ``events|X`` and
    ``nonevents|X`` (every patient's follow-up has ended by then).
    """
    rows, relations, latent = [], [], {}
    for o in outcomes:
        durations, codes = competing_risk_data(cohort, o)
        days, end = at_risk_days(float(durations.max()) if durations.size else 0.0)
        bins = []  # (key, kind, low, high)
        for name, low, high, is_open in _bins(days, end=end):
            inside = (
                (durations > low) & (durations < high)
                if is_open
                else (durations >= low) & (durations <= high)
            )
            for kind, of_kind in (("ev", codes == OUTCOME), ("cs", codes != OUTCOME)):
                key = f"arbin|{o}|{name}|{kind}"
                latent[key] = int((inside & of_kind).sum())
                bins.append((key, kind, low, high))
        last = END if end else str(days[-1])
        for day, field, low, high in _cells(days, end=end):
            kind = {"events": "ev", "left": "cs"}.get(field)
            members = [
                key for key, k, lo, hi in bins if lo >= low and hi <= high and kind in (None, k)
            ]
            key = f"ar|{o}|{day}|{field}"
            if day == "0":
                key = f"atrisk|{o}"
            elif day == last and field != "at_risk":
                key = f"{'events' if field == 'events' else 'nonevents'}|{o}"
            n = sum(latent[m] for m in members)
            rows.append({"outcome": o, "day": day, "field": field, "n": n, "n#key": key})
            relations.append(((key, -1), *((m, 1) for m in members)))
    schema = {"outcome": pl.String, "day": pl.String, "field": pl.String, "n": pl.Int64}
    frame = keyed_frame(rows, schema | {"n#key": pl.String})
    return Block(frame, ("n",), relations=tuple(relations), latent=latent)


def at_risk_note(threshold: int) -> str:
    """What the tables under the curves count, and how they are suppressed."""
    return (
        "Under each curve: patients at risk at the start of each year since index (days 0, "
        "365, 730, 1,095, 1,461, ...: followed to that day without the outcome), and the events "
        "and the patients censored or dead without the outcome up to and including that day; "
        "End: the totals when follow-up goes on after the last whole year. A count below "
        f"{threshold} is shown as <{threshold}, and a count hidden so that it cannot be worked "
        "out from the others (or from the incidence table) as *."
    )


def render_at_risk(block: Block, outcome: str, hidden: frozenset[str], threshold: int) -> str:
    """One outcome's table as published; each count cell names its outcome, day and field."""
    part = block.frame.filter(pl.col("outcome") == outcome)
    days = list(dict.fromkeys(part["day"].to_list()))
    cells = {(r["day"], r["field"]): r for r in part.iter_rows(named=True)}
    head = "".join(f'<th class="num">{"End" if d == END else i}</th>' for i, d in enumerate(days))
    body = []
    for f, title in FIELDS.items():
        tds = []
        for d in days:
            r = cells.get((d, f))
            if r is None:
                tds.append("<td></td>")
                continue
            data = f' data-outcome="{escape(outcome)}" data-day="{d}" data-count="{f}"'
            tds.append(
                n_cell(shown(r["n"], r["n#key"], hidden, threshold)).replace("<td", f"<td{data}", 1)
            )
        body.append(f"<tr><th>{title}</th>{''.join(tds)}</tr>")
    return (
        f'<div class="wide"><table class="at-risk"><thead><tr><th>Years since index</th>{head}'
        f"</tr></thead><tbody>{''.join(body)}</tbody></table></div>"
    )
