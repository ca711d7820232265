"""Sensitivity and specificity corrected for verification bias (Begg and Greenes 1983).

When a chart review samples the definition's positives and negatives separately (say 100 of
each, out of a few hundred positives and tens of thousands of negatives), the reviewed table
over-represents the positives, and its sensitivity and specificity are biased. The predictive
values are not: within each definition stratum the reviewed patients are a random sample.
Begg and Greenes (1983, *Biometrics* 39:207) recover the accuracy from them and the stratum
sizes ``N+`` and ``N-`` of the whole extract::

    sensitivity = N+ PPV / (N+ PPV + N- (1 - NPV))
    specificity = N- NPV / (N- NPV + N+ (1 - PPV))

the same as weighting each reviewed patient by the inverse of its stratum's sampling fraction.
Intervals are by the delta method on the logit scale, with ``N+`` and ``N-`` fixed (they are
counted, not sampled) and PPV, NPV independent binomial proportions (separate samples):
``logit(sens) = log(N+/N-) + log(PPV) - log(1 - NPV)``, so
``Var = (1 - PPV) / (n+ PPV) + NPV / (n- (1 - NPV))`` with ``n+``, ``n-`` the reviewed
patients of each stratum; likewise for specificity. Where a reviewed cell is 0 the logit is
infinite and the interval is not estimable (NaN).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from scipy import stats

from pipeline.stats._intervals import Interval

__all__ = ["CorrectedAccuracy", "verification_corrected"]

_NAN = float("nan")


@dataclass(frozen=True, slots=True)
class CorrectedAccuracy:
    """Sensitivity and specificity of the whole extract, from a sample drawn by definition status.

    Attributes:
        sensitivity: Begg-Greenes sensitivity with its logit delta-method interval.
        specificity: Begg-Greenes specificity with its logit delta-method interval.
    """

    sensitivity: Interval
    specificity: Interval


def _logit_interval(p: float, variance: float, z: float) -> Interval:
    if not 0.0 < p < 1.0 or not math.isfinite(variance):
        return Interval(p, _NAN, _NAN)
    logit = math.log(p / (1.0 - p))
    half = z * math.sqrt(variance)
    return Interval(
        p, 1.0 / (1.0 + math.exp(-(logit - half))), 1.0 / (1.0 + math.exp(-(logit + half)))
    )


def verification_corrected(
    tp: int, fp: int, fn: int, tn: int, positives: int, negatives: int, *, confidence: float = 0.95
) -> CorrectedAccuracy:
    """Begg-Greenes sensitivity and specificity (see the module docstring).

    Args:
        tp: Reviewed definition positives the reference calls cases.
        fp: Reviewed definition positives the reference calls no case.
        fn: Reviewed definition negatives the reference calls cases.
        tn: Reviewed definition negatives the reference calls no case.
        positives: Definition positives in the whole extract (``N+``, at least ``tp + fp``).
        negatives: Definition negatives in the whole extract (``N-``, at least ``fn + tn``).
        confidence: Two-sided confidence level.

    Returns:
        Corrected sensitivity and specificity; NaN where a stratum has nobody reviewed.

    Raises:
        ValueError: If a count is negative, or a stratum has more reviewed than exist.

    Examples:
        >>> r = verification_corrected(80, 20, 10, 90, positives=200, negatives=1800)
        >>> round(r.sensitivity.estimate, 6), round(r.specificity.estimate, 6)
        (0.470588, 0.975904)
    """
    counts = (tp, fp, fn, tn, positives, negatives)
    if any(isinstance(x, bool) or int(x) != x or x < 0 for x in counts):
        raise ValueError(f"counts must be non-negative integers, got {counts}")
    if tp + fp > positives or fn + tn > negatives:
        raise ValueError("a stratum has more reviewed patients than the extract holds")
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must lie strictly between 0 and 1, got {confidence!r}")
    n_pos, n_neg = tp + fp, fn + tn
    if n_pos == 0 or n_neg == 0:
        return CorrectedAccuracy(Interval(_NAN, _NAN, _NAN), Interval(_NAN, _NAN, _NAN))
    ppv, miss = tp / n_pos, fn / n_neg  # miss = 1 - NPV
    z = float(stats.norm.ppf(0.5 + confidence / 2.0))
    found, missed = positives * ppv, negatives * miss
    cleared, wrong = negatives * (1.0 - miss), positives * (1.0 - ppv)
    sens = found / (found + missed) if found + missed else _NAN
    spec = cleared / (cleared + wrong) if cleared + wrong else _NAN
    with_inf = math.inf
    var_sens = (
        (1.0 - ppv) / (n_pos * ppv) + (1.0 - miss) / (n_neg * miss)
        if ppv > 0 and miss > 0
        else with_inf
    )
    var_spec = (
        miss / (n_neg * (1.0 - miss)) + ppv / (n_pos * (1.0 - ppv))
        if miss < 1 and ppv < 1
        else with_inf
    )
    return CorrectedAccuracy(_logit_interval(sens, var_sens, z), _logit_interval(spec, var_spec, z))
