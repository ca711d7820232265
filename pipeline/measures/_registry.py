"""The measures the tool understands: canonical units, accepted spellings, plausible ranges.

Every unit conversion is linear (``canonical = factor * value + offset``), which keeps the
conversion a small lookup table the compiler can join against instead of a chain of CASEs.
Units the registry does not list are never guessed: such values are not used. The plausibility
ranges are common practice, not a published standard.
"""

from __future__ import annotations

from dataclasses import dataclass

# Creatinine: 1 mg/dL = 88.42 umol/L (molar mass 113.12 g/mol; the demo
# spec, definitions/studies/orvane_multimorbidity.md §4.2, uses 88.42).
CREATININE_UMOL_PER_MG_DL = 88.42
# HbA1c IFCC (mmol/mol) to NGSP (%): master equation NGSP = 0.09148 * IFCC + 2.152
# (Hoelzel et al. 2004, Clin Chem 50:166).
HBA1C_NGSP_SLOPE = 0.09148
HBA1C_NGSP_INTERCEPT = 2.152
# Glucose: molar mass 180.156 g/mol, so 1 mmol/L = 18.0156 mg/dL.
GLUCOSE_MG_DL_PER_MMOL_L = 18.0156
# Creatinine in mmol/L: 1 mmol/L = 1000 umol/L (SI prefixes), then umol/L as above.
CREATININE_UMOL_PER_MMOL = 1000.0
# Avoirdupois pound and international inch, exact by definition (International Yard and Pound
# Agreement, 1959; the UCUM codes [lb_av] and [in_i] are defined from them).
KG_PER_POUND = 0.45359237
CM_PER_INCH = 2.54
# Cholesterol: molar mass 386.65 g/mol, so 1 mmol/L = 38.67 mg/dL (from memory; common practice).
CHOLESTEROL_MG_DL_PER_MMOL_L = 38.67


@dataclass(frozen=True)
class UnitConversion:
    """How one spelling of a unit converts: ``canonical = factor * value / divisor + offset``.

    A divisor keeps conversions such as creatinine (umol/L / 88.42) exact to the last bit.
    """

    spelling: str
    factor: float
    offset: float = 0.0
    divisor: float = 1.0

    def to_canonical(self, value: float) -> float:
        """Convert a value in this unit to the canonical unit, as the engine does."""
        return self.factor * value / self.divisor + self.offset


@dataclass(frozen=True)
class Measure:
    """A measurement the extract may carry, with its canonical unit.

    Attributes:
        name: The value of ``measure`` in the extract.
        canonical_unit: The unit every value is converted to ("" for a coded measure).
        units: Accepted spellings (compared after trimming, case kept) and their conversions.
        plausible: Inclusive range of canonical values that are used; others are set aside.
        categories: For a coded measure (smoking status), the accepted values of
            ``value_text``, compared lower-cased; numeric measures have none.
    """

    name: str
    canonical_unit: str
    units: tuple[UnitConversion, ...]
    plausible: tuple[float, float]
    categories: tuple[str, ...] = ()

    @property
    def is_coded(self) -> bool:
        """Whether the measure takes categories rather than numbers."""
        return bool(self.categories)

    def conversion(self, spelling: str) -> UnitConversion | None:
        """Return the conversion for a unit spelling, or None when it is not accepted."""
        wanted = spelling.strip()
        return next((u for u in self.units if u.spelling == wanted), None)


def _same(*spellings: str) -> tuple[UnitConversion, ...]:
    return tuple(UnitConversion(s, 1.0) for s in spellings)


_EGFR_UNITS = _same(
    "mL/min/1.73m2", "mL/min/1.73 m2", "mL/min/{1.73_m2}", "ml/min/1.73m2", "mL/min/1.73m²"
)

MEASURES: dict[str, Measure] = {
    m.name: m
    for m in (
        Measure(
            "hba1c",
            "%",
            (
                *_same("%", "% Hb", "%{HbA1c}"),
                UnitConversion("mmol/mol", HBA1C_NGSP_SLOPE, HBA1C_NGSP_INTERCEPT),
            ),
            (3.0, 20.0),
        ),
        Measure(
            "fasting_glucose",
            "mmol/L",
            (
                *_same("mmol/L", "mmol/l"),
                UnitConversion("mg/dL", 1.0, divisor=GLUCOSE_MG_DL_PER_MMOL_L),
                UnitConversion("mg/dl", 1.0, divisor=GLUCOSE_MG_DL_PER_MMOL_L),
            ),
            (1.0, 50.0),
        ),
        Measure(
            "creatinine",
            "mg/dL",
            (
                *_same("mg/dL", "mg/dl"),
                *(
                    UnitConversion(s, 1.0, divisor=CREATININE_UMOL_PER_MG_DL)
                    for s in ("umol/L", "µmol/L", "μmol/L", "umol/l", "µmol/l")
                ),
                *(
                    UnitConversion(s, CREATININE_UMOL_PER_MMOL, divisor=CREATININE_UMOL_PER_MG_DL)
                    for s in ("mmol/L", "mmol/l")
                ),
            ),
            (0.1, 20.0),
        ),
        Measure("egfr", "mL/min/1.73m2", _EGFR_UNITS, (1.0, 200.0)),
        Measure("sbp", "mmHg", _same("mmHg", "mm[Hg]", "mm Hg"), (50.0, 300.0)),
        Measure("dbp", "mmHg", _same("mmHg", "mm[Hg]", "mm Hg"), (20.0, 200.0)),
        Measure("bmi", "kg/m2", _same("kg/m2", "kg/m²", "kg/m^2"), (10.0, 80.0)),
        Measure(
            "weight",
            "kg",
            (
                *_same("kg"),
                UnitConversion("g", 1.0, divisor=1000.0),
                UnitConversion("[lb_av]", KG_PER_POUND),  # UCUM's code; "lb" is not read
            ),
            (2.0, 400.0),
        ),
        Measure(
            "total_cholesterol",
            "mmol/L",
            (
                *_same("mmol/L", "mmol/l"),
                UnitConversion("mg/dL", 1.0, divisor=CHOLESTEROL_MG_DL_PER_MMOL_L),
                UnitConversion("mg/dl", 1.0, divisor=CHOLESTEROL_MG_DL_PER_MMOL_L),
            ),
            (1.0, 20.0),
        ),
        Measure(
            "ldl",
            "mmol/L",
            (
                *_same("mmol/L", "mmol/l"),
                UnitConversion("mg/dL", 1.0, divisor=CHOLESTEROL_MG_DL_PER_MMOL_L),
                UnitConversion("mg/dl", 1.0, divisor=CHOLESTEROL_MG_DL_PER_MMOL_L),
            ),
            (0.2, 15.0),
        ),
        Measure("smoking", "", (), (0.0, 0.0), categories=("current", "former", "never")),
        Measure(
            "height",
            "cm",
            (
                *_same("cm"),
                UnitConversion("m", 100.0),
                UnitConversion("mm", 1.0, divisor=10.0),
                UnitConversion("[in_i]", CM_PER_INCH),  # UCUM's code
            ),
            (40.0, 250.0),
        ),
    )
}


# Measures the engine can derive when they are not reported, and what from.
DERIVED_FROM: dict[str, tuple[str, ...]] = {
    "egfr": ("creatinine",),  # CKD-EPI 2021, on days without a usable reported eGFR
    "bmi": ("weight", "height"),  # weight / (latest height in m)^2, on days without a BMI
}

# The inputs each derivation reads on the day of the value it derives (the others, height, are
# read whatever their date).
SAME_DAY_INPUTS: dict[str, tuple[str, ...]] = {"egfr": ("creatinine",), "bmi": ("weight",)}


def conversion_rows() -> list[tuple[str, str, float, float, float, float, float]]:
    """Return (measure, unit spelling, factor, divisor, offset, low, high) per accepted unit.

    The compiler turns these rows into a small literal table that measurements are joined to.
    """
    return [
        (m.name, u.spelling, u.factor, u.divisor, u.offset, m.plausible[0], m.plausible[1])
        for m in sorted(MEASURES.values(), key=lambda m: m.name)
        for u in m.units
        if not m.is_coded
    ]
