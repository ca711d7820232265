"""Begg-Greenes correction for verification bias, checked by hand-computed examples."""

from __future__ import annotations

import math

import numpy as np
import pytest

from pipeline.stats import verification_corrected


def test_estimates_equal_inverse_sampling_fraction_weighting() -> None:
    # 100 of 200 definition positives reviewed (80 TP, 20 FP), 100 of 1800 negatives
    # (10 FN, 90 TN). By hand: weights 2 and 18 give TP 160, FP 40, FN 180, TN 1620, so
    # sensitivity 160 / 340 and specificity 1620 / 1660 (Begg and Greenes 1983, eq. 1-2).
    r = verification_corrected(80, 20, 10, 90, positives=200, negatives=1800)
    assert r.sensitivity.estimate == pytest.approx(160 / 340)
    assert r.specificity.estimate == pytest.approx(1620 / 1660)


def test_logit_delta_method_interval_by_hand() -> None:
    r = verification_corrected(80, 20, 10, 90, positives=200, negatives=1800)
    z = 1.959963984540054  # the normal 0.975 quantile
    # Var logit(sens) = (1 - PPV) / (n+ PPV) + NPV / (n- (1 - NPV)) = 0.2/80 + 0.9/10 = 0.0925
    logit = math.log(160 / 180)
    low, high = (1 / (1 + math.exp(-(logit + s * z * math.sqrt(0.0925)))) for s in (-1, 1))
    assert (r.sensitivity.low, r.sensitivity.high) == pytest.approx((low, high), rel=1e-12)
    # Var logit(spec) = (1 - NPV) / (n- NPV) + PPV / (n+ (1 - PPV)) = 0.1/90 + 0.8/20
    logit = math.log(1620 / 40)
    half = z * math.sqrt(0.1 / 90 + 0.8 / 20)
    assert r.specificity.low == pytest.approx(1 / (1 + math.exp(-(logit - half))), rel=1e-12)


def test_interval_covers_in_simulation() -> None:
    # Monte Carlo: a population of 200 positives (PPV 0.8) and 1800 negatives (NPV 0.9),
    # samples of 100 per stratum; the 95% interval should cover the true sensitivity
    # (160/340) in roughly 95% of draws (common practice for checking an interval).
    rng = np.random.default_rng(7)
    truth, covered = 160 / 340, 0
    draws = 2000
    for _ in range(draws):
        tp = int(rng.hypergeometric(160, 40, 100))
        fn = int(rng.hypergeometric(180, 1620, 100))
        s = verification_corrected(tp, 100 - tp, fn, 100 - fn, 200, 1800).sensitivity
        covered += s.low <= truth <= s.high
    assert 0.92 <= covered / draws <= 0.99


def test_degenerate_and_bad_input() -> None:
    r = verification_corrected(10, 0, 0, 10, positives=20, negatives=20)
    assert r.sensitivity.estimate == 1.0
    assert math.isnan(r.sensitivity.low)  # a zero cell: the logit is infinite
    assert math.isnan(verification_corrected(0, 0, 1, 1, 5, 5).sensitivity.estimate)
    with pytest.raises(ValueError, match="more reviewed"):
        verification_corrected(10, 0, 0, 10, positives=5, negatives=20)
