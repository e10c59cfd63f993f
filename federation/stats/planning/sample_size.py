"""The participants one site needs for a sensitivity or specificity interval: Buderer's (1996) closed form."""

from __future__ import annotations

import math

from scipy import stats

from federation.stats.proportions import _check_level
from federation.stats.serial import PoolingError

from .scenario import MEASURES, _check_probability


def buderer_sample_size(
    expected: float, half_width: float, prevalence: float, measure: str = "sensitivity", level: float = 0.95
) -> int:
    r"""Participants one site needs so that the Wald interval of sensitivity or specificity has a given half-width.

    Parameters
    ----------
    expected : float
        Expected sensitivity (or specificity), in (0, 1).
    half_width : float
        Wanted half-width :math:`W` of the interval (the interval is :math:`\hat p \pm W`).
    prevalence : float
        Expected prevalence of the condition among participants, in (0, 1).
    measure : {"sensitivity", "specificity"}
    level : float, default 0.95

    Returns
    -------
    int
        :math:`N = \lceil z^2 p(1-p) / (W^2 \pi) \rceil` for sensitivity and
        :math:`\lceil z^2 p(1-p) / (W^2 (1-\pi)) \rceil` for specificity, with :math:`z` the
        :math:`(1+\text{level})/2` normal quantile.

    References
    ----------
    Buderer NMF (1996). Acad Emerg Med 3:895–900, equations for TP + FN and N.
    """
    expected = _check_probability("expected", expected)
    half_width = _check_probability("half_width", half_width)
    prevalence = _check_probability("prevalence", prevalence)
    level = _check_level(level)
    if measure not in MEASURES:
        raise PoolingError(f"measure must be 'sensitivity' or 'specificity', got {measure!r}")
    z = stats.norm.ppf(0.5 + level / 2)
    per_class = z * z * expected * (1 - expected) / half_width**2
    share = prevalence if measure == "sensitivity" else 1 - prevalence
    # Round before the ceiling so that a product that is whole in exact arithmetic is not pushed up by float error.
    return math.ceil(round(per_class / share, 9))
