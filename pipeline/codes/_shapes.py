"""What a code of each system may look like, checked when a definition or code list is loaded.

A definition's code is a prefix, so a valid shape is a whole code or the start of one at a level
the system defines (an ICD-10 category and its subdivisions, an ATC level). For the systems
whose codes are not case-sensitive, case and spaces do not matter and a dot may only stand
where the system puts it. Read v2 is case-sensitive (``H33z.`` and ``H33Z.`` are different
codes) and pads its codes to five characters with trailing dots. SNOMED CT identifiers carry a
check digit and a partition identifier, both checked (:mod:`pipeline.codes._snomed`).

Sources of the shapes (all from memory of the published structures, no table shipped):

- ICD-10: WHO ICD-10 category (letter, two digits) and up to one decimal; ICD-10-CM extends
  codes to seven characters.
- ICD-9-CM: three digits with up to two decimals; V codes; E codes with one decimal.
- WHO ATC: levels of 1, 3, 4, 5 or 7 characters (WHOCC, structure and principles).
- SNOMED CT: Technical Implementation Guide, section on SCTID: 6 to 18 digits, no leading zero,
  the last digit a Verhoeff check digit, the two before it the partition identifier.
- Read v2 (Read Codes version 2, 5-byte set): five characters of letters (either case) and
  digits, one character a level, trailing dots as padding.
- ICPC-2 (WONCA): one of 17 chapter letters and two digits (components 1 to 7: symptoms 01-29,
  process 30-69, diagnoses 70-99); national extensions add a dot and one or two digits
  (e.g. ``K86.01``).
"""

from __future__ import annotations

import re

from pipeline.codes._normalise import expand_code
from pipeline.codes._snomed import snomed_problem

# Case-insensitive systems: the pattern is matched after upper-casing and removing spaces.
SHAPES: dict[str, tuple[re.Pattern[str], str]] = {
    "ICD10": (
        re.compile(r"^[A-Z][0-9][0-9A-Z](\.?[0-9A-Z]{1,4})?$"),
        "a letter and two characters, then up to four more after an optional dot, e.g. E11.9",
    ),
    "ICD9": (
        re.compile(r"^([0-9]{3}(\.?[0-9]{1,2})?|V[0-9]{2}(\.?[0-9]{1,2})?|E[0-9]{3}(\.?[0-9])?)$"),
        "three digits with up to two decimals, a V code or an E code, e.g. 250 or 585.3",
    ),
    "ATC": (
        re.compile(r"^[A-Z]([0-9]{2}([A-Z]([A-Z]([0-9]{2})?)?)?)?$"),
        "a WHO ATC level of 1, 3, 4, 5 or 7 characters, e.g. A10B or A10BA02",
    ),
    "ICPC2": (
        re.compile(r"^[ABDFHKLNPRSTUWXYZ]([0-9]{2}(\.?[0-9]{1,2})?)?$"),
        "a chapter letter and two digits, with an optional extension after a dot, e.g. T90 or "
        "K86.01",
    ),
    "SNOMED": (
        re.compile(r"^[1-9][0-9]{5,17}$"),
        "a concept identifier of 6 to 18 digits, e.g. 73211009",
    ),
}

# Read v2 keeps its case, so it is matched as written (spaces around removed).
READ2_SHAPE = (
    re.compile(r"^[A-Za-z0-9]{1,5}\.{0,4}$"),
    "up to five letters or digits, case as issued, padded with trailing dots, e.g. G30..",
)

# The extract's codes after the engine's normalisation (no dots; Read v2: trailing dots gone),
# as RE2 patterns the engine matches.
EXTRACT_PATTERNS: dict[str, str] = {
    **{system: pattern.pattern.replace("\\.?", "") for system, (pattern, _) in SHAPES.items()},
    "READ2": r"^[A-Za-z0-9]{1,5}$",
}

SYSTEM_NAMES = {
    "ICD10": "ICD-10",
    "ICD9": "ICD-9",
    "ATC": "WHO ATC",
    "ICPC2": "ICPC-2",
    "SNOMED": "SNOMED CT",
    "READ2": "Read v2",
}

# Systems a diagnosis can be coded in (the extract's code_system spellings).
DIAGNOSIS_SYSTEMS = ("ICD10", "ICD9", "SNOMED", "READ2", "ICPC2")


def _shape_problem(system: str, end: str) -> str | None:
    if system == "READ2":
        pattern, expected = READ2_SHAPE
        text = end.strip()
        if pattern.match(text) and len(text) <= 5:
            return None
        return expected
    pattern, expected = SHAPES[system]
    text = end.upper().replace(" ", "")
    if not pattern.match(text):
        return expected
    if system == "SNOMED":
        return snomed_problem(text)
    return None


def check_code(system: str, written: str) -> str:
    """Check a written code, prefix or range against its system's shape.

    >>> check_code("ICD10", "I10-I15")
    'I10-I15'
    >>> check_code("READ2", "G30..")
    'G30..'

    Raises:
        ValueError: With a sentence naming the code and the expected shape.
    """
    ranged = "-" in written and system not in ("READ2", "SNOMED")
    ends = written.split("-", 1) if ranged else [written]
    for end in ends:
        problem = _shape_problem(system, end)
        if problem is not None:
            raise ValueError(
                f"'{written}' is not a valid {SYSTEM_NAMES[system]} code or prefix: "
                f"expected {problem}"
            )
    if ranged:
        expand_code(written)  # raises for empty, reversed or unequal ranges
    return written
