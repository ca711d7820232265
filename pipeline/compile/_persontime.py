"""Person-time: each patient's follow-up split into cells, with days at risk and events.

The cells are of age band, calendar year and time since index (``persontime.parquet``).

Day convention: follow-up is the days index + 1 ... ``followup_end``, the days
``followup_days`` counts. Each day belongs to the age band of the age completed on it, to its
calendar year and to the band of whole years completed since index on it; an onset belongs to
its own day's cell. Ages are counted as for ``age_at_index`` (``age_in_years``): the band of
age A starts on the A-th birthday, which for someone born on 29 February is 1 March in a year
without one, and a patient known only by a birth year is taken to be born on 1 July of it.

The split is set-based, for every patient at once: each span meets the study's few bands in a
cross join (a band meets the span when it starts on or before the span's end and ends on or
after its start) and the calendar years each piece touches are generated per row, so the work
grows with the number of cells, never with a loop over patients. A check stage then compares,
for every cohort patient, the days and events over their cells with ``followup_days``,
``time_X`` and ``incident_X`` and fails the build naming a patient when they differ.
"""

from __future__ import annotations

from sqlglot import exp

from pipeline.compile import names
from pipeline.compile._context import CompileContext
from pipeline.compile._plan import ColumnDoc, Stage
from pipeline.compile._sql import add_days, days_between, value
from pipeline.config._persontime import PersonTime

# Carried from the spans through every split; the outcome columns are added per study.
_CARRIED = ("patient_id", "birth_date", "index_date")


def _reached(start: exp.Expression, years: exp.Expression) -> exp.Expression:
    """The day ``years`` whole years after ``start`` are completed (a birthday, an anniversary).

    The first of the month ``years`` on, plus the day of the month - 1: exact for every date,
    and for 29 February it gives 1 March in a year without one, the rule ``age_in_years``
    follows. (Adding years with DuckDB or Spark would give 28 February.)
    """
    first = exp.func(
        "MAKE_DATE",
        exp.Add(this=exp.Year(this=start.copy()), expression=years),
        exp.Month(this=start.copy()),
        exp.Literal.number(1),
    )
    return add_days(
        first, exp.Sub(this=exp.Day(this=start.copy()), expression=exp.Literal.number(1))
    )


def _bands_table(alias: str, bands: tuple[tuple[int, int | None, str], ...]) -> exp.Expression:
    """A literal table (label, lower, upper) of bands; the last one's upper is NULL (open)."""
    rows = [
        exp.Tuple(
            expressions=[
                exp.Literal.string(label),
                exp.Literal.number(low),
                exp.cast(exp.null(), "INT") if high is None else exp.Literal.number(high),
            ]
        )
        for low, high, label in bands
    ]
    return exp.Values(
        expressions=rows,
        alias=exp.TableAlias(
            this=exp.to_identifier(alias),
            columns=[exp.to_identifier(c) for c in ("label", "lower_years", "upper_years")],
        ),
    )


def _piece(name: str) -> exp.Column:
    return exp.column(name, "p")


def _split_by_bands(
    source: exp.Expression,
    carried: list[str],
    *,
    bands: tuple[tuple[int, int | None, str], ...],
    origin: str,
    label: str,
    lower: str | None,
) -> tuple[exp.Select, list[str]]:
    """Split each piece of ``source`` where bands counted in years from ``origin`` change.

    A band [lower, upper) of completed years meets the piece when its first day (``origin``
    plus ``lower`` years) is on or before the piece's end and its first day after (``upper``
    years) is after the piece's start; the new piece is the overlap.
    """
    low_years = exp.column("lower_years", "b")
    high_years = exp.column("upper_years", "b")
    band_start = _reached(_piece(origin), low_years)
    band_after = _reached(_piece(origin), high_years.copy())
    open_band = high_years.copy().is_(exp.null())
    new_end = (
        exp.Case()
        .when(open_band.copy(), _piece("piece_end"))
        .else_(add_days(band_after.copy(), -1))
    )
    columns = [_piece(c) for c in carried]
    columns.append(exp.column("label", "b").as_(label))
    if lower is not None:
        columns.append(exp.cast(low_years.copy(), "INT").as_(lower))
    columns += [
        exp.func("GREATEST", _piece("piece_start"), band_start.copy()).as_("piece_start"),
        exp.func("LEAST", _piece("piece_end"), new_end).as_("piece_end"),
    ]
    meets = exp.and_(
        band_start.copy() <= _piece("piece_end"),
        exp.or_(open_band.copy(), band_after.copy() > _piece("piece_start")),
    )
    query = (
        exp.select(*columns)
        .from_(source)
        .join(_bands_table("b", bands), join_type="cross")
        .where(meets)
    )
    added = [label] + ([lower] if lower is not None else [])
    return query, carried + added


def _split_by_years(source: exp.Expression, carried: list[str]) -> tuple[exp.Select, list[str]]:
    """Split each piece at 1 January: one row per calendar year the piece touches."""
    years = exp.select(
        *(_piece(c) for c in carried),
        _piece("piece_start"),
        _piece("piece_end"),
        # DuckDB's UNNEST in a select list, Spark's EXPLODE: one row per element.
        exp.Explode(
            this=exp.GenerateSeries(
                start=exp.Year(this=_piece("piece_start")),
                end=exp.Year(this=_piece("piece_end")),
            )
        ).as_("calendar_year"),
    ).from_(source)
    year = exp.column("calendar_year", "p")
    first = exp.func("MAKE_DATE", year.copy(), exp.Literal.number(1), exp.Literal.number(1))
    last = exp.func("MAKE_DATE", year.copy(), exp.Literal.number(12), exp.Literal.number(31))
    query = exp.select(
        *(_piece(c) for c in carried),
        exp.cast(year.copy(), "INT").as_("calendar_year"),
        exp.func("GREATEST", _piece("piece_start"), first).as_("piece_start"),
        exp.func("LEAST", _piece("piece_end"), last).as_("piece_end"),
    ).from_(years.subquery("p"))
    return query, [*carried, "calendar_year"]


def _outcome_cells(name: str) -> list[exp.Expression]:
    """``days_at_risk_X`` and ``events_X`` of one cell (both NULL when not at risk of X)."""
    columns = names.outcome_columns(name)
    days_at_risk, events_in = names.persontime_columns(name)
    onset = exp.column(columns.onset, "p")
    start, end = _piece("piece_start"), _piece("piece_end")
    at_risk = exp.column(columns.at_risk, "p")
    days = exp.Add(this=days_between(start.copy(), end.copy()), expression=exp.Literal.number(1))
    risk = (
        exp.Case()
        .when(exp.not_(at_risk.copy()), exp.null())
        .when(exp.or_(onset.copy().is_(exp.null()), onset.copy() > end.copy()), days)
        .when(onset.copy() < start.copy(), exp.Literal.number(0))
        .else_(
            exp.Add(this=days_between(start.copy(), onset.copy()), expression=exp.Literal.number(1))
        )
    )
    events = (
        exp.Case()
        .when(exp.not_(at_risk.copy()), exp.null())
        .when(onset.copy().between(start.copy(), end.copy()), exp.Literal.number(1))
        .else_(exp.Literal.number(0))
    )
    return [
        exp.cast(risk, "INT").as_(days_at_risk),
        exp.cast(events, "TINYINT").as_(events_in),
    ]


def _spans_query(ctx: CompileContext) -> exp.Query:
    """Each cohort patient's follow-up days as one span, with each outcome's incident onset."""
    columns = [names.outcome_columns(o.condition) for o in ctx.outcomes]
    cohort = exp.column
    return (
        exp.select(
            cohort("patient_id", "c"),
            cohort("birth_date", "e"),
            cohort("index_date", "c"),
            add_days(cohort("index_date", "c"), 1).as_("piece_start"),
            cohort("followup_end", "c").as_("piece_end"),
            *(cohort(c.at_risk, "c").as_(c.at_risk) for c in columns),
            *(
                exp.Case().when(cohort(c.incident, "c"), cohort(c.onset, "c")).as_(c.onset)
                for c in columns
            ),
        )
        .from_(exp.to_table(names.COHORT).as_("c"))
        .join(exp.to_table(names.ELIGIBILITY).as_("e"), on="e.patient_id = c.patient_id")
        .where(cohort("followup_end", "c") > cohort("index_date", "c"))
    )


def cells_query(outcomes: list[str], option: PersonTime) -> exp.Query:
    """The ``persontime`` stage's query for the named outcomes: it reads ``persontime_spans``.

    One row per patient and cell, from a span per patient (``piece_start``, ``piece_end``,
    ``birth_date``, ``index_date``, ``at_risk_X`` and the incident ``onset_X``).
    """
    columns = [names.outcome_columns(n) for n in outcomes]
    carried = [*_CARRIED, *(c.at_risk for c in columns), *(c.onset for c in columns)]
    source: exp.Expression = exp.to_table(names.PERSONTIME_SPANS).as_("p")
    query, carried = _split_by_bands(
        source,
        carried,
        bands=option.age_labelled,
        origin="birth_date",
        label="age_band",
        lower="age_band_start",
    )
    if option.since_index_years is not None:
        query, carried = _split_by_bands(
            query.subquery("p"),
            carried,
            bands=option.since_labelled,
            origin="index_date",
            label="since_index_band",
            lower=None,
        )
    if option.calendar_year:
        query, carried = _split_by_years(query.subquery("p"), carried)
    start, end = _piece("piece_start"), _piece("piece_end")
    days = exp.Add(this=days_between(start.copy(), end.copy()), expression=exp.Literal.number(1))
    labels = [
        c
        for c in ("age_band", "age_band_start", "calendar_year", "since_index_band")
        if c in carried
    ]
    return exp.select(
        _piece("patient_id"),
        *(_piece(c) for c in labels),
        start.copy().as_("cell_start"),
        end.copy().as_("cell_end"),
        exp.cast(days, "INT").as_("days"),
        *(column for n in outcomes for column in _outcome_cells(n)),
    ).from_(query.subquery("p"))


def _outcome_sums(outcome: str) -> tuple[exp.Expression, ...]:
    """A patient's days at risk, events and marked cells of one outcome, over their cells."""
    days_at_risk, events_in = names.persontime_columns(outcome)
    return (
        exp.func("SUM", exp.column(days_at_risk)).as_(f"risk_{outcome}"),
        exp.func("SUM", exp.column(events_in)).as_(events_in),
        exp.Add(
            this=exp.func("COUNT", exp.column(days_at_risk)),
            expression=exp.func("COUNT", exp.column(events_in)),
        ).as_(f"marked_{outcome}"),
    )


def _accounting_query(ctx: CompileContext) -> exp.Query:
    """Cohort patients whose cells do not add up, with the first quantity that differs."""
    outcomes = [o.condition for o in ctx.outcomes]
    sums = (
        exp.select(
            "patient_id",
            exp.func("SUM", exp.column("days")).as_("days"),
            exp.func("MIN", exp.column("cell_start")).as_("first_day"),
            exp.func("MAX", exp.column("cell_end")).as_("last_day"),
            *(part for n in outcomes for part in _outcome_sums(n)),
        )
        .from_(names.PERSONTIME)
        .group_by("patient_id")
    )

    def total(column: str) -> exp.Expression:
        return exp.func("COALESCE", exp.column(column, "s"), exp.Literal.number(0))

    first, last = exp.column("first_day", "s"), exp.column("last_day", "s")
    differences: list[tuple[exp.Expression, str]] = [
        (total("days").neq(exp.column("followup_days", "c")), "days <> followup_days"),
        (
            exp.or_(
                first.neq(add_days(exp.column("index_date", "c"), 1)),
                last.neq(exp.column("followup_end", "c")),
            ),
            "cells do not run from index + 1 to followup_end",
        ),
    ]
    for n in outcomes:
        columns = names.outcome_columns(n)
        at_risk = exp.column(columns.at_risk, "c")
        incident = exp.Case().when(exp.column(columns.incident, "c"), 1).else_(0)
        days_at_risk, events_in = names.persontime_columns(n)
        differences += [
            (
                exp.and_(at_risk.copy(), total(f"risk_{n}").neq(exp.column(columns.time, "c"))),
                f"{days_at_risk} <> {columns.time}",
            ),
            (
                exp.and_(at_risk.copy(), total(events_in).neq(incident)),
                f"{events_in} <> {columns.incident}",
            ),
            (
                exp.and_(exp.not_(at_risk.copy()), total(f"marked_{n}") > 0),
                f"values for {n} where not at risk",
            ),
        ]
    reason = exp.Case()
    for condition, text in differences:
        reason = reason.when(condition.copy(), value(text))
    return (
        exp.select(exp.column("patient_id", "c"), reason.as_("difference"))
        .from_(exp.to_table(names.COHORT).as_("c"))
        .join(sums.subquery("s"), on="s.patient_id = c.patient_id", join_type="left")
        .where(exp.or_(*(condition for condition, _ in differences)))
        .order_by(exp.column("patient_id", "c"))
        .limit(5)
    )


def persontime_stages(ctx: CompileContext) -> tuple[Stage, ...]:
    """The spans, the cells and their accounting check; nothing without ``persontime:``."""
    option = ctx.study.persontime
    if option is None:
        return ()
    return (
        Stage(
            names.PERSONTIME_SPANS,
            _spans_query(ctx),
            "each cohort patient's follow-up days (index + 1 to followup_end) and incident onsets",
            kind="view",
        ),
        Stage(
            names.PERSONTIME,
            cells_query([o.condition for o in ctx.outcomes], option),
            "follow-up split at age bands, calendar years and time since index, with days at "
            "risk and events per outcome",
        ),
        Stage(
            names.PERSONTIME_ACCOUNTING,
            _accounting_query(ctx),
            "every patient's cells add up to followup_days, time_X and incident_X",
            kind="check",
            failure=(
                "person-time does not add up to the cohort's follow-up (a defect of the tool, "
                "not of the data; please report it with the study)"
            ),
        ),
    )


def persontime_docs(ctx: CompileContext) -> tuple[ColumnDoc, ...]:
    """The data dictionary of ``persontime.parquet``, every column in file order."""
    option = ctx.study.persontime
    if option is None:
        return ()
    ages = ", ".join(label for _, _, label in option.age_labelled)
    days_rule = "each follow-up day (index + 1 to followup_end) counted once"
    docs = [
        ColumnDoc(
            "patient_id",
            "same as cohort.parquet",
            "",
            "the patient",
            "from cohort.parquet",
            "extract",
        ),
        ColumnDoc(
            "age_band",
            "VARCHAR",
            "years",
            f"age band of the cell's days ({ages})",
            "age in whole years completed on each day, as age_at_index; the band of age A "
            "starts on the A-th birthday (29 February: 1 March in years without it; birth "
            "year only: born 1 July)",
            "patients",
        ),
        ColumnDoc(
            "age_band_start",
            "INTEGER",
            "years",
            "lower bound of the age band",
            "from persontime.age_bands",
            "study",
        ),
    ]
    if option.calendar_year:
        docs.append(
            ColumnDoc(
                "calendar_year",
                "INTEGER",
                "year",
                "calendar year of the cell's days",
                "split at 1 January",
                "study",
            )
        )
    if option.since_index_years is not None:
        bands = ", ".join(label for _, _, label in option.since_labelled)
        docs.append(
            ColumnDoc(
                "since_index_band",
                "VARCHAR",
                "years",
                f"whole years completed since index on the cell's days ({bands})",
                "split at index anniversaries (29 February: 1 March in years without it)",
                "study",
            )
        )
    docs += [
        ColumnDoc("cell_start", "DATE", "", "first follow-up day of the cell", days_rule, "cohort"),
        ColumnDoc(
            "cell_end", "DATE", "", "last follow-up day of the cell (included)", days_rule, "cohort"
        ),
        ColumnDoc(
            "days",
            "INTEGER",
            "days",
            "follow-up days in the cell",
            "cell_end - cell_start + 1; over a patient's cells they add up to followup_days "
            "(checked on every build); person-years = days / 365.25",
            "cohort",
        ),
    ]
    for outcome in ctx.outcomes:
        n = outcome.condition
        columns = names.outcome_columns(n)
        days_at_risk, events_in = names.persontime_columns(n)
        docs += [
            ColumnDoc(
                days_at_risk,
                "INTEGER",
                "days",
                f"days of the cell at risk of {n}",
                f"the cell's days up to and including the onset of an incident case, 0 after "
                f"it; empty when not at risk ({columns.at_risk} false); over a patient's cells "
                f"they add up to {columns.time} (checked on every build)",
                "cohort",
            ),
            ColumnDoc(
                events_in,
                "TINYINT",
                "patients",
                f"1 in the cell holding the onset of incident {n}",
                f"1 when {columns.onset} of an incident case falls in the cell, else 0; empty "
                f"when not at risk; over a patient's cells they add up to {columns.incident} "
                "(checked on every build)",
                "cohort",
            ),
        ]
    return tuple(docs)
