"""A slow, plain-Python reference for when a rule is first met (one patient at a time).

It knows nothing about the compiler; it restates the rule semantics of the demo spec
(``definitions/studies/orvane_multimorbidity.md``, §3 "Evidence and rules") as directly as
possible:

- Each ``(evidence key, date, n_rows)`` becomes events: one event per (evidence, date) with
  ``distinct_days``, otherwise ``n_rows`` separate events on that date.
- ``need {e: k, ...}`` with ``within_days W`` is met by a set holding ``k`` distinct events of
  each ``e`` whose dates span at most ``W`` days (no ``W``: no limit). The onset is the minimum
  over qualifying sets of the latest date in the set.
- ``apart_at_least_days A`` (two events in total): a pair of distinct events of the needed
  kinds whose dates differ by at least ``A`` (and at most ``W`` when given); the onset is the
  minimum over such pairs of the later date.
- ``absent [x, ...]`` without ``absent_window``: any event of x, on any date, and the rule is
  never met. With ``absent_window [s, e]``: a set (or pair) whose latest date is ``t`` does not
  count when an event of x falls on a date ``d`` with ``s <= d - t <= e`` (a ``None`` end is
  open on that side).

Two independent formulations of the ``within_days`` rules are given: :func:`rule_onset` scans
candidate end dates and counts, :func:`rule_onset_by_sets` enumerates the sets themselves (only
usable on tiny inputs); the tests check that they agree.
"""

from __future__ import annotations

import itertools
from collections import Counter
from datetime import date

Event = tuple[str, date]  # (evidence name, date); one per event, repeated for n_rows


def _expand(events: list[tuple[str, date, int]], rule: dict, condition: str) -> list[Event]:
    """The events the rule can use, as (evidence name, date), one entry per event."""
    prefix = f"{condition}."
    out: list[Event] = []
    for key, day, n_rows in events:
        if not key.startswith(prefix):
            continue  # evidence of another condition
        name = key[len(prefix) :]
        if name not in rule["need"]:
            continue  # evidence this rule does not use
        copies = 1 if rule.get("distinct_days", False) else n_rows
        out.extend([(name, day)] * copies)
    return out


def _blocked(events: list[tuple[str, date, int]], rule: dict, condition: str):
    """A test of whether a candidate onset ``t`` is ruled out by the rule's absent evidence."""
    absent = {f"{condition}.{name}" for name in rule.get("absent", ())}
    days = [day for key, day, _ in events if key in absent]
    window = rule.get("absent_window")
    if window is None:
        return lambda _t: bool(days)  # any absent event, whenever: never met
    start, end = window

    def blocked(t: date) -> bool:
        return any(
            (start is None or (d - t).days >= start) and (end is None or (d - t).days <= end)
            for d in days
        )

    return blocked


def _apart_onset(expanded: list[Event], rule: dict, blocked=lambda _t: False) -> date | None:
    """Earliest later-date over pairs of distinct events that are far enough apart."""
    apart = rule["apart_at_least_days"]
    within = rule.get("within_days")
    needed = Counter(rule["need"])  # exactly two events in total
    best: date | None = None
    # combinations over positions: each pair uses two different events
    for (name1, day1), (name2, day2) in itertools.combinations(expanded, 2):
        if Counter([name1, name2]) != needed:
            continue
        gap = abs((day2 - day1).days)
        if gap < apart:
            continue
        if within is not None and gap > within:
            continue
        later = max(day1, day2)
        if blocked(later):
            continue
        if best is None or later < best:
            best = later
    return best


def rule_onset(events: list[tuple[str, date, int]], rule: dict, condition: str) -> date | None:
    """The date one patient first meets ``rule``, or None.

    Args:
        events: The patient's rows of ``evidence_events``: (``"<condition>.<evidence>"``,
            date, n_rows).
        rule: A rule as written in a definition (``need``, ``distinct_days``,
            ``within_days``, ``apart_at_least_days``, ``absent``, ``absent_window``).
        condition: The condition the rule belongs to.
    """
    expanded = _expand(events, rule, condition)
    blocked = _blocked(events, rule, condition)
    if rule.get("apart_at_least_days") is not None:
        return _apart_onset(expanded, rule, blocked)
    within = rule.get("within_days")
    # The latest date of any set is the date of one of its events, so the candidate onsets
    # are the event dates; try them from the earliest and stop at the first that works.
    for end in sorted({day for _, day in expanded}):
        if blocked(end):
            continue
        # events usable by a set whose latest date is `end`
        window = [
            (name, day)
            for name, day in expanded
            if day <= end and (within is None or (end - day).days <= within)
        ]
        counts = Counter(name for name, _ in window)  # one entry per event (see _expand)
        if all(counts[name] >= k for name, k in rule["need"].items()):
            return end
    return None


def rule_onset_by_sets(
    events: list[tuple[str, date, int]], rule: dict, condition: str
) -> date | None:
    """Same as :func:`rule_onset` for ``within_days`` rules, by enumerating every set.

    Exponential: for tiny inputs only.
    """
    expanded = _expand(events, rule, condition)
    blocked = _blocked(events, rule, condition)
    within = rule.get("within_days")
    positions = {
        name: [i for i, (n, _) in enumerate(expanded) if n == name] for name in rule["need"]
    }
    choices = [itertools.combinations(positions[name], k) for name, k in rule["need"].items()]
    best: date | None = None
    for picked in itertools.product(*choices):
        chosen = [expanded[i] for group in picked for i in group]
        days = [day for _, day in chosen]
        if rule.get("distinct_days", False) and any(
            len({day for n, day in chosen if n == name}) < k for name, k in rule["need"].items()
        ):
            continue  # k events of one evidence must fall on k different dates
        if within is not None and (max(days) - min(days)).days > within:
            continue
        if blocked(max(days)):
            continue
        if best is None or max(days) < best:
            best = max(days)
    return best


def _qualifying_sets(events: list[tuple[str, date, int]], rule: dict, condition: str):
    """Every set of events that meets ``rule``, as the list of its dates (tiny inputs only)."""
    expanded = _expand(events, rule, condition)
    if rule.get("apart_at_least_days") is not None:
        needed = Counter(rule["need"])
        for (name1, day1), (name2, day2) in itertools.combinations(expanded, 2):
            gap = abs((day2 - day1).days)
            within = rule.get("within_days")
            far_enough = gap >= rule["apart_at_least_days"]
            if (
                Counter([name1, name2]) == needed
                and far_enough
                and (within is None or gap <= within)
            ):
                yield [day1, day2]
        return
    within = rule.get("within_days")
    positions = {
        name: [i for i, (n, _) in enumerate(expanded) if n == name] for name in rule["need"]
    }
    choices = [itertools.combinations(positions[name], k) for name, k in rule["need"].items()]
    for picked in itertools.product(*choices):
        chosen = [expanded[i] for group in picked for i in group]
        days = [day for _, day in chosen]
        if rule.get("distinct_days", False) and any(
            len({day for n, day in chosen if n == name}) < k for name, k in rule["need"].items()
        ):
            continue
        if within is not None and (max(days) - min(days)).days > within:
            continue
        yield days


def first_evidence_onset(
    events: list[tuple[str, date, int]], rules: list[dict], condition: str
) -> date | None:
    """``onset: first_evidence`` by its definition, enumerating sets (tiny inputs only).

    The condition is first met on the earliest date ``T`` that some rule's qualifying set ends
    on; the onset is the earliest date of any event in any qualifying set (of any rule) whose
    latest date is ``T``.
    """
    sets = [days for rule in rules for days in _qualifying_sets(events, rule, condition)]
    if not sets:
        return None
    first_met = min(max(days) for days in sets)
    return min(min(days) for days in sets if max(days) == first_met)
