"""Read NDJSON lines as resources, and the small SQL helpers the FHIR builders share.

Each file is read as lines of text (DuckDB's CSV reader with one column, no quoting and a
delimiter no JSON line holds), numbered in file order, and each line is parsed once into the
fields a builder reads (``json_transform`` with an explicit structure, so nothing depends on
type detection and a field of an unexpected JSON type is NULL or its JSON text). A line that
is not a JSON object, or whose ``resourceType`` is not the one its file holds, is kept as a row
with a ``line_problem`` so the quality log counts it with its file and line; blank lines are
not resources and are skipped. Reading lines as text is what makes this possible: DuckDB's
JSON reader fails the whole file on one malformed line.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Mapping, Sequence
from functools import lru_cache
from pathlib import Path

import sqlglot
from sqlglot import exp

from pipeline.extract.readers.fhir._codes import STATUS_SET_ASIDE
from pipeline.extract.schema import POSITION_BASE

# The fields read from each resource type, and the DuckDB type each is read as.
READ_COLUMNS: dict[str, dict[str, str]] = {
    "Patient": {
        "id": "VARCHAR",
        "birthDate": "VARCHAR",
        "gender": "VARCHAR",
        "deceasedDateTime": "VARCHAR",
        "managingOrganization": "JSON",
    },
    "Encounter": {"status": "VARCHAR", "subject": "JSON", "period": "JSON", "class": "JSON"},
    "Condition": {
        "verificationStatus": "JSON",
        "subject": "JSON",
        "onsetDateTime": "VARCHAR",
        "onsetPeriod": "JSON",
        "recordedDate": "VARCHAR",
        "code": "JSON",
        "category": "JSON",
    },
    "MedicationRequest": {
        "status": "VARCHAR",
        "subject": "JSON",
        "authoredOn": "VARCHAR",
        "dosageInstruction": "JSON",
        "dispenseRequest": "JSON",
        "medicationCodeableConcept": "JSON",
        "medicationReference": "JSON",
        "contained": "JSON",
    },
    "MedicationStatement": {
        "status": "VARCHAR",
        "subject": "JSON",
        "effectiveDateTime": "VARCHAR",
        "effectivePeriod": "JSON",
        "medicationCodeableConcept": "JSON",
        "medicationReference": "JSON",
        "contained": "JSON",
    },
    "Medication": {"id": "VARCHAR", "code": "JSON"},
    "Observation": {
        "status": "VARCHAR",
        "subject": "JSON",
        "effectiveDateTime": "VARCHAR",
        "effectivePeriod": "JSON",
        "effectiveInstant": "VARCHAR",
        "issued": "VARCHAR",
        "code": "JSON",
        "valueQuantity": "JSON",
        "valueInteger": "VARCHAR",
        "valueString": "VARCHAR",
        "valueCodeableConcept": "JSON",
        "component": "JSON",
    },
}

# A JSON line holds no raw control character (JSON escapes them), so this delimiter never
# splits a well-formed line; a line that holds one is malformed whatever is done with it.
_NO_DELIMITER = "\x01"
# Bundles and large resources make long lines; DuckDB's default maximum is 2 MB.
_MAX_LINE_BYTES = 256 * 1024 * 1024

YEAR = "^[0-9]{4}$"
_FULL_DATE = "^[0-9]{4}-[0-9]{2}-[0-9]{2}"
_YEAR_MONTH = "^[0-9]{4}-[0-9]{2}$"


def _lines(index: int, path: Path) -> exp.Select:
    """One file's lines as text with their position (file index * POSITION_BASE + line)."""
    text = exp.Literal.string
    options = {
        "columns": exp.Struct(
            expressions=[exp.PropertyEQ(this=text("line"), expression=text("VARCHAR"))]
        ),
        "header": exp.false(),
        "auto_detect": exp.false(),
        "delim": text(_NO_DELIMITER),
        "quote": text(""),
        "escape": text(""),
        "strict_mode": exp.false(),
        "encoding": text("utf-8"),
        "max_line_size": exp.Literal.number(_MAX_LINE_BYTES),
    }
    read = exp.func(
        "read_csv",
        exp.Array(expressions=[text(str(path))]),
        *(exp.PropertyEQ(this=exp.var(k), expression=v) for k, v in options.items()),
    )
    number = exp.Window(this=exp.func("ROW_NUMBER"))
    position = exp.Add(this=exp.Literal.number(index * POSITION_BASE), expression=number)
    return exp.select(position.as_("source_position"), exp.column("line")).from_(
        exp.Table(this=read)
    )


_PARSED = """
SELECT
  source_position,
  CASE
    WHEN resource IS NULL THEN 'malformed line'
    WHEN STRUCT_EXTRACT(resource, 'resourceType') IS DISTINCT FROM :resource_type
      THEN 'other resource type'
  END AS line_problem,
  resource
FROM (
  SELECT
    source_position,
    CASE
      WHEN CASE WHEN json_valid(line) THEN json_type(line) END = 'OBJECT'
        THEN json_transform(line, :structure)
    END AS resource
  FROM :lines
  WHERE NULLIF(TRIM(line), '') IS NOT NULL
) AS parsed
"""


def resources(resource_type: str, files: Sequence[tuple[int, Path]]) -> exp.Expression:
    """The lines of one resource type's files as a relation ``r``: position, problem, fields.

    ``files`` pairs each file with its index in the table's file list, so that positions name
    the right file. With no file the relation is empty.
    """
    columns = READ_COLUMNS[resource_type]
    fields = [
        exp.func("STRUCT_EXTRACT", exp.column("resource"), exp.Literal.string(name)).as_(
            name, quoted=True
        )
        for name in columns
    ]
    if not files:
        empty = exp.select(
            exp.cast(exp.null(), "BIGINT").as_("source_position"),
            exp.cast(exp.null(), "VARCHAR").as_("line_problem"),
            *(exp.cast(exp.null(), kind).as_(name, quoted=True) for name, kind in columns.items()),
        ).where(exp.false())
        return empty.subquery("r")
    parts = [_lines(index, path) for index, path in files]
    union: exp.Query = parts[0]
    for part in parts[1:]:
        union = union.union(part, distinct=False)
    structure = json.dumps({"resourceType": "VARCHAR", **columns}, separators=(",", ":"))
    parsed = fill(
        _PARSED,
        resource_type=exp.Literal.string(resource_type),
        structure=exp.Literal.string(structure),
        lines=union.subquery("lines"),
    )
    rows = exp.select(exp.column("source_position"), exp.column("line_problem"), *fields).from_(
        parsed.subquery("p")
    )
    return rows.subquery("r")


def _fhir_date(text: exp.Expression, year_only: exp.Expression | None = None) -> exp.Expression:
    """A FHIR date/dateTime/instant as ``YYYY-MM-DD`` text; other text is passed on as is.

    A year-month takes the 15th. A year alone takes 1 July when the second argument is TRUE
    (a death date) and is passed on as it is otherwise (events set it aside).
    """
    value = exp.Trim(this=text)

    def matches(pattern: str) -> exp.Expression:
        return exp.func("REGEXP_MATCHES", value.copy(), exp.Literal.string(pattern))

    case = exp.Case()
    if isinstance(year_only, exp.Boolean) and year_only.this:
        case = case.when(
            matches(YEAR), exp.DPipe(this=value.copy(), expression=exp.Literal.string("-07-01"))
        )
    return (
        case.when(
            matches(_YEAR_MONTH), exp.DPipe(this=value.copy(), expression=exp.Literal.string("-15"))
        )
        .when(matches(_FULL_DATE), exp.func("LEFT", value.copy(), exp.Literal.number(10)))
        .else_(value.copy())
    )


def _reference_id(reference: exp.Expression, resource_type: exp.Expression) -> exp.Expression:
    """The id in a reference to a resource of the given type (relative or absolute URL)."""
    if not isinstance(resource_type, exp.Literal) or not resource_type.this.isalpha():
        raise ValueError("REF_ID needs a resource type literal")
    pattern = f"(?:^|/){resource_type.this}/([^/]+)(?:/_history/.*)?$"
    extracted = exp.RegexpExtract(
        this=reference, expression=exp.Literal.string(pattern), group=exp.Literal.number(1)
    )
    return exp.func("NULLIF", extracted, exp.Literal.string(""))


def _date_problem(text: exp.Expression) -> exp.Expression:
    """Why an event's chosen date text cannot be used, or NULL: missing, or a year only."""
    value = exp.Trim(this=text)
    return (
        exp.Case()
        .when(
            exp.func("NULLIF", value.copy(), exp.Literal.string("")).is_(exp.null()),
            exp.Literal.string("missing date"),
        )
        .when(
            exp.func("REGEXP_MATCHES", value.copy(), exp.Literal.string(YEAR)),
            exp.Literal.string("year-only date"),
        )
    )


_MACROS: dict[str, Callable[..., exp.Expression]] = {
    "FHIR_DATE": _fhir_date,
    "REF_ID": _reference_id,
    "DATE_PROBLEM": _date_problem,
}


@lru_cache(maxsize=64)
def _parse(text: str) -> exp.Expression:
    return sqlglot.parse_one(text, dialect="duckdb")


def fill(text: str, **values: exp.Expression) -> exp.Select:
    """Parse a constant template, fill ``:name`` placeholders and expand our macros."""

    def replace(node: exp.Expression) -> exp.Expression:
        if isinstance(node, exp.Placeholder):
            return values[node.name].copy()
        if isinstance(node, exp.Anonymous) and node.name.upper() in _MACROS:
            return _MACROS[node.name.upper()](*node.expressions)
        return node

    tree = _parse(text).transform(replace)
    if not isinstance(tree, exp.Select):
        raise TypeError("the template is not a SELECT")
    return tree


def strings(items: Sequence[str]) -> exp.Expression:
    """A tuple of string literals, sorted, for ``IN``."""
    return exp.Tuple(expressions=[exp.Literal.string(i) for i in sorted(items)])


def lookup(key: exp.Expression, mapping: Mapping[str, str]) -> exp.Expression:
    """``CASE key WHEN k THEN v ... END`` over a constant mapping (NULL for other keys)."""
    case = exp.Case(this=key)
    for k, v in sorted(mapping.items()):
        case = case.when(exp.Literal.string(k), exp.Literal.string(v))
    return case


Files = Mapping[str, Sequence[tuple[int, Path]]]
"""A resource type -> the (index, path) of each file holding it."""


def status_problem(resource_type: str, status: exp.Expression) -> exp.Expression:
    """The reason a resource's status sets it aside (``STATUS_SET_ASIDE``), else NULL."""
    return lookup(status, STATUS_SET_ASIDE[resource_type])


def read_type(files: Files, resource_type: str) -> exp.Expression:
    """The parsed resources of one type (no files: an empty relation of the same shape)."""
    return resources(resource_type, files.get(resource_type, ()))


# The reader's problems, first that applies: the line, the subject, the status, the date.
_PROBLEM = """
COALESCE(
  line_problem,
  CASE WHEN patient_id IS NULL THEN 'no patient reference' END,
  status_problem,
  DATE_PROBLEM(date_text)
)
"""


def row_problem() -> exp.Expression:
    """The reader's ``source_problem`` of a row with the columns named in ``_PROBLEM``."""
    return fill(f"SELECT {_PROBLEM}").expressions[0]
