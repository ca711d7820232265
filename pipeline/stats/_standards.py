"""Standard populations for direct standardisation: the shipped ones, a user's file, band maps.

A standard population is a small CSV file: ``# key: value`` lines first, saying what it is and
where its figures come from, then the header ``age_start,age_end,weight`` and one line per
age band (whole years, both ends included; the last band may leave ``age_end`` empty: "95 and
over"). The keys are ``standard`` (its name), ``source`` (the publication), ``figures`` (how
the figures were obtained: copied from the publication, or "from memory"), ``stated_total``
(the total the publication gives) and optionally ``note``. Bands must follow each other
without gap or overlap. Two are shipped with the package (``standards/``): the European
Standard Population 2013 (``esp2013``) and the WHO World Standard Population 2000-2025
(``who2000_2025``); their figures are checked against their stated totals by the tests.

This module reads files (the shipped ones and a user's), unlike the rest of
:mod:`pipeline.stats`; the arithmetic on them (:func:`weights_for_bands`) is pure. A bad line
of a user's file is reported with its file and line, like every configuration error.

The study's age bands (``"40-49"``, ``"80+"``) rarely match a standard's five-year bands one to
one. Each study band must be a union of whole standard bands; its weight is their sum. A study
band that cuts a standard band is refused, naming both, because splitting a standard band's
weight would need an assumption about ages within it. Standard bands outside every study band
are left out: the rate is standardised over the study's ages only (the weights are used as
shares of the bands that remain).
"""

from __future__ import annotations

import csv
import re
from collections.abc import Sequence
from dataclasses import dataclass
from importlib import resources
from pathlib import Path

from pipeline.errors import AscertainError, ConfigError, Problem

__all__ = [
    "SHIPPED_STANDARDS",
    "StandardPopulation",
    "parse_age_band",
    "read_standard_population",
    "shipped_standard",
    "weights_for_bands",
]

SHIPPED_STANDARDS = {
    "esp2013": "esp2013.csv",
    "who2000_2025": "who2000_2025.csv",
}
"""Names of the shipped standard populations and their files in ``pipeline/stats/standards``."""

_HEADER = "age_start,age_end,weight"
_KEYS = ("standard", "source", "figures", "stated_total", "note")
_REQUIRED = ("standard", "source", "figures", "stated_total")
_BAND = re.compile(r"^\s*(\d+)\s*(?:-\s*(\d+)|(\+))\s*$")

Band = tuple[int, int | None]
"""An age band: first and last year of age, both included; ``None`` for an open last band."""


@dataclass(frozen=True)
class StandardPopulation:
    """A standard population by age band, with where its figures come from.

    Attributes:
        name: What it is, e.g. "European Standard Population 2013".
        source: The publication it comes from.
        figures: How the figures were obtained (copied, checked, or "from memory").
        stated_total: The total the publication states.
        bands: Age bands in order.
        weights: The population of each band.
        file: The file it was read from (a file name for shipped standards).
        note: Anything else a reader must know (e.g. figures that do not add up).
    """

    name: str
    source: str
    figures: str
    stated_total: float
    bands: tuple[Band, ...]
    weights: tuple[float, ...]
    file: str
    note: str = ""

    @property
    def listed_total(self) -> float:
        """The sum of the listed figures (may differ from ``stated_total``; see ``note``)."""
        return float(sum(self.weights))


def _problem(file: Path, line: int, message: str, code: str = "bad-standard") -> Problem:
    return Problem(file, line, 0, code, message)


def _header(lines: list[str], file: Path) -> tuple[dict[str, str], int, list[Problem]]:
    """The ``# key: value`` lines: the keys and the index of the first other line."""
    keys: dict[str, str] = {}
    problems: list[Problem] = []
    i = 0
    while i < len(lines) and lines[i].startswith("#"):
        key, sep, value = lines[i][1:].partition(":")
        key = key.strip()
        if not sep or key not in _KEYS:
            problems.append(
                _problem(
                    file,
                    i + 1,
                    f"'{lines[i].strip()}' is not a '# key: value' line with a key of "
                    f"{', '.join(_KEYS)}",
                    "unknown-key",
                )
            )
        elif key in keys:
            problems.append(_problem(file, i + 1, f"'{key}' is given twice", "duplicate-key"))
        else:
            keys[key] = value.strip()
        i += 1
    missing = [k for k in _REQUIRED if not keys.get(k)]
    if missing:
        problems.append(
            _problem(file, 1, f"the header lines must state {', '.join(missing)}", "missing-key")
        )
    return keys, i, problems


def _rows(
    lines: list[str], first: int, file: Path
) -> tuple[list[Band], list[float], list[Problem]]:
    """The band lines after the column header, each checked (line numbers are the file's)."""
    bands: list[Band] = []
    weights: list[float] = []
    problems: list[Problem] = []
    for offset, row in enumerate(csv.reader(lines[first:])):
        line = first + offset + 1
        if not row:
            continue
        if len(row) != 3:
            problems.append(_problem(file, line, f"expected 3 fields, found {len(row)}"))
            continue
        start, end, weight = (x.strip() for x in row)
        try:
            band: Band = (int(start), int(end) if end else None)
            value = float(weight)
        except ValueError:
            problems.append(
                _problem(file, line, f"'{','.join(row)}' is not two whole ages and a number")
            )
            continue
        if band[0] < 0 or (band[1] is not None and band[1] < band[0]) or not value >= 0:
            problems.append(_problem(file, line, f"band {start}-{end} or weight {weight} is bad"))
        elif bands and (bands[-1][1] is None or bands[-1][1] + 1 != band[0]):
            previous = bands[-1]
            problems.append(
                _problem(
                    file,
                    line,
                    f"band starting at {band[0]} does not follow the band "
                    f"{previous[0]}-{'' if previous[1] is None else previous[1]} "
                    "without gap or overlap",
                )
            )
        bands.append(band)
        weights.append(value)
    if not bands and not problems:
        problems.append(_problem(file, first, "no age bands"))
    return bands, weights, problems


def parse_standard_population(text: str, file: Path) -> StandardPopulation:
    """Read a standard population from its text (see the module docstring for the format).

    Raises:
        ConfigError: Every problem, each with the file and line.
    """
    lines = text.splitlines()
    keys, first, problems = _header(lines, file)
    if first >= len(lines) or lines[first].strip() != _HEADER:
        problems.append(
            _problem(file, first + 1, f"expected the column header '{_HEADER}'", "bad-header")
        )
        raise ConfigError(problems)
    bands, weights, row_problems = _rows(lines, first + 1, file)
    problems += row_problems
    total = keys.get("stated_total", "")
    try:
        stated = float(total.replace(",", "")) if total else 0.0
    except ValueError:
        stated = 0.0
        problems.append(_problem(file, 0, f"stated_total '{total}' is not a number"))
    if problems:
        raise ConfigError(problems)
    return StandardPopulation(
        name=keys["standard"],
        source=keys["source"],
        figures=keys["figures"],
        stated_total=stated,
        bands=tuple(bands),
        weights=tuple(weights),
        file=file.name,
        note=keys.get("note", ""),
    )


def read_standard_population(path: Path) -> StandardPopulation:
    """Read a user's standard population file.

    Raises:
        ConfigError: The file cannot be read, or has bad lines (each named by file and line).
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as err:
        raise ConfigError([_problem(path, 0, f"cannot read the file: {err}")]) from err
    return parse_standard_population(text, path)


def shipped_standard(name: str) -> StandardPopulation:
    """One of the standard populations shipped with the package, by name.

    Raises:
        AscertainError: The name is not one of :data:`SHIPPED_STANDARDS`.
    """
    if name not in SHIPPED_STANDARDS:
        raise AscertainError(
            f"no shipped standard population '{name}'; choose one of "
            f"{', '.join(sorted(SHIPPED_STANDARDS))}"
        )
    file = SHIPPED_STANDARDS[name]
    text = (resources.files("pipeline.stats") / "standards" / file).read_text(encoding="utf-8")
    return parse_standard_population(text, Path(file))


def parse_age_band(label: str) -> Band:
    """An age band label (``"40-49"``, ``"80+"``) as its first and last year of age.

    Raises:
        ValueError: The label is neither form.

    Examples:
        >>> parse_age_band("40-49"), parse_age_band("80+")
        ((40, 49), (80, None))
    """
    match = _BAND.match(label)
    if not match or (match[2] is not None and int(match[2]) < int(match[1])):
        raise ValueError(f"age band '{label}' is not of the form '40-49' or '80+'")
    return int(match[1]), None if match[3] else int(match[2])


def _label(band: Band) -> str:
    return f"{band[0]}+" if band[1] is None else f"{band[0]}-{band[1]}"


def weights_for_bands(standard: StandardPopulation, bands: Sequence[Band]) -> list[float]:
    """The standard's weight of each study band: the sum of the standard bands inside it.

    Args:
        standard: The standard population.
        bands: The study's age bands (need not be contiguous or ordered).

    Returns:
        One weight per study band, in the order given.

    Raises:
        AscertainError: A study band starts or ends inside a standard band, or lies outside
            the standard's ages; the message names both bands.

    Examples:
        >>> esp = shipped_standard("esp2013")
        >>> weights_for_bands(esp, [(40, 49), (80, None)])
        [14000.0, 5000.0]
    """
    out = []
    for band in bands:
        start, end = band
        total = 0.0
        starts = ends = False
        for (s, e), w in zip(standard.bands, standard.weights, strict=True):
            inside_end = end is None or (e is not None and e <= end)
            if s >= start and inside_end:
                total += w
                starts |= s == start
                ends |= e == end
            elif s <= (end if end is not None else s) and (e is None or e >= start):
                raise AscertainError(
                    f"the age band {_label(band)} cuts the band {_label((s, e))} of the "
                    f"standard population {standard.name} ({standard.file}); choose age bands "
                    "made of its whole bands"
                )
        if not starts or not ends:
            raise AscertainError(
                f"the age band {_label(band)} is not covered by the standard population "
                f"{standard.name} ({standard.file})"
            )
        out.append(total)
    return out
