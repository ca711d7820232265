"""External checks of pipeline.stats.

Every numeric assert names its source: a reference library (statsmodels, lifelines,
scikit-learn, scipy) called here or, for a fixed table of values, the library and version or
the publication the values were computed with, or a value computed by hand in the comment
beside it. Reference libraries are imported with pytest.importorskip so the
library itself never needs them.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import polars as pl
import pytest
from scipy import stats as sps

import pipeline.stats as st
from pipeline.stats import (
    aalen_johansen,
    association_2x2,
    clopper_pearson_interval,
    competing_risk_data,
    crude_proportion,
    diagnostic_accuracy,
    expected_co_occurrence,
    incidence_rate,
    kaplan_meier,
    onset_agreement,
    outcome_combinations,
    pairwise_dependence,
    poisson_exact_interval,
    table_one,
    wilson_interval,
)

PROPORTIONS = [(9, 100), (0, 50), (50, 50), (412, 4580), (1, 3), (0, 1), (1, 1), (7, 13)]

# Ten subjects, no ties (2 = a competing event); reference values computed with lifelines 0.30.3.
KM_DURATIONS = [2, 3, 4, 5, 6, 7, 8, 9, 10, 12]
KM_CODES = [1, 0, 2, 1, 0, 1, 2, 1, 0, 1]


def _quiet_import(name: str):  # type: ignore[no-untyped-def]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return pytest.importorskip(name)


# --- public API ------------------------------------------------------------------------------


def test_all_is_sorted_and_complete() -> None:
    # httpx pattern; order as ruff RUF022 sorts it (CONSTANTS, Classes, functions).
    def key(name: str) -> tuple[int, str]:
        return (0 if name.isupper() else 1 if name[0].isupper() else 2, name)

    assert st.__all__ == sorted(st.__all__, key=key)
    public = {n for n in dir(st) if not n.startswith("_")}
    assert public == set(st.__all__)


def test_library_does_not_import_reference_libraries() -> None:
    from pathlib import Path

    source = "\n".join(p.read_text() for p in Path(st.__file__).parent.glob("*.py"))
    for banned in ("statsmodels", "lifelines", "sklearn", "pandas"):
        assert f"import {banned}" not in source
        assert f"from {banned}" not in source


# --- intervals -------------------------------------------------------------------------------


@pytest.mark.parametrize(("x", "n"), PROPORTIONS)
def test_wilson_and_clopper_pearson_match_statsmodels(x: int, n: int) -> None:
    proportion = _quiet_import("statsmodels.stats.proportion")
    low, high = proportion.proportion_confint(x, n, alpha=0.05, method="wilson")
    ci = wilson_interval(x, n)
    assert ci.estimate == x / n
    assert (ci.low, ci.high) == pytest.approx((low, high), abs=1e-12)  # statsmodels wilson
    low, high = proportion.proportion_confint(x, n, alpha=0.05, method="beta")
    ci = clopper_pearson_interval(x, n)
    assert (ci.low, ci.high) == pytest.approx((low, high), abs=1e-12)  # statsmodels beta


@pytest.mark.parametrize(
    ("x", "n", "wilson", "exact"),
    [
        (9, 100, (0.0481, 0.1623), (0.0420, 0.1640)),
        (0, 50, (0.0, 0.0713), (0.0, 0.0711)),
        (50, 50, (0.9287, 1.0), (0.9289, 1.0)),
        (412, 4580, (0.0820, 0.0986), (0.0818, 0.0986)),
    ],
)
def test_proportion_intervals_match_reference_table(
    x: int, n: int, wilson: tuple[float, float], exact: tuple[float, float]
) -> None:
    w = wilson_interval(x, n)
    # statsmodels 0.15.0 proportion_confint (method "wilson" / "beta"), 4 decimals
    assert (round(w.low, 4), round(w.high, 4)) == wilson
    e = clopper_pearson_interval(x, n)
    assert (round(e.low, 4), round(e.high, 4)) == exact


def test_proportion_limits_are_exact_at_the_edges() -> None:
    assert wilson_interval(0, 50).low == 0.0
    assert wilson_interval(50, 50).high == 1.0
    assert clopper_pearson_interval(0, 50).low == 0.0
    assert clopper_pearson_interval(50, 50).high == 1.0
    # Closed form 1 - 0.025^(1/50) (Clopper-Pearson with x = 0, by hand).
    assert clopper_pearson_interval(0, 50).high == pytest.approx(1 - 0.025 ** (1 / 50), abs=1e-12)


def test_intervals_without_data_are_nan_and_bad_input_raises() -> None:
    for ci in (wilson_interval(0, 0), clopper_pearson_interval(0, 0), poisson_exact_interval(0, 0)):
        assert all(math.isnan(v) for v in (ci.estimate, ci.low, ci.high))
    with pytest.raises(ValueError, match="exceed"):
        wilson_interval(3, 2)
    with pytest.raises(ValueError, match="non-negative integer"):
        wilson_interval(-1, 2)
    with pytest.raises(ValueError, match="confidence"):
        wilson_interval(1, 2, confidence=95)
    with pytest.raises(ValueError, match="zero exposure"):
        poisson_exact_interval(2, 0.0)


@pytest.mark.parametrize("k", [0, 1, 5, 12, 100])
def test_poisson_exact_matches_garwood_chi_square_formula(k: int) -> None:
    ci = poisson_exact_interval(k, 250.0)
    # Garwood 1936: L = chi2(a/2, 2k)/2, U = chi2(1-a/2, 2k+2)/2, computed with scipy.
    low = 0.0 if k == 0 else sps.chi2.ppf(0.025, 2 * k) / 2
    high = sps.chi2.ppf(0.975, 2 * k + 2) / 2
    assert ci.low * 250 == pytest.approx(low, rel=1e-12)
    assert ci.high * 250 == pytest.approx(high, rel=1e-12)
    rates = _quiet_import("statsmodels.stats.rates")
    ref = rates.confint_poisson(k, 250.0, method="exact-c")  # statsmodels exact-c
    assert (ci.low, ci.high) == pytest.approx(tuple(map(float, ref)), rel=1e-9, abs=1e-15)


def test_poisson_exact_reference_values() -> None:
    # Garwood (1936) exact limits chi2(a/2, 2k)/2 and chi2(1-a/2, 2k+2)/2, computed with scipy
    # 1.17 chi2.ppf (statsmodels confint_poisson(method="exact-c") gives the same).
    ci = poisson_exact_interval(12, 1000.0)
    assert (round(ci.low * 1000, 4), round(ci.high * 1000, 4)) == (6.2006, 20.9616)  # Garwood
    ci = poisson_exact_interval(0, 500.0)
    assert ci.low == 0.0
    assert round(ci.high * 1000, 4) == 7.3778  # Garwood
    assert round(ci.high * 500, 4) == 3.6889  # count upper limit, Garwood
    one, five = poisson_exact_interval(1, 1.0), poisson_exact_interval(5, 1.0)
    assert (round(one.low, 4), round(one.high, 4)) == (0.0253, 5.5716)  # Garwood
    assert (round(five.low, 4), round(five.high, 4)) == (1.6235, 11.6683)  # Garwood


# --- incidence -------------------------------------------------------------------------------


def _outcome_cohort() -> pl.DataFrame:
    """Five patients at risk of ckd, one prevalent; hand-checked follow-up."""
    return pl.DataFrame(
        {
            "patient_id": ["p1", "p2", "p3", "p4", "p5", "p6"],
            "at_risk_ckd": [True, True, True, True, True, False],
            "incident_ckd": [True, False, True, False, False, None],
            "days_to_ckd": [100, None, 365, None, None, None],
            "followup_days": [1461, 730, 900, 1461, 500, 1461],
            "end_reason": ["horizon", "death", "death", "horizon", "lost_contact", "horizon"],
        }
    )


def test_cumulative_incidence_counts_at_risk_only() -> None:
    ci = crude_proportion(_outcome_cohort(), "ckd")
    assert (ci.at_risk, ci.events) == (5, 2)  # hand count: p1, p3 among p1..p5
    ref = wilson_interval(2, 5)
    assert (ci.proportion, ci.low, ci.high) == (0.4, ref.low, ref.high)


def test_incidence_rate_uses_time_to_onset_for_cases() -> None:
    r = incidence_rate(_outcome_cohort(), "ckd")
    days = 100 + 730 + 365 + 1461 + 500  # hand: onset for p1, p3; follow-up otherwise
    assert r.person_years == pytest.approx(days / 365.25, rel=1e-15)
    assert r.rate == pytest.approx(2 / (days / 365.25) * 1000, rel=1e-12)
    low = sps.chi2.ppf(0.025, 4) / 2 / (days / 365.25) * 1000  # Garwood via scipy
    assert r.low == pytest.approx(low, rel=1e-12)


def test_incidence_rejects_null_flag_among_at_risk() -> None:
    bad = _outcome_cohort().with_columns(pl.lit(None, pl.Boolean).alias("incident_ckd"))
    with pytest.raises(ValueError, match="null incident_ckd"):
        crude_proportion(bad, "ckd")
    with pytest.raises(ValueError, match="days_to_x"):
        incidence_rate(_outcome_cohort(), "x")


# --- survival --------------------------------------------------------------------------------


def test_kaplan_meier_matches_lifelines_and_reference() -> None:
    lifelines = _quiet_import("lifelines")
    events = [c != 0 for c in KM_CODES]
    km = kaplan_meier(KM_DURATIONS, events)
    ref = lifelines.KaplanMeierFitter().fit(KM_DURATIONS, events).survival_function_
    assert km.times.tolist() == ref.index.tolist()
    np.testing.assert_allclose(km.values, ref["KM_estimate"].to_numpy(), atol=1e-12)  # lifelines
    # lifelines 0.30.3, and by hand
    hand = {2: 0.9, 4: 0.7875, 5: 0.675, 7: 0.54, 8: 0.405, 9: 0.27, 12: 0.0}
    np.testing.assert_allclose(km.at(list(hand)), list(hand.values()), atol=1e-12)
    assert km.at([-1.0, 0.0, 2.5, 100.0]).tolist() == pytest.approx([1.0, 1.0, 0.9, 0.0])


def test_kaplan_meier_ties_match_lifelines() -> None:
    lifelines = _quiet_import("lifelines")
    rng = np.random.default_rng(7)
    durations = rng.integers(0, 20, 200)
    events = rng.random(200) < 0.6
    km = kaplan_meier(durations, events)
    ref = lifelines.KaplanMeierFitter().fit(durations, events).survival_function_
    assert km.times.tolist() == ref.index.tolist()
    np.testing.assert_allclose(km.values, ref["KM_estimate"].to_numpy(), atol=1e-12)  # lifelines
    # Events before censorings at a tie: at t=3, 1 event and 1 censoring among 3 at risk.
    assert kaplan_meier([3, 3, 5], [1, 0, 1]).at(3).item() == pytest.approx(2 / 3)  # hand


@pytest.mark.parametrize("cause", [1, 2])
def test_aalen_johansen_matches_lifelines(cause: int) -> None:
    lifelines = _quiet_import("lifelines")
    aj = aalen_johansen(KM_DURATIONS, KM_CODES, cause=cause)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fitter = lifelines.AalenJohansenFitter(seed=0, calculate_variance=False)
        ref = fitter.fit(KM_DURATIONS, KM_CODES, event_of_interest=cause).cumulative_density_
    assert aj.times.tolist() == ref.index.tolist()
    np.testing.assert_allclose(aj.values, ref.iloc[:, 0].to_numpy(), atol=1e-12)  # lifelines


def test_aalen_johansen_reference_values_and_identity() -> None:
    cif1 = aalen_johansen(KM_DURATIONS, KM_CODES, cause=1)
    cif2 = aalen_johansen(KM_DURATIONS, KM_CODES, cause=2)
    hand1 = {2: 0.1, 5: 0.2125, 7: 0.3475, 9: 0.4825, 12: 0.7525}  # lifelines 0.30.3 AJ
    np.testing.assert_allclose(cif1.at(list(hand1)), list(hand1.values()), atol=1e-12)
    np.testing.assert_allclose(cif2.at([4, 8]), [0.1125, 0.2475], atol=1e-12)  # lifelines
    km_any = kaplan_meier(KM_DURATIONS, KM_CODES)
    np.testing.assert_allclose(cif1.values + cif2.values, 1 - km_any.values, atol=1e-12)  # identity
    naive = 1 - kaplan_meier(KM_DURATIONS, [c == 1 for c in KM_CODES]).at(9).item()
    assert naive == pytest.approx(0.588571, abs=1e-6)  # lifelines KM: naive 1-KM overestimates
    assert naive > cif1.at(9).item()


def test_aalen_johansen_with_ties_sums_to_one_minus_km() -> None:
    rng = np.random.default_rng(11)
    durations = rng.integers(1, 15, 300)
    codes = rng.choice([0, 1, 2, 3], size=300, p=[0.4, 0.3, 0.2, 0.1])
    total = sum(aalen_johansen(durations, codes, cause=k).values for k in (1, 2, 3))
    # CIF_1 + ... + CIF_k = 1 - S_any holds exactly with ties (Aalen-Johansen identity).
    np.testing.assert_allclose(total, 1 - kaplan_meier(durations, codes).values, atol=1e-12)
    # Hand: tie at t=1 of cause 1, cause 2 and a censoring among 4: CIF1(1) = 1/4, S(1) = 1/2;
    # the one left has cause 1 at t=2: CIF1(2) = 1/4 + 1/2 * 1/1 = 3/4.
    assert aalen_johansen([1, 1, 1, 2], [1, 2, 0, 1], cause=1).values.tolist() == [0, 0.25, 0.75]


def test_competing_risk_data_codes() -> None:
    durations, codes = competing_risk_data(_outcome_cohort(), "ckd")
    # hand: p1 incident at 100; p2 died at 730; p3 incident at 365 (then died: still code 1);
    # p4 horizon; p5 lost contact; p6 not at risk.
    assert durations.tolist() == [100.0, 730.0, 365.0, 1461.0, 500.0]
    assert codes.tolist() == [1, 2, 1, 0, 0]


# --- agreement -------------------------------------------------------------------------------


def test_diagnostic_accuracy_reference_values() -> None:
    acc = diagnostic_accuracy(90, 10, 30, 870)
    # Estimates by hand; Wilson limits from statsmodels 0.15.0 proportion_confint, 4 decimals.
    expected = {
        "sensitivity": (0.75, 0.6656, 0.8189),
        "specificity": (0.98864, 0.9792, 0.9938),
        "ppv": (0.90, 0.8256, 0.9448),
        "npv": (0.96667, 0.9528, 0.9766),
    }
    for name, (estimate, low, high) in expected.items():
        ci = getattr(acc, name)
        assert round(ci.estimate, 5) == estimate
        assert (round(ci.low, 4), round(ci.high, 4)) == (low, high)
    assert acc.lr_positive == pytest.approx(66.0, abs=1e-12)  # hand: 0.75 / (10 / 880)
    assert round(acc.lr_negative, 5) == 0.25287  # hand: 0.25 / (870 / 880)
    assert round(acc.kappa.estimate, 6) == 0.795918  # hand: (.96 - .804) / (1 - .804)
    assert round(acc.kappa_ase, 4) == 0.0311  # statsmodels 0.15.0 cohens_kappa ASE
    assert (round(acc.kappa.low, 4), round(acc.kappa.high, 4)) == (0.7349, 0.8569)  # statsmodels


@pytest.mark.parametrize("cells", [(90, 10, 30, 870), (5, 3, 2, 40), (0, 4, 3, 9), (20, 0, 0, 7)])
def test_kappa_matches_statsmodels_and_sklearn(cells: tuple[int, int, int, int]) -> None:
    inter_rater = _quiet_import("statsmodels.stats.inter_rater")
    metrics = _quiet_import("sklearn.metrics")
    tp, fp, fn, tn = cells
    acc = diagnostic_accuracy(tp, fp, fn, tn)
    res = inter_rater.cohens_kappa(np.array([[tp, fp], [fn, tn]]))
    assert acc.kappa.estimate == pytest.approx(res.kappa, abs=1e-12)  # statsmodels
    assert acc.kappa_ase == pytest.approx(res.std_kappa, abs=1e-12)  # statsmodels ASE
    assert acc.kappa.low == pytest.approx(res.kappa_low, abs=1e-12)  # statsmodels
    assert acc.kappa.high == pytest.approx(res.kappa_upp, abs=1e-12)  # statsmodels
    definition = [1] * (tp + fp) + [0] * (fn + tn)
    reference = [1] * tp + [0] * fp + [1] * fn + [0] * tn
    sk = metrics.cohen_kappa_score(definition, reference)
    assert acc.kappa.estimate == pytest.approx(sk, abs=1e-12)  # scikit-learn


def test_onset_agreement() -> None:
    agg = onset_agreement([-120, -90, 0, 10, 91, 400])
    assert agg.n == 6
    assert agg.median_difference == 5.0  # hand: median of (0, 10)
    assert agg.median_absolute_difference == 90.5  # hand: |.| sorted 0,10,90,91,120,400
    assert agg.within == 3  # hand: -90, 0, 10 (|d| <= 90)
    assert agg.share_within == wilson_interval(3, 6)
    empty = onset_agreement([])
    assert empty.n == 0
    assert math.isnan(empty.median_difference)


# --- dependence ------------------------------------------------------------------------------


def test_odds_ratio_and_phi_reference_table() -> None:
    r = association_2x2(40, 10, 20, 30)
    assert r.odds_ratio == pytest.approx(6.0, rel=1e-12)  # hand: 40*30 / (10*20)
    # hand: Woolf (1955) limits exp(ln 6 +- 1.96 sqrt(1/40 + 1/10 + 1/20 + 1/30))
    assert (round(r.or_low, 4), round(r.or_high, 4)) == (2.4526, 14.6781)
    assert not r.haldane
    assert round(r.phi, 6) == 0.408248  # hand: (40*30 - 10*20) / sqrt(50*50*60*40)
    sample = sps.contingency.odds_ratio([[40, 10], [20, 30]], kind="sample")
    assert r.odds_ratio == pytest.approx(sample.statistic, rel=1e-12)  # scipy sample OR
    x = np.repeat([1, 1, 0, 0], [40, 10, 20, 30])
    y = np.repeat([1, 0, 1, 0], [40, 10, 20, 30])
    # Kendall's tau-b of two binary flags is phi (why it is no longer reported): scipy tau-b
    assert r.phi == pytest.approx(sps.kendalltau(x, y).statistic, abs=1e-12)
    metrics = _quiet_import("sklearn.metrics")
    assert r.phi == pytest.approx(metrics.matthews_corrcoef(x, y), abs=1e-12)  # sklearn MCC


def test_haldane_correction_only_with_a_zero_cell() -> None:
    r = association_2x2(12, 0, 5, 30)
    assert r.haldane
    assert r.odds_ratio == pytest.approx(12.5 * 30.5 / (0.5 * 5.5))  # hand, +0.5 to every cell
    se = math.sqrt(1 / 12.5 + 1 / 0.5 + 1 / 5.5 + 1 / 30.5)
    assert r.or_low == pytest.approx(r.odds_ratio * math.exp(-sps.norm.ppf(0.975) * se))
    assert math.isnan(association_2x2(0, 0, 5, 30).phi)  # no first-outcome cases: phi undefined


def _three_outcome_cohort() -> pl.DataFrame:
    # Hand-made: patient 6 not at risk of b, patient 7 not at risk of a.
    return pl.DataFrame(
        {
            "patient_id": [f"p{i}" for i in range(1, 9)],
            "at_risk_a": [True, True, True, True, True, True, False, True],
            "incident_a": [True, True, False, True, False, True, None, False],
            "at_risk_b": [True, True, True, True, True, False, True, True],
            "incident_b": [True, False, True, True, False, None, True, False],
            "at_risk_c": [True] * 8,
            "incident_c": [True, False, False, True, False, False, True, False],
        }
    )


def test_pairwise_dependence_counts() -> None:
    dep = pairwise_dependence(_three_outcome_cohort(), ["a", "b", "c"])
    assert dep.columns == list(st.DEPENDENCE_SCHEMA)
    cells = dep.select("outcome_1", "outcome_2", "n", "a", "b", "c", "d").rows()
    # hand: a,b among p1-p5 and p8; a,c among all but p7; b,c among all but p6.
    assert cells == [
        ("a", "b", 6, 2, 1, 1, 2),
        ("a", "c", 7, 2, 2, 0, 3),
        ("b", "c", 7, 3, 1, 0, 3),
    ]
    assert dep["haldane"].to_list() == [False, True, True]
    # No age or sex columns: one stratum, E = (a+b)(a+c)/n; a,b: 3 * 3 / 6 = 1.5, O/E 2 / 1.5.
    assert dep["strata"].to_list() == ["none"] * 3
    assert dep["expected"][0] == pytest.approx(1.5)
    assert dep["oe_ratio"][0] == pytest.approx(2 / 1.5)
    garwood = poisson_exact_interval(2, 1.5)  # the exact Poisson interval of 2 over E fixed
    assert (dep["oe_low"][0], dep["oe_high"][0]) == pytest.approx((garwood.low, garwood.high))


def test_expected_co_occurrence_is_stratified_by_age_band_and_sex() -> None:
    # By hand: two outcomes, each frequent in the old and rare in the young, independent
    # within each stratum. Stratum (age band 4, F): n 4, 2 and 2 events, 1 both -> E 1.
    # Stratum (age band 8, F): n 4, 4 and 4 events -> E 4. (band 8, M): n 2, 0 events -> 0.
    rows = pl.DataFrame(
        {
            "age_at_index": [45, 46, 47, 48, 81, 82, 83, 84, 85, 86],
            "sex": ["F"] * 8 + ["M"] * 2,
            "incident_a": [True, True, False, False, True, True, True, True, False, False],
            "incident_b": [True, False, True, False, True, True, True, True, False, False],
        }
    )
    expected, strata = expected_co_occurrence(rows, "a", "b")
    assert expected == pytest.approx(5.0)
    assert strata == "10-year age band x sex"
    # Unstratified it would be 6 * 6 / 10 = 3.6: the shared dependence on age looks like
    # co-occurrence (observed 5).
    assert expected_co_occurrence(rows.drop("age_at_index", "sex"), "a", "b")[0] == 3.6


# --- Table 1 and combinations ----------------------------------------------------------------


def test_table_one_overall_and_by_group() -> None:
    cohort = pl.DataFrame(
        {
            "patient_id": ["p1", "p2", "p3", "p4", "p5"],
            "index_date": [None] * 5,
            "age_at_index": [40, 50, 60, None, 70],
            "sex": ["F", "M", "F", "F", None],
            "smoker": [True, False, None, True, True],
            "at_risk_ckd": [True, True, True, True, False],
            "incident_ckd": [True, False, False, True, None],
            # time_X and event_X are analysis columns after index, never baseline rows.
            "time_ckd": [1, 2, 3, 4, None],
            "event_ckd": [1, 0, 0, 1, None],
            "followup_days": [1, 2, 3, 4, 5],
        }
    ).with_columns(pl.col("index_date").cast(pl.Date))
    t = table_one(cohort, by="incident_ckd")
    assert t.schema == pl.Schema(st.TABLE_ONE_SCHEMA)
    assert t["variable"].unique(maintain_order=True).to_list() == ["age_at_index", "sex", "smoker"]
    groups = ["overall", "incident_ckd=false", "incident_ckd=true", "incident_ckd=null"]
    age = t.filter(pl.col("variable") == "age_at_index")
    assert age["group"].to_list() == groups
    overall = age.row(0, named=True)
    # hand: ages 40, 50, 60, 70; sd = sqrt(500/3); linear quartiles 47.5 and 62.5.
    assert (overall["n"], overall["missing"], overall["mean"], overall["median"]) == (4, 1, 55, 55)
    assert overall["sd"] == pytest.approx(math.sqrt(500 / 3))
    assert (overall["q1"], overall["q3"]) == (47.5, 62.5)
    # incident_ckd=true: p1 (40) and p4 (missing).
    true_age = age.row(2, named=True)
    assert (true_age["n"], true_age["missing"], true_age["mean"], true_age["sd"]) == (
        1,
        1,
        40,
        None,
    )
    sex = t.filter(pl.col("variable") == "sex").select("group", "level", "n", "percent", "missing")
    assert sex.rows() == [
        ("overall", "F", 3, 75.0, 1),  # hand: F,M,F,F of 4 known
        ("overall", "M", 1, 25.0, 1),
        ("incident_ckd=false", "F", 1, 50.0, 0),  # p2 M, p3 F
        ("incident_ckd=false", "M", 1, 50.0, 0),
        ("incident_ckd=true", "F", 2, 100.0, 0),  # p1, p4
        ("incident_ckd=true", "M", 0, 0.0, 0),  # level present in every group
        ("incident_ckd=null", "F", 0, None, 1),  # p5 sex missing: no denominator
        ("incident_ckd=null", "M", 0, None, 1),
    ]
    smoker = t.filter((pl.col("variable") == "smoker") & (pl.col("group") == "overall"))
    assert smoker.select("level", "n", "missing").rows() == [("false", 1, 1), ("true", 3, 1)]


def test_table_one_rejects_unknown_column() -> None:
    with pytest.raises(ValueError, match="nope"):
        table_one(pl.DataFrame({"a": [1]}), by="nope")


def test_outcome_combinations() -> None:
    combos = outcome_combinations(_three_outcome_cohort(), ["a", "b", "c"])
    # hand: at risk of all = p1..p5, p8. p1 a+b+c, p2 a, p3 b, p4 a+b+c, p5 none, p8 none.
    assert combos.rows() == [("a+b+c", 3, 2), ("a", 1, 1), ("b", 1, 1)]
    with_none = outcome_combinations(_three_outcome_cohort(), ["c", "a"], include_none=True)
    # hand, at risk of c and a (all but p7): p1 c+a, p2 a, p3 none, p4 c+a, p5 none, p6 a, p8 none
    assert with_none.rows() == [("none", 0, 3), ("a", 1, 2), ("c+a", 2, 2)]
    with pytest.raises(ValueError, match="distinct"):
        outcome_combinations(_three_outcome_cohort(), ["a", "a"])
