"""The numbers-at-risk table under each cumulative incidence curve, as released counts.

At day 0 and at each whole year since index (day ``floor(365.25 k)``, while someone is still
followed), the table gives the patients at risk (followed to that day without the outcome:
follow-up of at least that many days), and the events and the patients censored or dead
without the outcome *before* that day; a last column, End, gives the totals when every
follow-up has ended. So at risk on a day = at risk at day 0 - events before it - censored
before it, exactly, and End's counts are the incidence table's events and non-events.

These are counts of cohort patients, so they join the report's linked suppression system
(:mod:`._suppression`): the count at day 0 and End's counts have the incidence table's
keys (``atrisk|X``, ``events|X``, ``nonevents|X``), and every count is a sum of *bins*: the
patients whose follow-up ends (by the event, or otherwise) in the year from one column's day to
the next (from the last column's day on: to the end). Differences of printed counts give the
bins back, so a bin is a count readers can work out: a bin of 1 to ``threshold - 1`` patients is
a cell of the system, hidden and protected like a printed one (it is never printed); the other
bins are latent counts that tie the columns together. Small printed counts are hidden and
complements chosen by :func:`pipeline.stats.protect_cells` with every other table's counts.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from html import escape

import polars as pl

from pipeline.outputs.report._html_cells import n_cell
from pipeline.outputs.report._suppression import Block, keyed_frame
from pipeline.stats import DAYS_PER_YEAR, OUTCOME, competing_risk_data
from pipeline.stats._disclosure import shown

__all__ = ["END", "at_risk_block", "at_risk_days", "at_risk_note", "render_at_risk"]

END = "end"
"""The ``day`` of the last column: the totals when every follow-up has ended."""

FIELDS = {
    "at_risk": "At risk",
    "events": "Events before, cumulative",
    "left": "Censored or died before, cumulative",
}
BIN_FIELDS = {"events": "events_in", "left": "left_in"}
"""Frame fields of the bins: never printed, the events or others ending from ``day`` on."""


def at_risk_days(longest: float) -> list[int]:
    """The columns' days: 0 and every whole year (``floor(365.25 k)``) up to ``longest``.

    Args:
        longest: The longest follow-up of the outcome's patients at risk, in days.

    Examples:
        >>> at_risk_days(1461)
        [0, 365, 730, 1095, 1461]
        >>> at_risk_days(800)
        [0, 365, 730]
    """
    days = [0]
    while (nxt := math.floor(len(days) * DAYS_PER_YEAR)) <= longest:
        days.append(nxt)
    return days


def at_risk_block(cohort: pl.DataFrame, outcomes: Sequence[str]) -> Block:
    """The numbers-at-risk tables of every outcome as one block, with their bins.

    Rows are ``(outcome, day, field, n)``: the printed counts (``at_risk`` on each day,
    ``events`` and ``left`` on each day after 0 and at :data:`END`), and the bins
    (``events_in`` and ``left_in``, ``day`` the first day of the bin). The bins' keys are listed
    in :attr:`Block.unprinted`.
    """
    rows, relations, unprinted = [], [], set()
    for o in outcomes:
        durations, codes = competing_risk_data(cohort, o)
        days = at_risk_days(float(durations.max()) if durations.size else 0.0)
        bins = []  # (key, field, first day, first day of the next bin)
        for low, high in zip(days, [*days[1:], math.inf], strict=True):
            inside = (durations >= low) & (durations < high)
            for field, of_field in (("events", codes == OUTCOME), ("left", codes != OUTCOME)):
                key = f"arbin|{o}|{low}|{field}"
                n = int((inside & of_field).sum())
                rows.append(
                    {"outcome": o, "day": str(low), "field": BIN_FIELDS[field], "n": n}
                    | {"n#key": key}
                )
                bins.append((key, field, low, high))
                unprinted.add(key)
        printed = [(str(d), "at_risk", d, math.inf, None) for d in days]
        printed += [(str(d), f, 0, d, f) for d in days[1:] for f in ("events", "left")]
        printed += [(END, f, 0, math.inf, f) for f in ("events", "left")]
        for day, field, low, high, kind in printed:
            members = [k for k, f, lo, hi in bins if lo >= low and hi <= high and kind in (None, f)]
            key = f"ar|{o}|{day}|{field}"
            if day == "0":
                key = f"atrisk|{o}"
            elif day == END:
                key = f"{'events' if field == 'events' else 'nonevents'}|{o}"
            n = sum(r["n"] for r in rows if r["n#key"] in members)
            rows.append({"outcome": o, "day": day, "field": field, "n": n, "n#key": key})
            relations.append(((key, -1), *((m, 1) for m in members)))
    schema = {"outcome": pl.String, "day": pl.String, "field": pl.String, "n": pl.Int64}
    frame = keyed_frame(rows, schema | {"n#key": pl.String})
    return Block(frame, ("n",), relations=tuple(relations), unprinted=frozenset(unprinted))


def at_risk_note(threshold: int) -> str:
    """What the tables under the curves count, and how they are suppressed."""
    return (
        "Under each curve: patients at risk at the start of each year since index (days 0, "
        "365, 730, 1,095, 1,461, ...: followed to that day without the outcome), and the events "
        "and the patients censored or dead without the outcome before that day; End: the totals "
        "when every follow-up has ended (the incidence table's events and non-events). A count "
        f"below {threshold} is shown as <{threshold}, and a count hidden so that it cannot be "
        "worked out from the others (or from the incidence table) as *."
    )


def render_at_risk(block: Block, outcome: str, hidden: frozenset[str], threshold: int) -> str:
    """One outcome's table as published; each count cell names its outcome, day and field."""
    part = block.frame.filter(pl.col("outcome") == outcome, pl.col("field").is_in(list(FIELDS)))
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
