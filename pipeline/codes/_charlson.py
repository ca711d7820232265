"""Charlson comorbidity index: the Quan et al. (2005) coding algorithms and two weightings, as data.

The 17 categories follow Quan H, Sundararajan V, Halfon P, et al. "Coding algorithms for defining
comorbidities in ICD-9-CM and ICD-10 administrative data", *Med Care* 2005;43:1130-1139, Table 1:
the ICD-10 column and the enhanced ICD-9-CM column. Codes are written as in the paper, with dots
where it has them; the paper's ``x`` (any subdivision) is simply the shorter prefix, because a
definition's code is a prefix (see :func:`pipeline.codes.expand_code`), and its ranges such as
``C00.x-C26.x`` are written ``C00-C26``, a range of prefixes of equal length.

Provenance: the lists were written from memory of the paper, not copied from a machine-readable
source, and then checked against the mappings of the ``comorbidipy`` package (0.5.0, variant
"quan", ICD-10 and ICD-9) by ``tests/test_charlson_codes.py``, prefix by prefix and by scoring
synthetic patients. The ICD-10 lists agree exactly. Two ICD-9 differences remain, and the paper's
table is what is kept here: malignancy ends at 195.8 as in the paper (comorbidipy takes all of
195), and the codes the paper lists in two categories (404.03, 404.13, 404.93 in heart failure and
renal disease; 437.3 in peripheral vascular and cerebrovascular disease) count in both, where
comorbidipy assigns each code to one category only.

One deliberate deviation from the paper (ours, so it is stated in every output's data
dictionary): renal disease does not count chronic kidney disease stages 1 and 2, ICD-10 N18.1,
N18.2 and ICD-9-CM 585.1, 585.2. The paper lists N18 and 585 whole, but stages 1 and 2 are kidney
damage with normal or mildly reduced filtration, not the moderate or severe renal disease the
Charlson index weights, and they are often coded from a single mildly low eGFR. Every other N18
and 585 code still scores: the bare three-character codes, stages 3 to 5 and end-stage
(N18.3-N18.6, N18.0 where an edition has it, 585.3-585.6) and the unspecified or other ones
(N18.8, N18.9, 585.9), whose stage is unknown.

Weights: ``charlson_1987`` are the original weights of Charlson ME, Pompei P, Ales KL, MacKenzie CR,
*J Chronic Dis* 1987;40:373-383; ``quan_2011`` are the updated weights of Quan H, Li B, Couris CM,
et al., *Am J Epidemiol* 2011;173:676-682 (AIDS/HIV = 4 as published; comorbidipy 0.5.0 uses 2).

:func:`charlson_score` is a deliberately plain Python implementation: it is the reference the SQL
engine's Charlson score is tested against, so it favours being obviously right over being fast.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from functools import cache

from pipeline.codes._normalise import expand_codes, normalise_code


@dataclass(frozen=True)
class CharlsonCategory:
    """One Charlson comorbidity category with its Quan (2005) code lists.

    Attributes:
        name: Snake-case identifier, the key used in :data:`WEIGHTS` and :data:`HIERARCHY`.
        title: The category's name as a reader expects it in a table.
        icd10: ICD-10 codes, prefixes or equal-length ranges (Quan 2005, ICD-10 column).
        icd9: ICD-9-CM codes, prefixes or ranges (Quan 2005, enhanced ICD-9-CM column).
        icd10_except: ICD-10 prefixes inside ``icd10`` that do not count (our deviations).
        icd9_except: ICD-9-CM prefixes inside ``icd9`` that do not count (our deviations).
    """

    name: str
    title: str
    icd10: tuple[str, ...]
    icd9: tuple[str, ...]
    icd10_except: tuple[str, ...] = ()
    icd9_except: tuple[str, ...] = ()

    def codes(self, system: str) -> tuple[tuple[str, ...], tuple[str, ...]]:
        """The category's included codes and its exceptions in one system, as written."""
        if system == "ICD10":
            return self.icd10, self.icd10_except
        return self.icd9, self.icd9_except


# Laid out by hand, several codes a line, to read alongside the paper's table.
# fmt: off
CHARLSON_CATEGORIES: tuple[CharlsonCategory, ...] = (
    CharlsonCategory(
        name="myocardial_infarction",
        title="Myocardial infarction",
        icd10=("I21", "I22", "I25.2"),
        icd9=("410", "412"),
    ),
    CharlsonCategory(
        name="congestive_heart_failure",
        title="Congestive heart failure",
        icd10=(
            "I09.9", "I11.0", "I13.0", "I13.2", "I25.5", "I42.0", "I42.5-I42.9", "I43", "I50",
            "P29.0",
        ),
        icd9=(
            "398.91", "402.01", "402.11", "402.91", "404.01", "404.03", "404.11", "404.13",
            "404.91", "404.93", "425.4-425.9", "428",
        ),
    ),
    CharlsonCategory(
        name="peripheral_vascular_disease",
        title="Peripheral vascular disease",
        icd10=(
            "I70", "I71", "I73.1", "I73.8", "I73.9", "I77.1", "I79.0", "I79.2", "K55.1", "K55.8",
            "K55.9", "Z95.8", "Z95.9",
        ),
        icd9=("093.0", "437.3", "440", "441", "443.1-443.9", "447.1", "557.1", "557.9", "V43.4"),
    ),
    CharlsonCategory(
        name="cerebrovascular_disease",
        title="Cerebrovascular disease",
        icd10=("G45", "G46", "H34.0", "I60-I69"),
        icd9=("362.34", "430-438"),
    ),
    CharlsonCategory(
        name="dementia",
        title="Dementia",
        icd10=("F00-F03", "F05.1", "G30", "G31.1"),
        icd9=("290", "294.1", "331.2"),
    ),
    CharlsonCategory(
        name="chronic_pulmonary_disease",
        title="Chronic pulmonary disease",
        icd10=("I27.8", "I27.9", "J40-J47", "J60-J67", "J68.4", "J70.1", "J70.3"),
        icd9=("416.8", "416.9", "490-505", "506.4", "508.1", "508.8"),
    ),
    CharlsonCategory(
        name="rheumatic_disease",
        title="Rheumatic disease",
        icd10=("M05", "M06", "M31.5", "M32-M34", "M35.1", "M35.3", "M36.0"),
        icd9=("446.5", "710.0-710.4", "714.0-714.2", "714.8", "725"),
    ),
    CharlsonCategory(
        name="peptic_ulcer_disease",
        title="Peptic ulcer disease",
        icd10=("K25-K28",),
        icd9=("531-534",),
    ),
    CharlsonCategory(
        name="mild_liver_disease",
        title="Mild liver disease",
        icd10=(
            "B18", "K70.0-K70.3", "K70.9", "K71.3-K71.5", "K71.7", "K73", "K74", "K76.0",
            "K76.2-K76.4", "K76.8", "K76.9", "Z94.4",
        ),
        icd9=(
            "070.22", "070.23", "070.32", "070.33", "070.44", "070.54", "070.6", "070.9", "570",
            "571", "573.3", "573.4", "573.8", "573.9", "V42.7",
        ),
    ),
    CharlsonCategory(
        name="diabetes_without_complications",
        title="Diabetes without chronic complications",
        icd10=(
            "E10.0", "E10.1", "E10.6", "E10.8", "E10.9",
            "E11.0", "E11.1", "E11.6", "E11.8", "E11.9",
            "E12.0", "E12.1", "E12.6", "E12.8", "E12.9",
            "E13.0", "E13.1", "E13.6", "E13.8", "E13.9",
            "E14.0", "E14.1", "E14.6", "E14.8", "E14.9",
        ),
        icd9=("250.0-250.3", "250.8", "250.9"),
    ),
    CharlsonCategory(
        name="diabetes_with_complications",
        title="Diabetes with chronic complications",
        icd10=(
            "E10.2-E10.5", "E10.7",
            "E11.2-E11.5", "E11.7",
            "E12.2-E12.5", "E12.7",
            "E13.2-E13.5", "E13.7",
            "E14.2-E14.5", "E14.7",
        ),
        icd9=("250.4-250.7",),
    ),
    CharlsonCategory(
        name="hemiplegia_paraplegia",
        title="Hemiplegia or paraplegia",
        icd10=("G04.1", "G11.4", "G80.1", "G80.2", "G81", "G82", "G83.0-G83.4", "G83.9"),
        icd9=("334.1", "342", "343", "344.0-344.6", "344.9"),
    ),
    CharlsonCategory(
        name="renal_disease",
        title="Renal disease",
        icd10=(
            "I12.0", "I13.1", "N03.2-N03.7", "N05.2-N05.7", "N18", "N19", "N25.0",
            "Z49.0-Z49.2", "Z94.0", "Z99.2",
        ),
        icd9=(
            "403.01", "403.11", "403.91", "404.02", "404.03", "404.12", "404.13", "404.92",
            "404.93", "582", "583.0-583.7", "585", "586", "588.0", "V42.0", "V45.1", "V56",
        ),
        # Our deviation from Quan 2005 (module docstring): CKD stages 1 and 2 do not score.
        icd10_except=("N18.1", "N18.2"),
        icd9_except=("585.1", "585.2"),
    ),
    CharlsonCategory(
        name="malignancy",
        title="Any malignancy, including lymphoma and leukaemia, except malignant neoplasm of skin",
        icd10=(
            "C00-C26", "C30-C34", "C37-C41", "C43", "C45-C58", "C60-C76", "C81-C85", "C88",
            "C90-C97",
        ),
        # The paper's 174.x-195.8 is split so that both ends of each range have equal length.
        icd9=("140-172", "174-194", "195.0-195.8", "200-208", "238.6"),
    ),
    CharlsonCategory(
        name="moderate_severe_liver_disease",
        title="Moderate or severe liver disease",
        icd10=(
            "I85.0", "I85.9", "I86.4", "I98.2", "K70.4", "K71.1", "K72.1", "K72.9", "K76.5",
            "K76.6", "K76.7",
        ),
        icd9=("456.0-456.2", "572.2-572.8"),
    ),
    CharlsonCategory(
        name="metastatic_solid_tumour",
        title="Metastatic solid tumour",
        icd10=("C77-C80",),
        icd9=("196-199",),
    ),
    CharlsonCategory(
        name="hiv_aids",
        title="AIDS/HIV",
        icd10=("B20-B22", "B24"),
        icd9=("042-044",),
    ),
)
# fmt: on

WEIGHTS: dict[str, dict[str, int]] = {
    # Charlson et al., J Chronic Dis 1987;40:373-383, Table 3 (the original index).
    "charlson_1987": {
        "myocardial_infarction": 1,
        "congestive_heart_failure": 1,
        "peripheral_vascular_disease": 1,
        "cerebrovascular_disease": 1,
        "dementia": 1,
        "chronic_pulmonary_disease": 1,
        "rheumatic_disease": 1,
        "peptic_ulcer_disease": 1,
        "mild_liver_disease": 1,
        "diabetes_without_complications": 1,
        "diabetes_with_complications": 2,
        "hemiplegia_paraplegia": 2,
        "renal_disease": 2,
        "malignancy": 2,
        "moderate_severe_liver_disease": 3,
        "metastatic_solid_tumour": 6,
        "hiv_aids": 6,
    },
    # Quan et al., Am J Epidemiol 2011;173:676-682 (updated weights, six countries).
    "quan_2011": {
        "myocardial_infarction": 0,
        "congestive_heart_failure": 2,
        "peripheral_vascular_disease": 0,
        "cerebrovascular_disease": 0,
        "dementia": 2,
        "chronic_pulmonary_disease": 1,
        "rheumatic_disease": 1,
        "peptic_ulcer_disease": 0,
        "mild_liver_disease": 2,
        "diabetes_without_complications": 0,
        "diabetes_with_complications": 1,
        "hemiplegia_paraplegia": 2,
        "renal_disease": 1,
        "malignancy": 2,
        "moderate_severe_liver_disease": 4,
        "metastatic_solid_tumour": 6,
        "hiv_aids": 4,
    },
}

# (milder, more severe): when a patient has both, only the more severe one is weighted, so that
# one disease process is not counted twice; the usual convention of Charlson implementations
# (comorbidipy's assign0, the R package comorbidity's assign0).
HIERARCHY: tuple[tuple[str, str], ...] = (
    ("mild_liver_disease", "moderate_severe_liver_disease"),
    ("diabetes_without_complications", "diabetes_with_complications"),
    ("malignancy", "metastatic_solid_tumour"),
)

SYSTEMS = ("ICD10", "ICD9")


@cache
def category_prefixes(system: str) -> dict[str, tuple[str, ...]]:
    """Each category's normalised prefixes for one code system.

    Expanded once and cached because the lists are constant; the engine and the tests use the
    same expansion, so a category means the same codes everywhere.

    Args:
        system: ``"ICD10"`` or ``"ICD9"``.

    Returns:
        Category name -> its sorted, distinct normalised prefixes in that system.

    Raises:
        ValueError: An unknown system.

    >>> category_prefixes("ICD10")["myocardial_infarction"]
    ('I21', 'I22', 'I252')
    """
    if system not in SYSTEMS:
        raise ValueError(f"Charlson codes exist for {', '.join(SYSTEMS)}, not '{system}'")
    return {
        category.name: tuple(expand_codes(category.codes(system)[0]))
        for category in CHARLSON_CATEGORIES
    }


@cache
def category_exceptions(system: str) -> dict[str, tuple[str, ...]]:
    """Each category's normalised prefixes that do not count, for one code system.

    A code counts for a category when it starts with one of :func:`category_prefixes` and with
    none of these (our stated deviations from Quan 2005).

    Raises:
        ValueError: An unknown system.

    >>> category_exceptions("ICD10")["renal_disease"]
    ('N181', 'N182')
    """
    if system not in SYSTEMS:
        raise ValueError(f"Charlson codes exist for {', '.join(SYSTEMS)}, not '{system}'")
    return {
        category.name: tuple(expand_codes(category.codes(system)[1]))
        for category in CHARLSON_CATEGORIES
    }


def charlson_categories(codes: Iterable[tuple[str, str]]) -> set[str]:
    """The Charlson categories a patient's codes fall in, before the hierarchy is applied.

    Args:
        codes: ``(system, code)`` pairs, system ``"ICD10"`` or ``"ICD9"``, the code as written
            in an extract (any case, with or without a dot).

    Returns:
        Names of the categories with at least one code whose normalised form starts with one
        of the category's prefixes in the same system and with none of its exceptions.
    """
    found: set[str] = set()
    for system, code in codes:
        normalised = normalise_code(code)
        exceptions = category_exceptions(system)
        for name, prefixes in category_prefixes(system).items():
            if normalised.startswith(prefixes) and not normalised.startswith(exceptions[name]):
                found.add(name)
    return found


def charlson_score(codes: Iterable[tuple[str, str]], weights: str) -> int:
    """A patient's Charlson comorbidity index from their diagnosis codes.

    Each category counts once however many of its codes a patient has; of each
    :data:`HIERARCHY` pair only the more severe counts when both are present; the score is the
    sum of the chosen weighting over the categories left.

    Args:
        codes: ``(system, code)`` pairs, system ``"ICD10"`` or ``"ICD9"``.
        weights: A key of :data:`WEIGHTS`: ``"charlson_1987"`` or ``"quan_2011"``.

    Returns:
        The (not age-adjusted) Charlson score.

    Raises:
        ValueError: An unknown weighting or code system.

    >>> charlson_score([("ICD10", "E11.9"), ("ICD10", "e112")], "charlson_1987")
    2
    >>> charlson_score([("ICD9", "428.0"), ("ICD9", "585.3")], "quan_2011")
    3
    """
    if weights not in WEIGHTS:
        raise ValueError(f"unknown Charlson weighting '{weights}': expected one of {list(WEIGHTS)}")
    present = charlson_categories(codes)
    for milder, severe in HIERARCHY:
        if severe in present:
            present.discard(milder)
    return sum(WEIGHTS[weights][name] for name in present)
