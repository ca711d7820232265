"""Agreement of a case definition with a reference standard.

Validation compares the patients a definition calls cases with a reference (chart review, or
the synthetic ground truth). From the 2x2 table of definition against reference:

- sensitivity, specificity, PPV and NPV, each a proportion with a Wilson interval;
- likelihood ratios ``LR+ = sens / (1 - spec)`` and ``LR- = (1 - sens) / spec``;
- Cohen's kappa, chance-corrected agreement, with the large-sample standard error of Fleiss,
  Cohen and Everitt (1969, *Psychol Bull* 72:323), the "ASE" that statsmodels
  ``cohens_kappa`` reports, and a Wald interval ``kappa +- z * ASE``.

Onset agreement summarises, for patients both sources call cases, the difference between the
definition's onset date and the reference onset date.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike
from scipy import stats

from pipeline.stats._intervals import Interval, wilson_interval

__all__ = ["DiagnosticAccuracy", "OnsetAgreement", "diagnostic_accuracy", "onset_agreement"]


@dataclass(frozen=True, slots=True)
class DiagnosticAccuracy:
    """Accuracy of a binary classification against a reference standard.

    Attributes:
        tp: Definition positive, reference positive.
        fp: Definition positive, reference negative.
        fn: Definition negative, reference positive.
        tn: Definition negative, reference negative.
        sensitivity: ``tp / (tp + fn)`` with Wilson interval.
        specificity: ``tn / (tn + fp)`` with Wilson interval.
        ppv: ``tp / (tp + fp)`` with Wilson interval.
        npv: ``tn / (tn + fn)`` with Wilson interval.
        lr_positive: Positive likelihood ratio (inf when specificity is 1).
        lr_negative: Negative likelihood ratio.
        kappa: Cohen's kappa with its asymptotic (Wald) interval.
        kappa_ase: Asymptotic standard error of kappa (Fleiss, Cohen and Everitt 1969).
    """

    tp: int
    fp: int
    fn: int
    tn: int
    sensitivity: Interval
    specificity: Interval
    ppv: Interval
    npv: Interval
    lr_positive: float
    lr_negative: float
    kappa: Interval
    kappa_ase: float


@dataclass(frozen=True, slots=True)
class OnsetAgreement:
    """Agreement of onset dates between a definition and a reference.

    Attributes:
        n: Pairs of dates compared.
        median_difference: Median of definition minus reference, in days (positive: the
            definition dates onset later).
        median_absolute_difference: Median of the absolute differences, in days.
        within_days: The agreement window, in days.
        within: Pairs whose absolute difference is at most ``within_days``.
        share_within: ``within / n`` with a Wilson interval.
    """

    n: int
    median_difference: float
    median_absolute_difference: float
    within_days: int
    within: int
    share_within: Interval


def _ratio(num: float, den: float) -> float:
    if den == 0:
        return math.nan if num == 0 else math.inf
    return num / den


def _kappa(tp: int, fp: int, fn: int, tn: int) -> tuple[float, float]:
    """Cohen's kappa and its asymptotic standard error for a 2x2 agreement table."""
    table = np.array([[tp, fp], [fn, tn]], dtype=np.float64)
    n = table.sum()
    p = table / n
    rows = p.sum(axis=1)
    cols = p.sum(axis=0)
    observed = float(np.trace(p))
    expected = float(rows @ cols)
    if expected == 1.0:
        return math.nan, math.nan
    kappa = (observed - expected) / (1.0 - expected)
    # Fleiss, Cohen and Everitt (1969): diagonal, off-diagonal and centring terms.
    diag = float(np.sum(np.diag(p) * (1.0 - (rows + cols) * (1.0 - kappa)) ** 2))
    off = p * (cols[:, None] + rows[None, :]) ** 2
    np.fill_diagonal(off, 0.0)
    off_sum = (1.0 - kappa) ** 2 * float(off.sum())
    centre = (kappa - expected * (1.0 - kappa)) ** 2
    variance = (diag + off_sum - centre) / ((1.0 - expected) ** 2 * n)
    return kappa, math.sqrt(max(variance, 0.0))


def diagnostic_accuracy(
    tp: int, fp: int, fn: int, tn: int, *, confidence: float = 0.95
) -> DiagnosticAccuracy:
    """Sensitivity, specificity, predictive values, likelihood ratios and Cohen's kappa.

    Args:
        tp: Definition positive, reference positive.
        fp: Definition positive, reference negative.
        fn: Definition negative, reference positive.
        tn: Definition negative, reference negative.
        confidence: Two-sided confidence level of every interval.

    Returns:
        The measures; proportions with no denominator are NaN.

    Raises:
        ValueError: If a count is negative or not an integer, all counts are 0, or
            ``confidence`` is not in (0, 1).

    Examples:
        >>> acc = diagnostic_accuracy(90, 10, 30, 870)
        >>> acc.sensitivity.estimate, round(acc.kappa.estimate, 6), acc.lr_positive
        (0.75, 0.795918, 66.0)
    """
    counts = (tp, fp, fn, tn)
    if any(isinstance(x, bool) or int(x) != x or x < 0 for x in counts):
        raise ValueError(f"counts must be non-negative integers, got {counts}")
    tp, fp, fn, tn = (int(x) for x in counts)
    if tp + fp + fn + tn == 0:
        raise ValueError("diagnostic accuracy needs at least one patient")
    sens = wilson_interval(tp, tp + fn, confidence=confidence)
    spec = wilson_interval(tn, tn + fp, confidence=confidence)
    kappa, ase = _kappa(tp, fp, fn, tn)
    z = float(stats.norm.ppf(0.5 + confidence / 2.0))
    return DiagnosticAccuracy(
        tp=tp,
        fp=fp,
        fn=fn,
        tn=tn,
        sensitivity=sens,
        specificity=spec,
        ppv=wilson_interval(tp, tp + fp, confidence=confidence),
        npv=wilson_interval(tn, tn + fn, confidence=confidence),
        # From the counts, not the rounded proportions: LR+ = tp(fp+tn) / (fp(tp+fn)).
        lr_positive=_ratio(tp * (fp + tn), fp * (tp + fn)) if tp + fn and fp + tn else math.nan,
        lr_negative=_ratio(fn * (fp + tn), tn * (tp + fn)) if tp + fn and fp + tn else math.nan,
        kappa=Interval(kappa, kappa - z * ase, kappa + z * ase),
        kappa_ase=ase,
    )


def onset_agreement(
    differences_in_days: ArrayLike, *, within_days: int = 90, confidence: float = 0.95
) -> OnsetAgreement:
    """Summarise onset-date differences (definition minus reference) for agreeing cases.

    Args:
        differences_in_days: One difference per patient that both sources call a case.
        within_days: Window for "agrees": absolute difference at most this many days.
        confidence: Two-sided confidence level of the share's Wilson interval.

    Returns:
        Median difference, median absolute difference and the share within the window; NaN
        medians when there are no differences.

    Raises:
        ValueError: If a difference is missing or not finite, or ``within_days`` is negative.

    Examples:
        >>> agg = onset_agreement([-10, 0, 30, 200])
        >>> agg.median_difference, agg.within, agg.share_within.estimate
        (15.0, 3, 0.75)
    """
    diffs = np.asarray(differences_in_days, dtype=np.float64).ravel()
    if not np.all(np.isfinite(diffs)):
        raise ValueError("onset differences must be finite numbers of days")
    if within_days < 0:
        raise ValueError(f"within_days must be non-negative, got {within_days}")
    n = int(diffs.size)
    within = int(np.count_nonzero(np.abs(diffs) <= within_days))
    return OnsetAgreement(
        n=n,
        median_difference=float(np.median(diffs)) if n else math.nan,
        median_absolute_difference=float(np.median(np.abs(diffs))) if n else math.nan,
        within_days=int(within_days),
        within=within,
        share_within=wilson_interval(within, n, confidence=confidence),
    )
