"""The Aalen-Johansen cumulative incidence interval (delta method, log(-log) scale).

Checked against lifelines' ``AalenJohansenFitter``, which implements the same variance
(Collett, *Modelling Survival Data in Medical Research*, 3rd ed., as its docstring says) and the
same log(-log) interval, on data without ties between causes (lifelines jitters those), and
against a variance computed by hand.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest

from pipeline.stats import aalen_johansen, aalen_johansen_interval


def _lifelines():  # type: ignore[no-untyped-def]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return pytest.importorskip("lifelines")


def _untied(seed: int, n: int = 300) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    codes = rng.choice([0, 1, 2], n, p=[0.5, 0.3, 0.2])
    durations = rng.permutation(np.arange(n) + rng.uniform(0.0, 0.5, n))
    return durations, codes


@pytest.mark.parametrize("seed", [3, 8])
def test_variance_and_interval_match_lifelines(seed: int) -> None:
    lifelines = _lifelines()
    durations, codes = _untied(seed)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fitter = lifelines.AalenJohansenFitter(calculate_variance=True)
        fitter.fit(durations, codes, event_of_interest=1)
    times = fitter.variance_.index.to_numpy()[1:-1]  # lifelines' last variance is NaN (n = d)
    ours = aalen_johansen_interval(durations, codes, 1, times)
    reference = fitter.cumulative_density_.iloc[1:-1, 0].to_numpy()
    np.testing.assert_allclose(ours.estimate, reference, atol=1e-12)  # lifelines estimate
    np.testing.assert_allclose(ours.variance, fitter.variance_.iloc[1:-1], rtol=1e-9, atol=1e-15)
    limits = fitter.confidence_interval_.iloc[1:-1].to_numpy()  # lifelines' two columns
    positive = ours.estimate > 0
    np.testing.assert_allclose(ours.low[positive], limits.min(axis=1)[positive], rtol=1e-9)
    np.testing.assert_allclose(ours.high[positive], limits.max(axis=1)[positive], rtol=1e-9)


def test_variance_by_hand() -> None:
    # Times 1..4, causes 1, 2, 1, censored; F(3) = 1/4 + 1/2 * 1/2 = 1/2. By hand, Collett:
    # first term  (1/4)^2 / (4*3) + (1/4)^2 / (3*2) + 0        = 1/64
    # second term 1 * 1*3/4^3 + 0 + (1/2)^2 * 1*1/2^3          = 3/64 + 2/64
    # third term  -2 * ((1/4) * 1 * 1/4^2 + 0 + 0)             = -2/64
    est = aalen_johansen_interval([1, 2, 3, 4], [1, 2, 1, 0], 1, [0.5, 1, 3, 10])
    assert est.estimate.tolist() == [0.0, 0.25, 0.5, 0.5]
    assert est.variance[2] == pytest.approx(4 / 64, abs=1e-15)
    # At t=1: 0 + 3/64 - 0 (nothing after it yet).
    assert est.variance[1] == pytest.approx(3 / 64, abs=1e-15)
    z = 1.959963984540054  # the normal 0.975 quantile
    se = math.sqrt(4 / 64) / (0.5 * math.log(2))
    assert est.low[2] == pytest.approx(0.5 ** math.exp(z * se), rel=1e-9)
    assert est.high[2] == pytest.approx(0.5 ** math.exp(-z * se), rel=1e-9)
    assert est.low[0] == 0.0  # F = 0: no interval on the log(-log) scale
    assert math.isnan(est.high[0])
    assert est.variance[3] == est.variance[2]  # a censoring changes nothing


def test_estimate_is_the_aalen_johansen_curve_with_ties() -> None:
    rng = np.random.default_rng(5)
    durations = rng.integers(1, 30, 400)
    codes = rng.choice([0, 1, 2], 400, p=[0.5, 0.3, 0.2])
    grid = np.arange(0, 31, dtype=np.float64)
    est = aalen_johansen_interval(durations, codes, 1, grid)
    np.testing.assert_allclose(est.estimate, aalen_johansen(durations, codes, 1).at(grid))
    inside = est.estimate > 0
    assert np.all(est.low[inside] < est.estimate[inside])
    assert np.all(est.estimate[inside] < est.high[inside])


def test_bad_arguments() -> None:
    with pytest.raises(ValueError, match="cause"):
        aalen_johansen_interval([1], [1], 0, [1])
    with pytest.raises(ValueError, match="confidence"):
        aalen_johansen_interval([1], [1], 1, [1], confidence=1.0)
