"""What a code of each system may look like, checked when a definition is loaded.

A definition's code is a prefix, so a valid shape is a whole code or the start of one at a level
the system defines (an ICD-10 category and its subdivisions, an ATC level). Case and spaces do
not matter; a dot may only stand where the system puts it.
"""

from __future__ import annotations

import re

from pipeline.codes._normalise import expand_code

# ICD-10 (WHO; ICD-10-CM adds up to 7 characters): a letter, two digits, up to 4 more.
# ICD-9(-CM): 3 digits with up to 2 decimals; V codes V01-V91; E codes E000-E999 with 1 decimal.
# WHO ATC levels have 1, 3, 4, 5 or 7 characters (WHOCC structure).
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
}

SYSTEM_NAMES = {"ICD10": "ICD-10", "ICD9": "ICD-9", "ATC": "WHO ATC"}


def check_code(system: str, written: str) -> str:
    """Check a written code, prefix or range against its system's shape.

    >>> check_code("ICD10", "I10-I15")
    'I10-I15'

    Raises:
        ValueError: With a sentence naming the code and the expected shape.
    """
    pattern, expected = SHAPES[system]
    ends = written.split("-", 1) if "-" in written else [written]
    for end in ends:
        if not pattern.match(end.upper().replace(" ", "")):
            raise ValueError(
                f"'{written}' is not a valid {SYSTEM_NAMES[system]} code or prefix: "
                f"expected {expected}"
            )
    expand_code(written)  # raises for empty, reversed or unequal ranges
    return written
