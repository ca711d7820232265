"""A study's reference rate table (``persontime: reference_rates:``), for SMRs in the report.

The table holds the rates of each outcome in a reference population (a region, a registry), by
age band and optionally by sex and calendar year, per 1,000 person-years. The report compares
each outcome's observed events with those expected at these rates over the cohort's own
person-time (indirect standardisation). The file is CSV, with ``# key: value`` lines first that
say what it is and where its figures come from::

    # rates: Orvane Bay incidence 2014-2019
    # source: Orvane Bay regional registry annual report (fictional)
    # figures: copied from its tables 3 and 4
    outcome,sex,age_start,age_end,rate_per_1000_py
    heart_failure,F,40,59,0.6
    heart_failure,F,60,,4.1

Keys: ``rates`` (its name), ``source`` and ``figures`` (how the numbers were obtained) are
required, ``note`` is optional. Columns: ``outcome``, ``age_start``, ``age_end`` (empty for an
open last band: "60 and over") and ``rate_per_1000_py`` are required; ``sex`` and
``calendar_year`` are optional, and when present every line gives them (``sex`` is ``F`` or
``M``, in either case, as the study's sex step names them). Within one outcome, sex and year the
bands follow each other without gap or overlap. A table without ``sex`` gives each band's rate
for both sexes; the report's SMRs by sex then apply the same rates to each sex's person-time.

Every bad line is reported with the file, line and column, each with a stable code, and the
study is refused (nothing is built). Whether the table covers the study (every age band of the
study inside one band of the table, every sex and calendar year the cohort can have) is checked
by :func:`pipeline.config._reference_use.coverage_problems` when the study is loaded.
"""

from __future__ import annotations

import csv
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from itertools import pairwise
from pathlib import Path

from pipeline.errors import ConfigError, Problem

__all__ = [
    "SEXES",
    "RateBand",
    "ReferenceRates",
    "read_reference_rates",
    "stratum_label",
]

_KEYS = ("rates", "source", "figures", "note")
_REQUIRED_KEYS = ("rates", "source", "figures")
_COLUMNS = ("outcome", "sex", "calendar_year", "age_start", "age_end", "rate_per_1000_py")
_REQUIRED_COLUMNS = ("outcome", "age_start", "age_end", "rate_per_1000_py")

SEXES = ("F", "M")
"""The sexes a table by sex may name: those of the canonical extract and the study's sex step."""

Stratum = tuple[str, str | None, int | None]
"""(outcome, sex or None, calendar year or None): the rows that share one set of age bands."""


@dataclass(frozen=True)
class RateBand:
    """One line of the table: a band's rate in one stratum.

    Attributes:
        start: First year of age of the band.
        end: Last year of age (included), None for an open last band.
        rate: Events per 1,000 person-years.
        line: The line of the file it was read from.
    """

    start: int
    end: int | None
    rate: float
    line: int

    def holds(self, low: int, high: int | None) -> bool:
        """Whether the ages ``low`` to ``high`` (None: open) lie inside this band."""
        if low < self.start:
            return False
        if self.end is None:
            return True
        return high is not None and high <= self.end


@dataclass(frozen=True)
class ReferenceRates:
    """A reference rate table, read and checked.

    Attributes:
        name: What it is (``# rates:``).
        source: Where its figures come from.
        figures: How the figures were obtained.
        note: Anything else a reader must know.
        file: The file it was read from.
        by_sex: The table gives rates by sex.
        by_year: The table gives rates by calendar year.
        strata: Each stratum's bands, in age order.
    """

    name: str
    source: str
    figures: str
    note: str
    file: Path
    by_sex: bool
    by_year: bool
    strata: dict[Stratum, tuple[RateBand, ...]]

    @property
    def outcomes(self) -> list[str]:
        """The outcomes the table gives rates for, in the order of the file."""
        return list(dict.fromkeys(s[0] for s in self.strata))

    def rate(
        self, outcome: str, sex: str | None, year: int | None, band: tuple[int, int | None]
    ) -> RateBand | None:
        """The band of the table holding the ages ``band`` in a stratum, or None.

        Args:
            outcome: The outcome.
            sex: The sex (ignored unless the table is by sex).
            year: The calendar year (ignored unless the table is by year).
            band: A study age band: first and last year of age (None: open).
        """
        key = (outcome, sex if self.by_sex else None, year if self.by_year else None)
        return next((b for b in self.strata.get(key, ()) if b.holds(*band)), None)


def stratum_label(stratum: Stratum) -> str:
    """A stratum in words, for messages: ``heart_failure, sex F, 2016``."""
    outcome, sex, year = stratum
    return ", ".join([outcome, *([f"sex {sex}"] if sex else []), *([str(year)] if year else [])])


def _header(lines: list[str], file: Path) -> tuple[dict[str, str], int, list[Problem]]:
    keys: dict[str, str] = {}
    problems: list[Problem] = []
    i = 0
    while i < len(lines) and lines[i].startswith("#"):
        key, sep, value = lines[i][1:].partition(":")
        key = key.strip()
        if not sep or key not in _KEYS:
            problems.append(
                Problem(
                    file,
                    i + 1,
                    1,
                    "rates-unknown-key",
                    f"'{lines[i].strip()}' is not a '# key: value' line with a key of "
                    f"{', '.join(_KEYS)}",
                )
            )
        elif key in keys:
            problems.append(Problem(file, i + 1, 1, "rates-duplicate-key", f"'{key}' is twice"))
        else:
            keys[key] = value.strip()
        i += 1
    missing = [k for k in _REQUIRED_KEYS if not keys.get(k)]
    if missing:
        problems.append(
            Problem(
                file,
                1,
                1,
                "rates-missing-key",
                f"the '# key: value' lines must state {', '.join(missing)} (what the table is, "
                "its source, and how its figures were obtained)",
            )
        )
    return keys, i, problems


def _columns(header: list[str], file: Path, line: int) -> tuple[list[str], list[Problem]]:
    names = [h.strip() for h in header]
    problems = []
    for i, name in enumerate(names):
        if name not in _COLUMNS or names.index(name) != i:
            what = "is given twice" if name in _COLUMNS else f"is not one of {', '.join(_COLUMNS)}"
            problems.append(
                Problem(
                    file, line, _column(header, i), "rates-bad-header", f"column '{name}' {what}"
                )
            )
    missing = [c for c in _REQUIRED_COLUMNS if c not in names]
    if missing:
        problems.append(
            Problem(file, line, 1, "rates-bad-header", f"the header lacks {', '.join(missing)}")
        )
    return names, problems


def _column(row: Sequence[str], index: int) -> int:
    """The 1-based column where field ``index`` starts (exact for unquoted fields)."""
    return 1 + sum(len(f) + 1 for f in row[:index])


def _whole(text: str) -> int:
    if not text.isdigit():
        raise ValueError
    return int(text)


def _year(text: str) -> int | None:
    try:
        year = _whole(text)
    except ValueError:
        return None
    return year if 1800 <= year <= 2200 else None


def _ages(
    values: dict[str, str], bad: Callable[[str, str], Problem]
) -> tuple[int, int | None] | Problem:
    """A line's first and last year of age (None: an open last band), or the problem."""
    try:
        start = _whole(values["age_start"])
    except ValueError:
        return bad("age_start", "is not a whole age in years")
    if not values["age_end"]:
        return start, None
    try:
        end = _whole(values["age_end"])
    except ValueError:
        return bad("age_end", "is not a whole age in years (empty for an open last band)")
    if end < start:
        return bad("age_end", f"is below age_start {start}")
    return start, end


def _parse_row(
    row: list[str], names: list[str], file: Path, line: int
) -> tuple[Stratum, RateBand] | Problem:
    """One line as its stratum and band, or the problem with it."""
    if len(row) != len(names):
        return Problem(
            file, line, 1, "rates-bad-row", f"expected {len(names)} fields, found {len(row)}"
        )
    values = {n: v.strip() for n, v in zip(names, row, strict=True)}

    def bad(column: str, why: str) -> Problem:
        at = _column(row, names.index(column))
        return Problem(file, line, at, "rates-bad-row", f"{column} '{values[column]}' {why}")

    if not values["outcome"]:
        return bad("outcome", "is empty")
    if "sex" in values and not values["sex"]:
        return bad("sex", "is empty; every line of a table by sex gives it")
    if "sex" in values and values["sex"].upper() not in SEXES:
        return bad("sex", f"is not one of {', '.join(SEXES)} (the sexes of the extract)")
    ages = _ages(values, bad)
    if isinstance(ages, Problem):
        return ages
    year = None
    if "calendar_year" in values:
        year = _year(values["calendar_year"])
        if year is None:
            return bad("calendar_year", "is not a plausible calendar year")
    try:
        rate = float(values["rate_per_1000_py"])
    except ValueError:
        rate = math.nan
    if not (math.isfinite(rate) and rate >= 0):
        return bad("rate_per_1000_py", "is not a rate of 0 or more")
    sex = values["sex"].upper() if "sex" in values else None
    return (values["outcome"], sex, year), RateBand(*ages, rate, line)


def _ordered(stratum: Stratum, bands: list[RateBand], file: Path) -> list[Problem]:
    """Problems of a stratum whose bands leave a gap, overlap or repeat."""
    problems = []
    bands.sort(key=lambda b: (b.start, b.line))
    for previous, band in pairwise(bands):
        if previous.end is None or previous.end + 1 != band.start:
            code = "rates-duplicate" if previous.start == band.start else "rates-band-gap"
            upper = "" if previous.end is None else previous.end
            problems.append(
                Problem(
                    file,
                    band.line,
                    1,
                    code,
                    f"the band starting at {band.start} ({stratum_label(stratum)}) does not "
                    f"follow the band {previous.start}-{upper} of line {previous.line} without "
                    "gap or overlap",
                )
            )
    return problems


def parse_reference_rates(text: str, file: Path) -> ReferenceRates:
    """Read a reference rate table from its text (the format is in the module docstring).

    Raises:
        ConfigError: Every problem, each with the file, line and column.
    """
    lines = text.splitlines()
    keys, first, problems = _header(lines, file)
    if first >= len(lines):
        problems.append(Problem(file, first + 1, 1, "rates-bad-header", "no column header"))
        raise ConfigError(problems)
    header = next(csv.reader([lines[first]]))
    names, header_problems = _columns(header, file, first + 1)
    if header_problems:
        raise ConfigError(problems + header_problems)
    strata: dict[Stratum, list[RateBand]] = {}
    for offset, row in enumerate(csv.reader(lines[first + 1 :])):
        if not row or not "".join(row).strip():
            continue
        parsed = _parse_row(row, names, file, first + 2 + offset)
        if isinstance(parsed, Problem):
            problems.append(parsed)
            continue
        stratum, band = parsed
        strata.setdefault(stratum, []).append(band)
    for stratum, bands in strata.items():
        problems += _ordered(stratum, bands, file)
    if not strata and not problems:
        problems.append(Problem(file, first + 1, 1, "rates-bad-row", "the table has no rates"))
    if problems:
        raise ConfigError(problems)
    return ReferenceRates(
        name=keys["rates"],
        source=keys["source"],
        figures=keys["figures"],
        note=keys.get("note", ""),
        file=file,
        by_sex="sex" in names,
        by_year="calendar_year" in names,
        strata={s: tuple(b) for s, b in strata.items()},
    )


def read_reference_rates(path: Path) -> ReferenceRates:
    """Read a reference rate table file.

    Raises:
        ConfigError: The file cannot be read, or has bad lines (each named by file and line).
    """
    try:
        text = Path(path).read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as err:
        raise ConfigError([Problem(Path(path), 0, 0, "rates-unreadable", f"{err}")]) from err
    return parse_reference_rates(text, Path(path))
