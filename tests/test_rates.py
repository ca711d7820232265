"""Rates from person-time, direct and indirect standardisation, and the standard populations."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from statsmodels.stats.rates import confint_poisson

from pipeline.errors import AscertainError, ConfigError
from pipeline.stats import (
    band_rates,
    crude_rate,
    direct_standardised_rate,
    parse_age_band,
    poisson_exact_interval,
    read_standard_population,
    shipped_standard,
    standardised_ratio,
    weights_for_bands,
)

# --- a published worked example ------------------------------------------------------------


def test_direct_standardisation_reproduces_the_papp101_worked_example() -> None:
    # IUSSP online course "Population Analysis for Policies and Programmes" (PAPP101), session
    # 6, "Standardisation (cont.): choosing the standard population": Sweden's mortality rates
    # per 1,000 by age (0-29: 0.45, 30-59: 2.4, 60+: 42.4) applied to Ecuador's population
    # (7,498,000; 3,219,000; 742,000) give 3,374, 7,725 and 31,461 expected deaths, 42,560 in
    # all, and an age-adjusted rate of 42,560 / 11,459,000 = 3.7 per 1,000 person-years.
    events = [45, 240, 4240]  # over 100,000 person-years each: the published rates
    person_years = [100_000.0] * 3
    standard = [7_498_000, 3_219_000, 742_000]
    rates = [r.estimate for r in band_rates(events, person_years)]
    expected = [rate / 1000 * w for rate, w in zip(rates, standard, strict=True)]
    published = [3374, 7725, 31461]  # rounded to whole deaths in the course
    assert all(abs(e - p) < 1 for e, p in zip(expected, published, strict=True))
    assert abs(sum(expected) - 42560) < 1
    dsr = direct_standardised_rate(events, person_years, standard)
    assert round(dsr.estimate, 1) == 3.7
    assert dsr.low < dsr.estimate < dsr.high


# --- properties ----------------------------------------------------------------------------


@settings(max_examples=60, deadline=None)
@given(
    k=st.integers(0, 400),
    py=st.floats(0.5, 1e5, allow_nan=False),
    weight=st.floats(0.01, 1e6, allow_nan=False),
    confidence=st.sampled_from([0.8, 0.9, 0.95, 0.99]),
)
def test_one_band_is_the_exact_poisson_interval(
    k: int, py: float, weight: float, confidence: float
) -> None:
    dsr = direct_standardised_rate([k], [py], [weight], per=1000.0, confidence=confidence)
    exact = poisson_exact_interval(k, py, confidence=confidence)
    assert dsr.estimate == pytest.approx(exact.estimate * 1000, rel=1e-9, abs=1e-12)
    assert dsr.low == pytest.approx(exact.low * 1000, rel=1e-7, abs=1e-12)
    assert dsr.high == pytest.approx(exact.high * 1000, rel=1e-7)


@settings(max_examples=60, deadline=None)
@given(
    data=st.lists(st.tuples(st.integers(0, 200), st.integers(1, 50)), min_size=2, max_size=8),
    scale=st.floats(0.5, 500.0, allow_nan=False),
)
def test_proportional_person_time_gives_the_crude_rate(
    data: list[tuple[int, int]], scale: float
) -> None:
    # When each band's person-time is the same multiple of its standard weight, the
    # standardised rate is the crude rate: sum(w_i d_i / n_i) = sum(d_i) / sum(n_i).
    events = [d for d, _ in data]
    weights = [float(w) for _, w in data]
    person_years = [w * scale for w in weights]
    dsr = direct_standardised_rate(events, person_years, weights)
    crude = crude_rate(events, person_years)
    assert dsr.estimate == pytest.approx(crude.estimate, rel=1e-9, abs=1e-12)


# --- the Fay-Feuer interval against an independent computation -----------------------------


def _fay_feuer_by_chi2(
    d: list[int], n: list[float], w: list[float], alpha: float
) -> tuple[float, float]:
    """Fay and Feuer (1997), written as in their paper with chi-square quantiles.

    lower = v / (2y) * chi2(a/2; 2y^2 / v), upper = (v + m^2) / (2(y + m)) *
    chi2(1 - a/2; 2(y + m)^2 / (v + m^2)); formula from memory of the paper.
    """
    share = np.array(w) / sum(w)
    dd, nn = np.array(d, dtype=float), np.array(n)
    y = float(np.sum(share * dd / nn))
    v = float(np.sum(share**2 * dd / nn**2))
    m = float(np.max(share / nn))
    low = 0.0 if y == 0 else v / (2 * y) * stats.chi2.ppf(alpha / 2, 2 * y * y / v)
    high = (
        (v + m * m) / (2 * (y + m)) * stats.chi2.ppf(1 - alpha / 2, 2 * (y + m) ** 2 / (v + m * m))
    )
    return float(low), float(high)


@pytest.mark.parametrize(
    ("events", "person_years", "weights"),
    [
        ([3, 10, 25, 40], [1200.0, 900.0, 650.0, 300.0], [7000, 6500, 5000, 2500]),
        ([0, 1, 0, 2], [5000.0, 300.0, 80.0, 12.5], [8860, 8690, 8600, 8470]),
        ([0, 0, 0], [100.0, 200.0, 300.0], [1, 2, 3]),
    ],
)
def test_fay_feuer_matches_the_chi_square_form(
    events: list[int], person_years: list[float], weights: list[float]
) -> None:
    dsr = direct_standardised_rate(events, person_years, weights, per=1.0)
    low, high = _fay_feuer_by_chi2(events, person_years, weights, 0.05)
    assert dsr.low == pytest.approx(low, rel=1e-9, abs=1e-15)
    assert dsr.high == pytest.approx(high, rel=1e-9)


def test_zero_events_give_a_zero_lower_limit_and_the_one_event_upper_limit() -> None:
    dsr = direct_standardised_rate([0, 0], [100.0, 400.0], [1, 1], per=1.0)
    assert dsr.estimate == 0.0
    assert dsr.low == 0.0
    # m = max(0.5 / 100, 0.5 / 400) = 0.005; upper = m * chi2(0.975, 2) / 2
    assert dsr.high == pytest.approx(0.005 * stats.chi2.ppf(0.975, 2) / 2)


def test_one_band_agrees_with_statsmodels_exact_poisson() -> None:
    # statsmodels (0.14/0.15) has no directly-standardised-rate interval; its exact Poisson
    # interval ("exact-c", Garwood) is the one-band case.
    low, high = confint_poisson(17, 2500.0, method="exact-c")
    dsr = direct_standardised_rate([17], [2500.0], [1.0], per=1.0)
    assert (dsr.low, dsr.high) == (pytest.approx(low, rel=1e-7), pytest.approx(high, rel=1e-7))


def test_a_weighted_band_without_person_time_is_refused() -> None:
    with pytest.raises(ValueError, match="band 1 has a standard weight but no person-time"):
        direct_standardised_rate([1, 0], [10.0, 0.0], [1, 1])
    # a band of zero weight is left out whatever its person-time
    assert direct_standardised_rate([1, 0], [10.0, 0.0], [1, 0], per=1).estimate == 0.1


def test_band_and_crude_rates_use_the_garwood_interval() -> None:
    (band,) = band_rates([12], [1000.0])
    exact = poisson_exact_interval(12, 1000.0)
    assert (band.low, band.high) == (exact.low * 1000, exact.high * 1000)
    crude = crude_rate([5, 7], [400.0, 600.0])
    assert crude.estimate == pytest.approx(12.0)
    assert crude.low == pytest.approx(exact.low * 1000)


def test_smr_has_the_exact_interval_of_the_observed_count() -> None:
    smr = standardised_ratio([30, 40], [10_000.0, 5_000.0], [2.0, 8.0])
    assert smr.expected == pytest.approx(20.0 + 40.0)
    assert smr.ratio == pytest.approx(70 / 60)
    # Garwood limits of 70 events, computed here with scipy directly, over a fixed 60
    assert smr.low == pytest.approx(stats.chi2.ppf(0.025, 140) / 2 / 60)
    assert smr.high == pytest.approx(stats.chi2.ppf(0.975, 142) / 2 / 60)
    assert math.isnan(standardised_ratio([0], [0.0], [1.0]).ratio)


# --- standard populations ------------------------------------------------------------------


def test_esp2013_sums_to_its_stated_total() -> None:
    esp = shipped_standard("esp2013")
    assert esp.stated_total == 100_000
    assert esp.listed_total == 100_000
    assert esp.bands[0] == (0, 4)
    assert esp.bands[-1] == (95, None)
    assert len(esp.bands) == 20
    assert "Eurostat" in esp.source
    assert esp.figures


def test_who_standard_does_not_sum_to_its_stated_total_and_says_so() -> None:
    # The figures as we have them (0-64 checked against a published copy, older ages from
    # memory) add up to 100,035 per 100,000; the file says so instead of adjusting them.
    who = shipped_standard("who2000_2025")
    assert who.stated_total == 100_000
    assert who.listed_total == 100_035
    assert "100,035" in who.note
    assert who.bands[-1] == (100, None)
    assert len(who.bands) == 21
    assert "Ahmad" in who.source
    assert "from memory" in who.figures


def test_study_bands_take_the_sum_of_whole_standard_bands() -> None:
    esp = shipped_standard("esp2013")
    bands = [parse_age_band(b) for b in ("40-49", "50-59", "60-69", "70-79", "80+")]
    assert weights_for_bands(esp, bands) == [14000, 13500, 11500, 9000, 5000]


@pytest.mark.parametrize(
    ("band", "message"),
    [
        ("18-29", "the age band 18-29 cuts the band 15-19"),
        ("40-47", "the age band 40-47 cuts the band 45-49"),
        ("90-99", "the age band 90-99 cuts the band 95+"),
    ],
)
def test_a_band_cutting_a_standard_band_is_refused(band: str, message: str) -> None:
    with pytest.raises(AscertainError, match=message):
        weights_for_bands(shipped_standard("esp2013"), [parse_age_band(band)])


def test_age_band_labels() -> None:
    assert parse_age_band("80+") == (80, None)
    with pytest.raises(ValueError, match="'eighty' is not of the form"):
        parse_age_band("eighty")


def test_a_users_standard_population_file(tmp_path: Path) -> None:
    path = tmp_path / "orvane_bay_2020.csv"
    path.write_text(
        "# standard: Orvane Bay resident population 2020\n"
        "# source: Orvane Bay statistics office (fictional)\n"
        "# figures: invented for this test\n"
        "# stated_total: 1000\n"
        "age_start,age_end,weight\n"
        "0,39,600\n40,64,300\n65,,100\n",
        encoding="utf-8",
    )
    std = read_standard_population(path)
    assert std.bands == ((0, 39), (40, 64), (65, None))
    assert std.listed_total == std.stated_total == 1000
    assert weights_for_bands(std, [(40, 64), (65, None)]) == [300, 100]


@pytest.mark.parametrize(
    ("body", "located"),
    [
        ("0,39,600\n40,64,lots\n65,,100\n", "x.csv:7 [bad-standard] '40,64,lots' is not"),
        ("0,39,600\n41,64,300\n", "x.csv:7 [bad-standard] band starting at 41 does not follow"),
        ("0,39,600\n40,64\n", "x.csv:7 [bad-standard] expected 3 fields, found 2"),
        ("0,,600\n40,64,1\n", "x.csv:7 [bad-standard] band starting at 40 does not follow"),
    ],
)
def test_bad_lines_of_a_users_file_are_located(tmp_path: Path, body: str, located: str) -> None:
    path = tmp_path / "x.csv"
    header = "# standard: s\n# source: s\n# figures: s\n# stated_total: 1000\n"
    path.write_text(header + "age_start,age_end,weight\n" + body, encoding="utf-8")
    with pytest.raises(ConfigError) as err:
        read_standard_population(path)
    assert located in str(err.value)


def test_a_users_file_without_its_source_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "x.csv"
    path.write_text("# standard: s\nage_start,age_end,weight\n0,,1\n", encoding="utf-8")
    with pytest.raises(ConfigError, match=r"x.csv:1 \[missing-key\] .*source, figures"):
        read_standard_population(path)
