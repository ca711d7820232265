"""Local codes: a site's own product and lab test codes, read through tables the user supplies.

A practice system often records prescriptions by its own product code rather than ATC, and
lab results by a local test code rather than a measure's name. The study names two CSV tables
beside ``extract:`` (they describe the extract the study reads, and the compiler needs them
when the plan is made, so they belong to the study, not to the engine's site mapping):

```yaml
local_codes:
  products: local/products_atc.csv   # columns local_code, atc (others are yours)
  lab_tests: local/lab_tests.csv     # columns local_code and loinc or measure
```

A prescription whose ``atc`` column holds a product code of the table is judged as that ATC
code, so ATC-based drug evidence counts it. A measurement whose ``measure`` column holds a lab
code of the table is judged as the measure it names: directly (``measure``) or through a LOINC
code that one measure file lists (``codes: {LOINC: [...]}``). Local codes are compared as
written, spaces around removed, case kept. Every bad row is a problem at its file and line with
a stable code (``missing-key``, ``bad-row``, ``code-shape``, ``duplicate-code``,
``unknown-code``, ``unknown-measure``); the build refuses them all at once (exit 2).
"""

from __future__ import annotations

import csv
import io
import re
from dataclasses import dataclass
from pathlib import Path

from pipeline.codes import check_code, normalise_code
from pipeline.config._base import Model
from pipeline.config._yaml import LocatedDocument
from pipeline.errors import ConfigError, Problem
from pipeline.measures import MeasureRegistry

_LOINC = re.compile(r"^[0-9]{1,7}-[0-9]$")


class LocalCodeTables(Model):
    """The study's ``local_codes:`` key: tables relative to the study file.

    Attributes:
        products: Local product codes and the ATC code each stands for.
        lab_tests: Local lab test codes and the LOINC code or measure each stands for.
    """

    products: Path | None = None
    lab_tests: Path | None = None


@dataclass(frozen=True)
class LocalCodes:
    """The checked tables, as the compiler reads them.

    Attributes:
        products: (local code, normalised ATC code), sorted.
        lab_tests: (local code, measure name), sorted.
        files: The tables read (for the manifest).
    """

    products: tuple[tuple[str, str], ...] = ()
    lab_tests: tuple[tuple[str, str], ...] = ()
    files: tuple[Path, ...] = ()


def _rows(file: Path, needed: tuple[str, ...]) -> tuple[list[str], list[tuple[int, list[str]]]]:
    """The header (trimmed, lower case) and the non-blank rows with their lines."""
    try:
        text = file.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as err:
        raise ConfigError([Problem(file, 0, 0, "unreadable", f"cannot read: {err}")]) from err
    reader = csv.reader(io.StringIO(text, newline=""), strict=True)
    try:
        rows = [(reader.line_num, row) for row in reader]
    except csv.Error as err:
        raise ConfigError(
            [Problem(file, reader.line_num, 0, "unreadable", f"not valid CSV: {err}")]
        ) from err
    columns = [c.strip().lower() for c in rows[0][1]] if rows else []
    missing = [c for c in needed if c not in columns]
    if missing:
        raise ConfigError(
            [Problem(file, 1, 0, "missing-key", f"the header lacks column {', '.join(missing)}")]
        )
    return columns, [(n, r) for n, r in rows[1:] if any(f.strip() for f in r)]


def _pairs(
    file: Path, target: str, judged: list[tuple[int, str, str | Problem]]
) -> tuple[tuple[str, str], ...]:
    """(local code, target) pairs, refusing a local code given twice with two targets."""
    problems = [t for _, _, t in judged if isinstance(t, Problem)]
    first: dict[str, tuple[int, str]] = {}
    for line, local, found in judged:
        if isinstance(found, Problem):
            continue
        earlier = first.setdefault(local, (line, found))
        if earlier[1] != found:
            problems.append(
                Problem(
                    file,
                    line,
                    0,
                    "duplicate-code",
                    f"local code '{local}' is mapped again, to {target} '{found}' (line "
                    f"{earlier[0]} maps it to '{earlier[1]}')",
                )
            )
    if problems:
        raise ConfigError(problems)
    return tuple(sorted((local, found) for local, (_, found) in first.items()))


def _fields(file: Path, line: int, columns: list[str], row: list[str]) -> dict[str, str] | Problem:
    if len(row) != len(columns):
        return Problem(
            file, line, 0, "bad-row", f"expected {len(columns)} fields, found {len(row)}"
        )
    values = {c: v.strip() for c, v in zip(columns, row, strict=True)}
    if not values["local_code"]:
        return Problem(file, line, 0, "bad-row", "the row has no local_code")
    return values


def read_products(file: Path) -> tuple[tuple[str, str], ...]:
    """A product table: each local product code and the ATC code it stands for.

    Raises:
        ConfigError: Every bad row, at its line.
    """
    columns, rows = _rows(file, ("local_code", "atc"))
    judged: list[tuple[int, str, str | Problem]] = []
    for line, row in rows:
        values = _fields(file, line, columns, row)
        if isinstance(values, Problem):
            judged.append((line, "", values))
            continue
        try:
            atc = normalise_code(check_code("ATC", values["atc"]))
        except ValueError as err:
            judged.append((line, "", Problem(file, line, 0, "code-shape", str(err))))
            continue
        judged.append((line, values["local_code"], atc))
    return _pairs(file, "ATC", judged)


def _lab_target(
    file: Path, line: int, values: dict[str, str], registry: MeasureRegistry
) -> str | Problem:
    loinc, measure = values.get("loinc", ""), values.get("measure", "")
    if bool(loinc) == bool(measure):
        return Problem(file, line, 0, "bad-row", "give either loinc or measure, not both or none")
    if measure:
        if measure not in registry.measures:
            return Problem(file, line, 0, "unknown-measure", f"no measure is called '{measure}'")
        return measure
    if not _LOINC.match(loinc):
        return Problem(file, line, 0, "code-shape", f"'{loinc}' is not a LOINC code (e.g. 4548-4)")
    named = sorted(name for name, m in registry.measures.items() if ("LOINC", loinc) in m.codes)
    if len(named) != 1:
        which = "no measure file lists" if not named else f"{', '.join(named)} all list"
        return Problem(file, line, 0, "unknown-code", f"{which} LOINC code '{loinc}'")
    return named[0]


def read_lab_tests(file: Path, registry: MeasureRegistry) -> tuple[tuple[str, str], ...]:
    """A lab test table: each local lab code and the measure it names (directly or by LOINC).

    Raises:
        ConfigError: Every bad row, at its line.
    """
    columns, rows = _rows(file, ("local_code",))
    if "loinc" not in columns and "measure" not in columns:
        raise ConfigError(
            [Problem(file, 1, 0, "missing-key", "the header lacks column loinc or measure")]
        )
    judged: list[tuple[int, str, str | Problem]] = []
    for line, row in rows:
        values = _fields(file, line, columns, row)
        if isinstance(values, Problem):
            judged.append((line, "", values))
            continue
        judged.append((line, values["local_code"], _lab_target(file, line, values, registry)))
    return _pairs(file, "measure", judged)


def load_local_codes(
    doc: LocatedDocument, tables: LocalCodeTables | None, registry: MeasureRegistry
) -> LocalCodes:
    """Read the tables a study's ``local_codes:`` names (relative to the study file).

    Raises:
        ConfigError: A table cannot be read (named at the study's line), or its bad rows.
    """
    if tables is None:
        return LocalCodes()
    problems: list[Problem] = []
    products: tuple[tuple[str, str], ...] = ()
    lab_tests: tuple[tuple[str, str], ...] = ()
    files = []
    for key, written in (("products", tables.products), ("lab_tests", tables.lab_tests)):
        if written is None:
            continue
        file = (doc.file.parent / written).resolve()
        files.append(file)
        try:
            if key == "products":
                products = read_products(file)
            else:
                lab_tests = read_lab_tests(file, registry)
        except ConfigError as err:
            problems += [
                doc.problem(("local_codes", key), p.code, p.message, at_value=True)
                if p.line == 0
                else p
                for p in err.problems
            ]
    if problems:
        raise ConfigError(problems)
    return LocalCodes(products, lab_tests, tuple(files))
