"""Single-site accuracy: confidence intervals for a proportion and 2×2-table ratios.

Every public function takes plain counts, checks them once at the door and returns an
:class:`~federation.stats.results.Interval` (or a pair of them). Counts must be whole numbers; a
float such as ``15.0`` is accepted, ``15.5`` is not.
"""

from __future__ import annotations

import math
import operator
from typing import NamedTuple

import numpy as np
from scipy import stats

from federation.stats.results import Interval

__all__ = [
    "LikelihoodRatios",
    "clopper_pearson",
    "diagnostic_odds_ratio",
    "jeffreys",
    "likelihood_ratios",
    "predictive_values",
    "wilson",
    "wilson_cc",
]


class LikelihoodRatios(NamedTuple):
    """Positive and negative likelihood ratios, each with its confidence interval."""

    positive: Interval
    negative: Interval


def _whole_number(value: object) -> int | None:
    """The integer a count stands for, or None if it is not a whole number (booleans are not)."""
    if isinstance(value, (bool, np.bool_)):
        return None
    try:
        return operator.index(value)  # int and NumPy integer types
    except TypeError:
        pass
    if isinstance(value, (float, np.floating)) and float(value).is_integer():
        return int(value)
    return None


def _as_count(value: object, name: str) -> int:
    count = _whole_number(value)
    if count is None:
        raise ValueError(f"{name} must be a whole-number count, got {value!r}")
    if count < 0:
        raise ValueError(f"{name} must not be negative, got {count}")
    return count


def _as_probability(value: object, name: str) -> float:
    number = math.nan
    if not isinstance(value, (bool, np.bool_, str)):
        try:
            number = float(value)  # type: ignore[arg-type]
        except (TypeError, ValueError):
            number = math.nan
    if not 0.0 <= number <= 1.0:
        raise ValueError(f"{name} must lie in [0, 1], got {value!r}")
    return number


def _check_level(level: float) -> float:
    if not isinstance(level, (int, float, np.floating)) or not 0.0 < float(level) < 1.0:
        raise ValueError(f"level must be a number strictly between 0 and 1, got {level!r}")
    return float(level)


def _check_proportion(x: object, n: object, level: float) -> tuple[int, int, float]:
    count, total = _as_count(x, "x"), _as_count(n, "n")
    if total == 0:
        raise ValueError("n must be positive: a proportion needs at least one observation")
    if count > total:
        raise ValueError(f"x ({count}) cannot exceed n ({total})")
    return count, total, _check_level(level)


def _check_table(tp: object, fp: object, fn: object, tn: object) -> tuple[int, int, int, int]:
    cells = tuple(_as_count(v, name) for v, name in ((tp, "tp"), (fp, "fp"), (fn, "fn"), (tn, "tn")))
    a, b, c, d = cells
    if a + c == 0:
        raise ValueError("the table has no participants with the condition (tp + fn == 0)")
    if b + d == 0:
        raise ValueError("the table has no participants without the condition (fp + tn == 0)")
    return a, b, c, d


def _z(level: float) -> float:
    return float(stats.norm.ppf(0.5 + level / 2.0))


def wilson(x: int, n: int, level: float = 0.95) -> Interval:
    r"""Wilson score interval for a binomial proportion.

    Parameters
    ----------
    x : int
        Number of successes (for sensitivity: true positives).
    n : int
        Number of trials (for sensitivity: participants with the condition); must be positive.
    level : float, default 0.95
        Confidence level.

    Returns
    -------
    Interval
        ``estimate = x / n`` and the score limits.

    Notes
    -----
    With :math:`p = x/n` and :math:`z` the :math:`1 - \alpha/2` normal quantile,

    .. math:: \frac{2np + z^2 \pm z\sqrt{z^2 + 4np(1-p)}}{2(n + z^2)}.

    The lower limit is exactly 0 when ``x == 0`` and the upper exactly 1 when ``x == n``.

    References
    ----------
    Wilson EB (1927). Probable inference, the law of succession, and statistical inference.
    JASA 22:209–212. Newcombe RG (1998). Two-sided confidence intervals for the single proportion:
    comparison of seven methods. Stat Med 17:857–872 (method 3).
    """
    x, n, level = _check_proportion(x, n, level)
    z = _z(level)
    p = x / n
    centre = 2 * n * p + z * z
    half = z * math.sqrt(z * z + 4 * n * p * (1 - p))
    denominator = 2 * (n + z * z)
    low = 0.0 if x == 0 else (centre - half) / denominator
    high = 1.0 if x == n else (centre + half) / denominator
    return Interval(p, low, high, "Wilson score", level)


def wilson_cc(x: int, n: int, level: float = 0.95) -> Interval:
    r"""Wilson score interval with continuity correction (Newcombe 1998, method 4).

    Parameters
    ----------
    x : int
        Number of successes.
    n : int
        Number of trials; must be positive.
    level : float, default 0.95
        Confidence level.

    Returns
    -------
    Interval

    Notes
    -----
    .. math::

        L = \frac{2np + z^2 - 1 - z\sqrt{z^2 - 2 - 1/n + 4p\{n(1-p) + 1\}}}{2(n + z^2)},\qquad
        U = \frac{2np + z^2 + 1 + z\sqrt{z^2 + 2 - 1/n + 4p\{n(1-p) - 1\}}}{2(n + z^2)},

    with :math:`L = 0` when ``x == 0`` and :math:`U = 1` when ``x == n``.

    References
    ----------
    Newcombe RG (1998). Stat Med 17:857–872, method 4.
    """
    x, n, level = _check_proportion(x, n, level)
    z = _z(level)
    z2 = z * z
    p = x / n
    denominator = 2 * (n + z2)
    if x == 0:
        low = 0.0
    else:
        root = math.sqrt(max(0.0, z2 - 2 - 1 / n + 4 * p * (n * (1 - p) + 1)))
        low = max(0.0, (2 * n * p + z2 - 1 - z * root) / denominator)
    if x == n:
        high = 1.0
    else:
        root = math.sqrt(max(0.0, z2 + 2 - 1 / n + 4 * p * (n * (1 - p) - 1)))
        high = min(1.0, (2 * n * p + z2 + 1 + z * root) / denominator)
    return Interval(p, low, high, "Wilson score with continuity correction", level)


def clopper_pearson(x: int, n: int, level: float = 0.95) -> Interval:
    r"""Clopper–Pearson ("exact") interval for a binomial proportion.

    Parameters
    ----------
    x : int
        Number of successes.
    n : int
        Number of trials; must be positive.
    level : float, default 0.95
        Confidence level.

    Returns
    -------
    Interval

    Notes
    -----
    The limits are beta quantiles, :math:`L = B_{\alpha/2}(x, n - x + 1)` and
    :math:`U = B_{1-\alpha/2}(x + 1, n - x)`, with :math:`L = 0` when ``x == 0`` and :math:`U = 1`
    when ``x == n``.

    References
    ----------
    Clopper CJ, Pearson ES (1934). The use of confidence or fiducial limits illustrated in the case
    of the binomial. Biometrika 26:404–413. Newcombe (1998), method 5.
    """
    x, n, level = _check_proportion(x, n, level)
    alpha = 1 - level
    low = 0.0 if x == 0 else float(stats.beta.ppf(alpha / 2, x, n - x + 1))
    high = 1.0 if x == n else float(stats.beta.isf(alpha / 2, x + 1, n - x))
    return Interval(x / n, low, high, "Clopper-Pearson exact", level)


def jeffreys(x: int, n: int, level: float = 0.95) -> Interval:
    r"""Jeffreys interval: equal-tailed posterior interval under a Beta(1/2, 1/2) prior.

    Parameters
    ----------
    x : int
        Number of successes.
    n : int
        Number of trials; must be positive.
    level : float, default 0.95
        Confidence level.

    Returns
    -------
    Interval

    Notes
    -----
    :math:`L = B_{\alpha/2}(x + 1/2, n - x + 1/2)`, :math:`U = B_{1-\alpha/2}(x + 1/2, n - x + 1/2)`,
    with the boundary modification of Brown, Cai & DasGupta: :math:`L = 0` when ``x == 0`` and
    :math:`U = 1` when ``x == n``.

    References
    ----------
    Brown LD, Cai TT, DasGupta A (2001). Interval estimation for a binomial proportion.
    Statistical Science 16:101–133.
    """
    x, n, level = _check_proportion(x, n, level)
    alpha = 1 - level
    low = 0.0 if x == 0 else float(stats.beta.ppf(alpha / 2, x + 0.5, n - x + 0.5))
    high = 1.0 if x == n else float(stats.beta.isf(alpha / 2, x + 0.5, n - x + 0.5))
    return Interval(x / n, low, high, "Jeffreys (equal-tailed, boundary-modified)", level)


def predictive_values(sensitivity: float, specificity: float, prevalence: float) -> tuple[float | None, float | None]:
    r"""Positive and negative predictive values at a given prevalence (Bayes' theorem).

    Parameters
    ----------
    sensitivity, specificity : float
        Accuracy of the test, each in [0, 1].
    prevalence : float
        Pre-test probability of the condition in the population of interest, in [0, 1].

    Returns
    -------
    ppv, npv : float or None
        ``None`` where the value is undefined (no one would test positive, or negative).

    Notes
    -----
    .. math::

        \mathrm{PPV} = \frac{\mathrm{Se}\,\pi}{\mathrm{Se}\,\pi + (1 - \mathrm{Sp})(1 - \pi)},\qquad
        \mathrm{NPV} = \frac{\mathrm{Sp}(1 - \pi)}{\mathrm{Sp}(1 - \pi) + (1 - \mathrm{Se})\pi}.

    References
    ----------
    Altman DG, Bland JM (1994). Diagnostic tests 2: predictive values. BMJ 309:102.
    """
    se = _as_probability(sensitivity, "sensitivity")
    sp = _as_probability(specificity, "specificity")
    pi = _as_probability(prevalence, "prevalence")
    true_positive, false_positive = se * pi, (1 - sp) * (1 - pi)
    true_negative, false_negative = sp * (1 - pi), (1 - se) * pi
    positive, negative = true_positive + false_positive, true_negative + false_negative
    ppv = true_positive / positive if positive > 0 else None
    npv = true_negative / negative if negative > 0 else None
    return ppv, npv


def _corrected_table(tp: object, fp: object, fn: object, tn: object) -> tuple[tuple[float, float, float, float], str]:
    a, b, c, d = _check_table(tp, fp, fn, tn)
    if 0 in (a, b, c, d):
        note = "; 0.5 added to every cell because a cell was 0"
        return (a + 0.5, b + 0.5, c + 0.5, d + 0.5), note
    return (float(a), float(b), float(c), float(d)), ""


def _log_interval(log_estimate: float, log_se: float, level: float, method: str) -> Interval:
    half = _z(level) * log_se
    return Interval(
        math.exp(log_estimate),
        math.exp(log_estimate - half),
        math.exp(log_estimate + half),
        method,
        level,
    )


def likelihood_ratios(tp: int, fp: int, fn: int, tn: int, level: float = 0.95) -> LikelihoodRatios:
    r"""Positive and negative likelihood ratios with log-method confidence intervals.

    Parameters
    ----------
    tp, fp, fn, tn : int
        Cells of the 2×2 table of test result against reference standard.
    level : float, default 0.95
        Confidence level.

    Returns
    -------
    LikelihoodRatios
        ``positive`` (LR+) and ``negative`` (LR−).

    Notes
    -----
    With :math:`n_1 = tp + fn` and :math:`n_0 = fp + tn`,
    :math:`\mathrm{LR}^+ = (tp/n_1)/(fp/n_0)` and :math:`\mathrm{LR}^- = (fn/n_1)/(tn/n_0)`, with
    :math:`\mathrm{SE}(\log \mathrm{LR}^+) = \sqrt{1/tp - 1/n_1 + 1/fp - 1/n_0}` and
    :math:`\mathrm{SE}(\log \mathrm{LR}^-) = \sqrt{1/fn - 1/n_1 + 1/tn - 1/n_0}`. When any cell is 0,
    0.5 is added to every cell (the ``method`` says so).

    References
    ----------
    Simel DL, Samsa GP, Matchar DB (1991). Likelihood ratios with confidence: sample size estimation
    for diagnostic test studies. J Clin Epidemiol 44:763–770.
    """
    level = _check_level(level)
    (a, b, c, d), correction = _corrected_table(tp, fp, fn, tn)
    diseased, healthy = a + c, b + d
    log_positive = math.log((a / diseased) / (b / healthy))
    log_negative = math.log((c / diseased) / (d / healthy))
    se_positive = math.sqrt(1 / a - 1 / diseased + 1 / b - 1 / healthy)
    se_negative = math.sqrt(1 / c - 1 / diseased + 1 / d - 1 / healthy)
    method = "log method (Simel 1991)" + correction
    return LikelihoodRatios(
        _log_interval(log_positive, se_positive, level, method),
        _log_interval(log_negative, se_negative, level, method),
    )


def diagnostic_odds_ratio(tp: int, fp: int, fn: int, tn: int, level: float = 0.95) -> Interval:
    r"""Diagnostic odds ratio with a log-method (Woolf) confidence interval.

    Parameters
    ----------
    tp, fp, fn, tn : int
        Cells of the 2×2 table of test result against reference standard.
    level : float, default 0.95
        Confidence level.

    Returns
    -------
    Interval

    Notes
    -----
    :math:`\mathrm{DOR} = (tp \cdot tn)/(fp \cdot fn)` and
    :math:`\mathrm{SE}(\log \mathrm{DOR}) = \sqrt{1/tp + 1/fp + 1/fn + 1/tn}`. When any cell is 0,
    0.5 is added to every cell (the ``method`` says so).

    References
    ----------
    Glas AS, Lijmer JG, Prins MH, Bonsel GJ, Bossuyt PMM (2003). The diagnostic odds ratio: a single
    indicator of test performance. J Clin Epidemiol 56:1129–1135.
    """
    level = _check_level(level)
    (a, b, c, d), correction = _corrected_table(tp, fp, fn, tn)
    log_dor = math.log(a) + math.log(d) - math.log(b) - math.log(c)
    log_se = math.sqrt(1 / a + 1 / b + 1 / c + 1 / d)
    return _log_interval(log_dor, log_se, level, "log method (Woolf)" + correction)
