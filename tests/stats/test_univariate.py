"""Checks of federation.stats.univariate against metafor's published BCG results and statsmodels."""

from __future__ import annotations

import json

import numpy as np
import pytest
from numpy.typing import NDArray
from scipy import stats
from statsmodels.stats.meta_analysis import combine_effects

from federation.stats import (
    PooledEstimate,
    expit,
    fixed_effect,
    logit,
    logit_proportion,
    random_effects,
    univariate,
)

# BCG vaccine trials (Colditz et al. 1994, JAMA 271:698; metafor's dat.bcg), per trial:
# tpos, tneg (vaccinated TB+/TB-), cpos, cneg (control TB+/TB-). Data from memory; the published
# metafor numbers below reproduce from it, which is the check on the data.
BCG = np.array(
    [
        (4, 119, 11, 128),
        (6, 300, 29, 274),
        (3, 228, 11, 209),
        (62, 13536, 248, 12619),
        (33, 5036, 47, 5761),
        (180, 1361, 372, 1079),
        (8, 2537, 10, 619),
        (505, 87886, 499, 87892),
        (29, 7470, 45, 7232),
        (17, 1699, 65, 1600),
        (186, 50448, 141, 27197),
        (5, 2493, 3, 2338),
        (27, 16886, 29, 17825),
    ],
    dtype=float,
)


def _bcg_log_risk_ratios() -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    # metafor escalc(measure = "RR"): yi = log(a/n1) - log(c/n2), vi = 1/a - 1/n1 + 1/c - 1/n2.
    tpos, tneg, cpos, cneg = BCG.T
    y = np.log((tpos / (tpos + tneg)) / (cpos / (cpos + cneg)))
    v = 1 / tpos - 1 / (tpos + tneg) + 1 / cpos - 1 / (cpos + cneg)
    return y, v


Y, V = _bcg_log_risk_ratios()
# metafor prints 4 decimals (I^2 and H^2 as percent/ratio with 2): agreement within half a unit.
HALF_4DP, HALF_2DP = 0.5e-4 + 1e-12, 0.5e-2 + 1e-12

# Homogeneous studies (invented): Q = 0.27 on 3 df, well below its expectation.
HOMOGENEOUS_Y = np.array([0.10, 0.12, 0.09, 0.11])
HOMOGENEOUS_V = np.array([0.04, 0.05, 0.03, 0.06])


def _q(y: NDArray[np.float64], v: NDArray[np.float64], tau2: float) -> float:
    # Generalised Q (DerSimonian & Kacker 2007, eq. 4), written out independently of the module.
    w = 1 / (v + tau2)
    mu = np.sum(w * y) / np.sum(w)
    return float(np.sum(w * (y - mu) ** 2))


# --- BCG: published metafor output (Viechtbauer 2010, J Stat Softw 36(3); metafor documentation) ----


def test_dl_matches_metafor_bcg() -> None:
    # metafor rma(yi, vi, method = "DL") on dat.bcg: estimate -0.7141, SE 0.1787 (SE from memory),
    # tau^2 0.3088, I^2 92.12%, H^2 12.69 (from memory), Q(df = 12) 152.2330.
    result = random_effects(Y, V, method="DL")
    assert abs(result.estimate - -0.7141) <= HALF_4DP
    assert abs(result.se - 0.1787) <= HALF_4DP
    assert abs(result.tau2 - 0.3088) <= HALF_4DP
    assert abs(100 * result.i2 - 92.12) <= HALF_2DP
    assert abs(result.h2 - 12.69) <= HALF_2DP
    assert abs(result.q - 152.2330) <= HALF_4DP and result.q_df == 12


def test_reml_matches_metafor_bcg() -> None:
    # metafor rma(yi, vi) (REML default): estimate -0.7145, SE 0.1798, tau^2 0.3132, I^2 92.22%,
    # H^2 12.86 (from memory), 95% CI -1.0669 to -0.3622 (from memory).
    result = random_effects(Y, V, method="REML")
    assert abs(result.estimate - -0.7145) <= HALF_4DP
    assert abs(result.se - 0.1798) <= HALF_4DP
    assert abs(result.tau2 - 0.3132) <= HALF_4DP
    assert abs(100 * result.i2 - 92.22) <= HALF_2DP
    assert abs(result.h2 - 12.86) <= HALF_2DP
    assert abs(result.ci_low - -1.0669) <= HALF_4DP and abs(result.ci_high - -0.3622) <= HALF_4DP


def test_reml_knapp_hartung_matches_metafor_bcg() -> None:
    # metafor rma(yi, vi, test = "knha"): 95% CI -1.1084 to -0.3206 (t on 12 df).
    result = random_effects(Y, V, method="REML", interval="hksj")
    assert abs(result.ci_low - -1.1084) <= HALF_4DP
    assert abs(result.ci_high - -0.3206) <= HALF_4DP


def test_paule_mandel_matches_metafor_bcg() -> None:
    # metafor rma(yi, vi, method = "PM"): tau^2 0.3181.
    assert abs(random_effects(Y, V, method="PM").tau2 - 0.3181) <= HALF_4DP


def test_tau2_q_profile_interval_matches_metafor_bcg() -> None:
    # metafor confint(rma(yi, vi)) on dat.bcg: tau^2 95% CI 0.1197 to 1.1115 (from memory).
    result = random_effects(Y, V, method="REML")
    assert abs(result.tau2_ci_low - 0.1197) <= HALF_4DP
    assert abs(result.tau2_ci_high - 1.1115) <= HALF_4DP


def test_tau2_q_profile_interval_solves_its_defining_equations() -> None:
    # Viechtbauer (2007) Stat Med 26:37, eq. 8: Q(tau2_low) = chi2_{k-1, 0.975}, Q(tau2_high) = chi2_{k-1, 0.025}.
    result = random_effects(Y, V, method="DL", level=0.9)
    assert _q(Y, V, result.tau2_ci_low) == pytest.approx(stats.chi2.isf(0.05, 12), rel=1e-9)
    assert _q(Y, V, result.tau2_ci_high) == pytest.approx(stats.chi2.ppf(0.05, 12), rel=1e-9)


# --- statsmodels.stats.meta_analysis.combine_effects ------------------------------------------------


def test_dl_matches_statsmodels_combine_effects() -> None:
    # statsmodels combine_effects(method_re="dl"): random-effects mean, SE, Wald CI, tau^2, Q, I^2.
    reference = combine_effects(Y, V, method_re="dl")
    result = random_effects(Y, V, method="DL")
    assert result.estimate == pytest.approx(reference.mean_effect_re, rel=1e-12)
    assert result.se == pytest.approx(reference.sd_eff_w_re, rel=1e-12)
    assert (result.ci_low, result.ci_high) == pytest.approx(reference.conf_int(use_t=False)[1], rel=1e-12)
    assert result.tau2 == pytest.approx(reference.tau2, rel=1e-12)
    assert result.q == pytest.approx(reference.q, rel=1e-12)
    assert result.i2 == pytest.approx(reference.i2, rel=1e-12)
    assert result.q_pvalue == pytest.approx(reference.test_homogeneity().pvalue, rel=1e-9)


def test_dl_hksj_matches_statsmodels_wls_interval() -> None:
    # statsmodels conf_int(use_t=True)[3] is the HKSJ ("random effect wls") interval on k-1 df.
    reference = combine_effects(Y, V, method_re="dl")
    result = random_effects(Y, V, method="DL", interval="hksj")
    assert (result.ci_low, result.ci_high) == pytest.approx(reference.conf_int(use_t=True)[3], rel=1e-12)
    assert result.se == pytest.approx(reference.sd_eff_w_re_hksj, rel=1e-12)


def test_paule_mandel_matches_statsmodels_iterated() -> None:
    # statsmodels combine_effects(method_re="pm") (DerSimonian & Kacker 2007 iteration), run to 1e-12.
    reference = combine_effects(Y, V, method_re="pm", atol=1e-12, maxiter=1000)
    result = random_effects(Y, V, method="PM")
    assert result.tau2 == pytest.approx(reference.tau2, rel=1e-9)
    assert result.estimate == pytest.approx(reference.mean_effect_re, rel=1e-9)


def test_fixed_effect_matches_statsmodels() -> None:
    reference = combine_effects(Y, V, method_re="dl")
    result = fixed_effect(Y, V)
    assert result.estimate == pytest.approx(reference.mean_effect_fe, rel=1e-12)
    assert result.se == pytest.approx(reference.sd_eff_w_fe, rel=1e-12)
    assert (result.ci_low, result.ci_high) == pytest.approx(reference.conf_int(use_t=False)[0], rel=1e-12)
    assert result.h2 == pytest.approx(reference.h2, rel=1e-12)


# --- Properties that follow from the definitions ----------------------------------------------------


def test_reml_solves_the_restricted_score_equation() -> None:
    # Viechtbauer (2005) J Educ Behav Stat 30:261, eq. 11: at the REML estimate the derivative of the
    # restricted log-likelihood is 0. Checked by a central difference of the likelihood written here.
    def restricted_log_likelihood(tau2: float) -> float:
        w = 1 / (V + tau2)
        mu = np.sum(w * Y) / np.sum(w)
        return -0.5 * (np.sum(np.log(V + tau2)) + np.log(np.sum(w)) + np.sum(w * (Y - mu) ** 2))

    tau2 = random_effects(Y, V, method="REML").tau2
    h = 1e-5
    slope = (restricted_log_likelihood(tau2 + h) - restricted_log_likelihood(tau2 - h)) / (2 * h)
    assert abs(slope) < 1e-7


def test_reml_fallback_reaches_the_same_maximum(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # If Fisher scoring fails, bounded maximisation of the restricted likelihood must still give
    # metafor's REML tau^2 for dat.bcg, 0.3132, and the result must say which route was taken.
    monkeypatch.setattr(univariate, "_tau2_reml", lambda y, v: (0.0, False))
    result = random_effects(Y, V, method="REML")
    assert abs(result.tau2 - 0.3132) <= HALF_4DP
    assert any("did not converge" in note for note in result.notes)


def test_paule_mandel_solves_its_estimating_equation() -> None:
    # Paule & Mandel (1982): generalised Q equals its expectation k - 1 at the estimate.
    assert _q(Y, V, random_effects(Y, V, method="PM").tau2) == pytest.approx(12.0, rel=1e-10)


@pytest.mark.parametrize("interval", ["wald", "hksj"])
def test_prediction_interval_follows_higgins_thompson_spiegelhalter(
    interval: str,
) -> None:
    # Higgins, Thompson & Spiegelhalter (2009) JRSS A 172:137, eq. 12: mu +/- t_{k-2} sqrt(tau^2 + SE^2), SE the
    # random-effects (inverse-variance) SE of mu, which statsmodels combine_effects reports as sd_eff_w_re. One
    # convention whatever the confidence interval method.
    reference = combine_effects(Y, V, method_re="dl")
    result = random_effects(Y, V, method="DL", interval=interval)
    half = stats.t.ppf(0.975, 11) * np.sqrt(reference.tau2 + reference.sd_eff_w_re**2)
    assert result.pi_low == pytest.approx(reference.mean_effect_re - half, rel=1e-12)
    assert result.pi_high == pytest.approx(reference.mean_effect_re + half, rel=1e-12)


# Six studies (invented) with DL tau^2 = 0.146 > 0 at which the Hartung-Knapp variance factor
# q = sum w (y - mu)^2 / (k - 1) is below 1 (statsmodels: HKSJ SE 0.162 < Wald SE 0.202).
NARROW_Y = np.array([-0.07, -0.7, -0.02, -0.47, 0.38, -0.03])
NARROW_V = np.array([0.28, 0.2, 0.18, 0.03, 0.03, 0.07])


def test_hksj_is_truncated_so_never_narrower_than_wald() -> None:
    # Knapp & Hartung (2003) Stat Med 22:2693 ad hoc correction: Var = max(1, q) / sum w. Untruncated SE checked
    # against statsmodels combine_effects (sd_eff_w_re_hksj); the truncated SE then equals the Wald SE.
    reference = combine_effects(NARROW_Y, NARROW_V, method_re="dl")
    assert reference.sd_eff_w_re_hksj < reference.sd_eff_w_re  # the case the truncation exists for
    raw = random_effects(NARROW_Y, NARROW_V, method="DL", interval="hksj", hksj_truncation=False)
    assert raw.se == pytest.approx(reference.sd_eff_w_re_hksj, rel=1e-12)
    truncated = random_effects(NARROW_Y, NARROW_V, method="DL", interval="hksj")
    wald = random_effects(NARROW_Y, NARROW_V, method="DL", interval="wald")
    assert truncated.se == pytest.approx(reference.sd_eff_w_re, rel=1e-12)
    half = stats.t.ppf(0.975, 5) * reference.sd_eff_w_re
    assert (truncated.ci_low, truncated.ci_high) == pytest.approx(
        (reference.mean_effect_re - half, reference.mean_effect_re + half), rel=1e-12
    )
    assert truncated.ci_high - truncated.ci_low > wald.ci_high - wald.ci_low
    assert any("never narrower than Wald" in note for note in truncated.notes)


def test_hksj_truncation_leaves_heterogeneous_data_alone() -> None:
    # On dat.bcg q > 1, so the truncated and untruncated intervals agree (metafor's knha value is checked above).
    truncated = random_effects(Y, V, method="REML", interval="hksj")
    raw = random_effects(Y, V, method="REML", interval="hksj", hksj_truncation=False)
    assert (truncated.ci_low, truncated.ci_high) == (raw.ci_low, raw.ci_high)


def test_prediction_interval_undefined_for_two_studies() -> None:
    result = random_effects([0.1, 0.5], [0.04, 0.05], method="REML")
    assert result.pi_low is None and result.pi_high is None
    assert json.loads(json.dumps(result.to_dict(), allow_nan=False))["pi_low"] is None


def test_homogeneous_studies_floor_tau2_at_zero() -> None:
    # statsmodels combine_effects(method_re="dl") does not floor the moment estimate: on these data
    # it is negative, which is what DerSimonian & Laird (1986) truncate to 0.
    with np.errstate(invalid="ignore"):  # statsmodels takes square roots of the negative variance
        raw = combine_effects(HOMOGENEOUS_Y, HOMOGENEOUS_V, method_re="dl").tau2
    assert raw < 0
    for method in ("DL", "REML", "PM"):
        result = random_effects(HOMOGENEOUS_Y, HOMOGENEOUS_V, method=method)
        assert result.tau2 == 0.0
        assert result.i2 == 0.0 and result.h2 == 1.0
        assert any("truncated at 0" in note for note in result.notes)
        # With tau^2 = 0 the random-effects estimate is the fixed-effect one.
        assert result.estimate == pytest.approx(fixed_effect(HOMOGENEOUS_Y, HOMOGENEOUS_V).estimate, rel=1e-12)


# --- Logit helpers ----------------------------------------------------------------------------------


def test_logit_proportion_by_hand() -> None:
    # Hand-worked: logit(15/148) = log(15/133), var = 1/15 + 1/133; no correction away from 0 and n.
    result = logit_proportion(15, 148)
    assert result.logit == pytest.approx(np.log(15 / 133), rel=1e-12)
    assert result.variance == pytest.approx(1 / 15 + 1 / 133, rel=1e-12)
    assert result.corrected is False


@pytest.mark.parametrize(
    ("x", "n", "expected_logit"),
    [(0, 20, np.log(0.5 / 20.5)), (20, 20, np.log(20.5 / 0.5))],
)
def test_logit_proportion_corrects_only_at_the_boundaries(x: int, n: int, expected_logit: float) -> None:
    result = logit_proportion(x, n)
    assert result.corrected is True
    assert result.logit == pytest.approx(expected_logit, rel=1e-12)
    assert result.variance == pytest.approx(1 / 0.5 + 1 / 20.5, rel=1e-12)


def test_logit_and_expit_are_inverse() -> None:
    p = np.array([0.01, 0.3, 0.5, 0.97])
    assert np.allclose(expit(logit(p)), p, rtol=1e-12)
    assert logit(0.5) == 0.0 and isinstance(expit(0.0), float)


# --- Input validation and serialisation -------------------------------------------------------------


@pytest.mark.parametrize(
    ("estimates", "variances", "message"),
    [
        ([0.2], [0.1], "at least 2 studies"),
        ([0.2, float("nan")], [0.1, 0.1], "estimates must be finite"),
        ([0.2, 0.3], [0.1, float("inf")], "variances must be finite"),
        ([0.2, 0.3], [0.1, 0.0], "variances must be positive"),
        ([0.2, 0.3], [0.1, -0.1], "variances must be positive"),
        ([0.2, 0.3, 0.4], [0.1, 0.1], "3 estimates but 2 variances"),
    ],
)
@pytest.mark.parametrize("pool", [random_effects, fixed_effect])
def test_bad_input_raises(pool: object, estimates: list[float], variances: list[float], message: str) -> None:
    with pytest.raises(ValueError, match=message):
        pool(estimates, variances)  # type: ignore[operator]


@pytest.mark.parametrize(("keyword", "value"), [("method", "HE"), ("interval", "z"), ("level", 1.5)])
def test_bad_options_raise(keyword: str, value: object) -> None:
    with pytest.raises(ValueError, match=keyword):
        random_effects(Y, V, **{keyword: value})  # type: ignore[arg-type]


@pytest.mark.parametrize(("x", "n"), [(3, 0), (4, 3), (-1, 3), (1.5, 3)])
def test_logit_proportion_rejects_bad_counts(x: float, n: int) -> None:
    with pytest.raises(ValueError):
        logit_proportion(x, n)  # type: ignore[arg-type]


def test_pooled_estimate_json_round_trip() -> None:
    for result in (
        random_effects(Y, V, method="REML", interval="hksj"),
        fixed_effect(Y, V),
    ):
        text = json.dumps(result.to_dict(), allow_nan=False)
        assert PooledEstimate.from_dict(json.loads(text)) == result
        assert "tau^2" in result.summary()


def test_pooled_estimate_rejects_unknown_fields() -> None:
    data = fixed_effect(Y, V).to_dict() | {"colour": "blue"}
    with pytest.raises(ValueError, match="unknown field"):
        PooledEstimate.from_dict(data)
