"""Pooling of discrimination and calibration: Debray et al. (2017) transforms, checked on a worked example
(scikit-learn's breast-cancer data split into five sites, tests/stats/prediction_example.py) against
statsmodels' combine_effects, and the O:E standard error on the EuroSCORE II studies of metamisc's vignette."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from statsmodels.stats.meta_analysis import combine_effects

from federation.stats import (
    PooledMeasure,
    PoolingError,
    pool_auc,
    pool_calibration_intercept,
    pool_calibration_slope,
    pool_observed_expected,
    random_effects,
)
from tests.stats.prediction_example import sites

SITES = sites()
IDS = [s.site_id for s in SITES]


def _expit(x: float) -> float:
    return 1 / (1 + math.exp(-x))


def _dl(y: np.ndarray, v: np.ndarray) -> tuple[float, float, tuple[float, float]]:
    """statsmodels' DerSimonian-Laird (mean, SE, Wald CI); its moment estimate of tau^2 is not floored, so where
    it is negative DerSimonian & Laird's floor at 0 makes the random-effects result the fixed-effect one."""
    with np.errstate(invalid="ignore"):  # statsmodels takes square roots of a negative tau^2
        reference = combine_effects(np.asarray(y, float), np.asarray(v, float), method_re="dl")
    if reference.tau2 > 0:
        return reference.mean_effect_re, reference.sd_eff_w_re, tuple(reference.conf_int(use_t=False)[1])
    return reference.mean_effect_fe, reference.sd_eff_w_fe, tuple(reference.conf_int(use_t=False)[0])


def test_logit_auc_pooling_follows_debray_and_matches_statsmodels() -> None:
    # Debray et al. (2017) BMJ 356:i6460, Table 2 (and metamisc's test_ccalc.R): theta = logit(c),
    # SE(theta) = SE(c) / (c (1 - c)). Pooled by DerSimonian-Laird, the result is statsmodels' combine_effects.
    y = np.array([math.log(s.auc / (1 - s.auc)) for s in SITES])
    v = np.array([(s.auc_se / (s.auc * (1 - s.auc))) ** 2 for s in SITES])
    mean, _, (low, high) = _dl(y, v)
    result = pool_auc(IDS, [s.auc for s in SITES], [s.auc_se for s in SITES], method="DL", interval="wald")
    assert result.pooled.tau2 > 0  # the worked example's sites differ in case mix
    assert result.pooled.estimate == pytest.approx(mean, rel=1e-12)
    assert result.estimate == pytest.approx(_expit(mean), rel=1e-12)
    assert (result.ci_low, result.ci_high) == pytest.approx((_expit(low), _expit(high)), rel=1e-12)
    assert result.scale == "logit" and result.sites_pooled == tuple(IDS)


def test_auc_default_is_reml_with_hksj() -> None:
    # Debray et al. (2017): REML with Hartung-Knapp-Sidik-Jonkman intervals; the univariate engine is
    # checked against metafor in test_univariate.py.
    y = [math.log(s.auc / (1 - s.auc)) for s in SITES]
    v = [(s.auc_se / (s.auc * (1 - s.auc))) ** 2 for s in SITES]
    engine = random_effects(y, v, method="REML", interval="hksj")
    result = pool_auc(IDS, [s.auc for s in SITES], [s.auc_se for s in SITES])
    assert result.pooled == engine
    assert result.pi_low == pytest.approx(_expit(engine.pi_low), rel=1e-12)


# EuroSCORE II validations in metamisc's vignette "Meta-analysis of prediction model performance" (Debray's R
# package; data(EuroSCORE)): patients and in-hospital mortality (%) of the first five studies. O is rounded
# from n x mortality.
EUROSCORE = [(5553, 4.18), (1027, 2.73), (1090, 3.76), (5576, 3.43), (23740, 3.14)]


def test_log_oe_standard_error_follows_debray_and_metamisc() -> None:
    # Debray et al. (2017) Table 2: SE(log O:E) = sqrt((1 - O/N) / O); metamisc's test_oecalc.R writes the same
    # quantity as sqrt(1/O - 1/N). With E taken as the O of a neighbouring study, the pooled DL estimate must be
    # statsmodels' combine_effects on log(O/E) with those variances.
    n = np.array([row[0] for row in EUROSCORE], dtype=float)
    o = np.round(n * np.array([row[1] for row in EUROSCORE]) / 100)
    e = np.roll(o, 1) * n / np.roll(n, 1)  # an invented expected count per study, for the worked example
    variance = 1 / o - 1 / n
    result = pool_observed_expected([f"s{i}" for i in range(5)], o.tolist(), e.tolist(), n.tolist(), "DL", "wald")
    mean, se, _ = _dl(np.log(o / e), variance)
    assert result.pooled.tau2 > 0
    assert result.pooled.estimate == pytest.approx(mean, rel=1e-12)
    assert result.pooled.se == pytest.approx(se, rel=1e-12)
    assert result.estimate == pytest.approx(math.exp(mean), rel=1e-12)
    assert result.scale == "log"


def test_oe_on_the_worked_example_matches_statsmodels() -> None:
    y = np.array([math.log(s.observed / s.expected) for s in SITES])
    v = np.array([(1 - s.observed / s.n) / s.observed for s in SITES])
    mean, _, (low, high) = _dl(y, v)
    result = pool_observed_expected(
        IDS, [s.observed for s in SITES], [s.expected for s in SITES], [s.n for s in SITES], "DL", "wald"
    )
    assert result.estimate == pytest.approx(math.exp(mean), rel=1e-12)
    assert (result.ci_low, result.ci_high) == pytest.approx((math.exp(low), math.exp(high)), rel=1e-10)


def test_calibration_intercept_and_slope_pool_on_their_own_scale() -> None:
    # Per-site CITL and slope come from statsmodels GLM fits (prediction_example.py); pooled on the identity
    # scale (Debray et al. 2017; Snell et al. 2018), DL result = statsmodels combine_effects.
    for pool, values, errors in (
        (pool_calibration_intercept, [s.citl for s in SITES], [s.citl_se for s in SITES]),
        (pool_calibration_slope, [s.slope for s in SITES], [s.slope_se for s in SITES]),
    ):
        mean, _, interval = _dl(np.array(values), np.array(errors) ** 2)
        result = pool(IDS, values, errors, method="DL", interval="wald")
        assert result.estimate == pytest.approx(mean, rel=1e-12)
        assert (result.ci_low, result.ci_high) == pytest.approx(interval, rel=1e-12)
        assert result.scale == "identity"


def test_unusable_sites_are_listed_and_fallbacks_named() -> None:
    result = pool_auc(["a", "b", "c", "d"], [0.8, 0.7, 1.0, 0.75], [0.03, 0.04, 0.0, None])
    assert {e.site_id: e.reason for e in result.sites_not_pooled} == {
        "c": "AUC of 0 or 1: undefined on the logit scale",
        "d": "AUC standard error missing or zero",
    }
    oe = pool_observed_expected(["a", "b", "c"], [0, 12, 20], [3.2, 10.0, 22.5], [400, 380, 500])
    assert any("0.5 added" in note and "a" in note for note in oe.notes)
    assert oe.sites_pooled == ("a", "b", "c")
    text = json.dumps(oe.to_dict(), allow_nan=False)
    assert PooledMeasure.from_dict(json.loads(text)) == oe
    assert "observed:expected ratio pooled on the log scale (REML, hksj, k = 3)" in oe.summary()


def test_fewer_than_two_usable_sites_raise() -> None:
    with pytest.raises(PoolingError, match="at least 2 sites with usable values, got 1"):
        pool_calibration_slope(["a", "b"], [0.9, float("nan")], [0.1, 0.1])
