"""Methods a reviewer asks for, each checked against an independent implementation named beside the check.

Data: scikit-learn's breast-cancer records (Wolberg et al., UCI), a small logistic model developed on 40% of
them, and the rest split into eight "sites" in order of one feature outside the model, each with its own shift
of the linear predictor (so the sites differ), and an age-like subgroup drawn at random within each site. Invented
numbers appear only where a test needs a case the data cannot give (marked).
"""

from __future__ import annotations

import json
import math
from functools import cache

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import special
from sklearn.datasets import load_breast_cancer
from sklearn.linear_model import LogisticRegression
from statsmodels.stats.meta_analysis import combine_effects

from federation.stats import (
    PoolingError,
    ReleasedTable,
    bivariate_meta_regression,
    bivariate_random_effects,
    deeks_funnel_test,
    leave_one_site_out,
    pool_kappa,
    pool_proportion,
    reitsma,
    summary_ratios,
    within_site_auc_contrasts,
    within_site_contrasts,
)
from federation.stats.influence import LeaveOneOut

SHIFTS = (-1.0, -0.6, -0.3, 0.0, 0.2, 0.5, 0.8, 1.2)


@cache
def _records() -> list[tuple[str, np.ndarray, np.ndarray, np.ndarray, np.ndarray]]:
    """Per site: id, outcome, called positive (risk >= 0.5), subgroup (0/1), covariate value."""
    data = load_breast_cancer()
    x, y = data.data, 1 - data.target
    order = np.random.default_rng(11).permutation(len(y))
    dev, val = order[: int(0.4 * len(y))], order[int(0.4 * len(y)) :]
    model = LogisticRegression(max_iter=5000).fit(x[dev][:, :4], y[dev])
    val = val[np.argsort(x[val, 19], kind="stable")]
    out = []
    for i, part in enumerate(np.array_split(val, len(SHIFTS))):
        risk = special.expit(model.decision_function(x[part][:, :4]) + SHIFTS[i])
        subgroup = np.random.default_rng(100 + i).integers(0, 2, part.size)  # an "age band" unrelated to the sites
        out.append((f"site-{i + 1}", y[part], risk >= 0.5, subgroup, np.full(part.size, SHIFTS[i])))
    return out


def _table(outcome: np.ndarray, called: np.ndarray) -> tuple[int, int, int, int]:
    return (
        int(np.sum(called & (outcome == 1))),
        int(np.sum(called & (outcome == 0))),
        int(np.sum(~called & (outcome == 1))),
        int(np.sum(~called & (outcome == 0))),
    )


def _tables() -> list[ReleasedTable]:
    return [ReleasedTable(site, *_table(o, c)) for site, o, c, _, _ in _records()]


def _pairs(tables: list[ReleasedTable]) -> tuple[np.ndarray, np.ndarray]:
    cells = np.array([t.cells for t in tables], dtype=float)
    cells[np.any(cells == 0, axis=1)] += 0.5
    tp, fp, fn, tn = cells.T
    return np.column_stack([np.log(tp / fn), np.log(fp / tn)]), np.column_stack([1 / tp + 1 / fn, 1 / fp + 1 / tn])


# --- agreement and proportions ---------------------------------------------------------------------------------


def test_pooled_kappa_matches_statsmodels_combine_effects() -> None:
    # Each site's kappa between the screen and the reference (scikit-learn's cohen_kappa_score computes the same
    # statistic; SE from Fleiss, Cohen & Everitt 1969 written out here). Pooled DL/Wald = statsmodels.
    from sklearn.metrics import cohen_kappa_score

    ids, kappas, ses = [], [], []
    for site, outcome, called, _, _ in _records():
        table = np.array(_table(outcome, called), dtype=float).reshape(2, 2)  # rows: called 1/0; cols: outcome 1/0
        n = table.sum()
        p = table / n
        po, rows, cols = np.trace(p), p.sum(axis=1), p.sum(axis=0)
        pe = float(rows @ cols)
        kappa = (po - pe) / (1 - pe)
        assert kappa == pytest.approx(cohen_kappa_score(outcome, called.astype(int)), rel=1e-12)
        total = sum(p[i, i] * (1 - (rows[i] + cols[i]) * (1 - kappa)) ** 2 for i in range(2))
        off = [(i, j) for i in range(2) for j in range(2) if i != j]
        total += (1 - kappa) ** 2 * sum(p[i, j] * (cols[i] + rows[j]) ** 2 for i, j in off)
        total -= (kappa - pe * (1 - kappa)) ** 2
        ids.append(site)
        kappas.append(kappa)
        ses.append(math.sqrt(total / n) / (1 - pe))
    result = pool_kappa(ids, kappas, ses, method="DL", interval="wald")
    reference = combine_effects(np.array(kappas), np.array(ses) ** 2, method_re="dl")
    assert result.estimate == pytest.approx(reference.mean_effect_re, rel=1e-10)
    assert (result.ci_low, result.ci_high) == pytest.approx(reference.conf_int(use_t=False)[1], rel=1e-10)
    assert result.pooled.tau2 == pytest.approx(max(reference.tau2, 0.0), abs=1e-12)
    assert result.pooled.i2 is not None and result.pi_low is not None


def test_kappa_of_one_is_not_pooled_and_named() -> None:
    result = pool_kappa(["a", "b", "c"], [1.0, 0.6, 0.7], [0.0, 0.05, 0.06])
    assert [e.site_id for e in result.sites_not_pooled] == ["a"]
    assert "perfect agreement" in result.sites_not_pooled[0].reason


def test_pooled_proportion_is_logit_random_effects_as_statsmodels() -> None:
    # Discordance (or error) proportions per site pooled on the logit scale: statsmodels on the same logits.
    wrong, totals = [3, 10, 0, 7], [40, 55, 30, 61]
    result = pool_proportion(["a", "b", "c", "d"], wrong, totals, method="DL", interval="wald")
    a = np.array([3, 10, 0.5, 7])
    b = np.array([37, 45, 30.5, 54])
    reference = combine_effects(np.log(a / b), 1 / a + 1 / b, method_re="dl")
    assert result.estimate == pytest.approx(special.expit(reference.mean_effect_re), rel=1e-10)
    assert "0.5 added" in result.notes[0] and "c" in result.notes[0]


# --- likelihood ratios and DOR from the bivariate model ---------------------------------------------------------


def test_summary_ratios_follow_the_summary_point_and_agree_with_simulation() -> None:
    fit = reitsma(_tables())
    mean = np.array([fit.mean_logit_sensitivity, fit.mean_logit_fpr])
    cov = np.array(
        [
            [fit.se_logit_sensitivity**2, fit.covariance_of_means],
            [fit.covariance_of_means, fit.se_logit_fpr**2],
        ]
    )
    delta = summary_ratios(mean, cov)
    simulated = summary_ratios(mean, cov, method="simulation")
    se_, sp = fit.sensitivity.estimate, fit.specificity.estimate
    assert delta.likelihood_ratio_positive.estimate == pytest.approx(se_ / (1 - sp), rel=1e-10)
    assert delta.likelihood_ratio_negative.estimate == pytest.approx((1 - se_) / sp, rel=1e-10)
    assert delta.diagnostic_odds_ratio.estimate == pytest.approx(se_ * sp / ((1 - se_) * (1 - sp)), rel=1e-10)
    # Zwinderman & Bossuyt (2008): percentiles of draws from N(mu, V). Independent draws with numpy here; the
    # delta-method interval is close to them, the simulated one closer.
    draws = np.random.default_rng(5).multivariate_normal(mean, cov, size=200_000)
    sens, fpr = special.expit(draws[:, 0]), special.expit(draws[:, 1])
    for name, values in (
        ("likelihood_ratio_positive", sens / fpr),
        ("likelihood_ratio_negative", (1 - sens) / (1 - fpr)),
        ("diagnostic_odds_ratio", np.exp(draws[:, 0] - draws[:, 1])),
    ):
        low, high = np.quantile(values, [0.025, 0.975])
        for interval, tolerance in ((getattr(simulated, name), 0.02), (getattr(delta, name), 0.06)):
            assert interval.ci_low == pytest.approx(low, rel=tolerance)
            assert interval.ci_high == pytest.approx(high, rel=tolerance)


# --- Deeks' funnel asymmetry test -------------------------------------------------------------------------------


def test_deeks_test_is_statsmodels_wls_of_log_dor_on_inverse_root_ess() -> None:
    # Deeks, Macaskill & Irwig (2005): lnDOR on 1/sqrt(ESS), weights ESS; statsmodels WLS gives the same fit.
    tables = _tables()
    result = deeks_funnel_test(
        [t.site_id for t in tables], *([getattr(t, c) for t in tables] for c in ("tp", "fp", "fn", "tn"))
    )
    cells = np.array([t.cells for t in tables], dtype=float)
    n1, n0 = cells[:, 0] + cells[:, 2], cells[:, 1] + cells[:, 3]
    cells[np.any(cells == 0, axis=1)] += 0.5
    tp, fp, fn, tn = cells.T
    ess = 4 * n1 * n0 / (n1 + n0)
    reference = sm.WLS(np.log(tp * tn / (fp * fn)), sm.add_constant(1 / np.sqrt(ess)), weights=ess).fit()
    assert (result.intercept, result.slope) == pytest.approx(tuple(reference.params), rel=1e-10)
    assert result.slope_se == pytest.approx(reference.bse[1], rel=1e-10)
    assert result.test["p"] == pytest.approx(reference.pvalues[1], rel=1e-8)
    assert result.test["df"] == len(tables) - 2 and result.test["distribution"] == "t"


def test_deeks_test_needs_three_sites() -> None:
    with pytest.raises(PoolingError, match="at least 3 sites"):
        deeks_funnel_test(["a", "b"], [10, 12], [5, 6], [3, 4], [40, 50])


# --- leave-one-site-out ------------------------------------------------------------------------------------------


def test_leave_one_site_out_equals_refitting_without_the_site() -> None:
    tables = _tables()
    result = leave_one_site_out(tables)
    full = reitsma(tables)
    assert len(result.omitted) == len(tables)
    for row in result.omitted:
        refit = reitsma([t for t in tables if t.site_id != row.site_id])
        assert row.sensitivity.estimate == pytest.approx(refit.sensitivity.estimate, rel=1e-12)
        assert row.change_logit_sensitivity == pytest.approx(
            refit.mean_logit_sensitivity - full.mean_logit_sensitivity, rel=1e-12
        )
        assert row.change_logit_specificity == pytest.approx(full.mean_logit_fpr - refit.mean_logit_fpr, rel=1e-12)
    largest = max(max(abs(r.change_logit_sensitivity), abs(r.change_logit_specificity)) for r in result.omitted)
    assert result.largest_change_logit == pytest.approx(largest)
    assert LeaveOneOut.from_dict(json.loads(json.dumps(result.to_dict(), allow_nan=False))) == result


# --- subgroup contrasts within sites -----------------------------------------------------------------------------


def _subgroup_rows(klass: int) -> tuple[list[str], list[str], list[int], list[int]]:
    ids, levels, events, totals = [], [], [], []
    for site, outcome, called, subgroup, _ in _records():
        for level in (0, 1):
            mask = (subgroup == level) & (outcome == klass)
            ids.append(site)
            levels.append("younger" if level == 0 else "older")
            events.append(int(np.sum(called[mask] if klass == 1 else ~called[mask])))
            totals.append(int(mask.sum()))
    return ids, levels, events, totals


def test_within_site_contrast_pools_site_differences_as_statsmodels() -> None:
    ids, levels, events, totals = _subgroup_rows(0)  # specificity: enough participants without the condition
    (contrast,) = within_site_contrasts(
        ids, levels, events, totals, measure="specificity", reference="younger", method="DL", interval="wald"
    )
    differences, variances = [], []
    for i in range(0, len(ids), 2):
        if min(totals[i], totals[i + 1]) == 0:
            continue
        logits = []
        for j in (i + 1, i):  # older minus younger
            a, b = float(events[j]), float(totals[j] - events[j])
            if 0 in (a, b):
                a, b = a + 0.5, b + 0.5
            logits.append((math.log(a / b), 1 / a + 1 / b))
        differences.append(logits[0][0] - logits[1][0])
        variances.append(logits[0][1] + logits[1][1])
    with np.errstate(invalid="ignore"):  # statsmodels does not floor a negative DL tau^2 (and takes its root)
        reference = combine_effects(np.array(differences), np.array(variances), method_re="dl")
    # Here Q < k - 1, so DerSimonian & Laird's floor at 0 makes the random-effects result the fixed-effect one.
    assert reference.tau2 < 0 and contrast.pooled.pooled.tau2 == 0
    assert contrast.logit_difference == pytest.approx(reference.mean_effect_fe, rel=1e-10)
    assert (contrast.logit_difference_ci_low, contrast.logit_difference_ci_high) == pytest.approx(
        reference.conf_int(use_t=False)[0], rel=1e-10
    )
    assert contrast.residual_heterogeneity["q"] == pytest.approx(reference.q, rel=1e-10)
    assert contrast.pooled.estimate == pytest.approx(math.exp(reference.mean_effect_fe), rel=1e-10)
    assert contrast.between_subgroups["distribution"] == "normal"
    assert "Specificity, older vs younger, within 8 sites" in contrast.sentence


def test_within_site_contrast_uses_only_sites_with_both_levels() -> None:
    # Invented: site c has only one level, so it cannot say anything about the difference inside a site.
    (contrast,) = within_site_contrasts(
        ["a", "a", "b", "b", "c", "d", "d"],
        ["x", "y", "x", "y", "x", "x", "y"],
        [30, 20, 40, 25, 50, 33, 30],
        [40, 35, 50, 40, 60, 40, 41],
    )
    assert contrast.pooled.sites_pooled == ("a", "b", "d") and contrast.reference == "x"
    assert contrast.between_subgroups["df"] == 2 and contrast.between_subgroups["distribution"] == "t"


def test_within_site_auc_contrast_pools_logit_auc_differences_as_statsmodels() -> None:
    # Per site and level: the AUC of the risk (scikit-learn's roc_auc_score) with DeLong's SE (placement values,
    # tests/stats/prediction_example.delong); on the logit scale (Debray et al. 2017), the older-minus-younger
    # differences pooled by DL with a Wald interval must equal statsmodels combine_effects.
    from sklearn.metrics import roc_auc_score

    from tests.stats.prediction_example import delong

    data = load_breast_cancer()
    x, y = data.data, 1 - data.target
    order = np.random.default_rng(11).permutation(len(y))
    dev, val = order[: int(0.4 * len(y))], order[int(0.4 * len(y)) :]
    weak = [1, 4, 8]  # texture, smoothness, symmetry: a weaker model, so no level's AUC is exactly 1
    model = LogisticRegression(max_iter=5000).fit(x[dev][:, weak], y[dev])
    ids, levels, aucs, ses, differences, variances = [], [], [], [], [], []
    for i, part in enumerate(np.array_split(val[np.argsort(x[val, 19], kind="stable")], 6)):
        risk = model.predict_proba(x[part][:, weak])[:, 1]
        group = np.random.default_rng(200 + i).integers(0, 2, part.size)
        pairs = []
        for level in (0, 1):
            keep = group == level
            auc, cov = delong(risk[keep], y[part][keep])
            assert auc[0] == pytest.approx(roc_auc_score(y[part][keep], risk[keep]), rel=1e-12)
            ids.append(f"site-{i + 1}")
            levels.append(("younger", "older")[level])
            aucs.append(float(auc[0]))
            ses.append(float(math.sqrt(cov[0, 0])))
            c, s = aucs[-1], ses[-1]
            pairs.append((math.log(c / (1 - c)), (s / (c * (1 - c))) ** 2))
        differences.append(pairs[1][0] - pairs[0][0])
        variances.append(pairs[1][1] + pairs[0][1])
    (contrast,) = within_site_auc_contrasts(ids, levels, aucs, ses, reference="younger", method="DL", interval="wald")
    with np.errstate(invalid="ignore"):
        reference = combine_effects(np.array(differences), np.array(variances), method_re="dl")
    mean, interval = (
        (reference.mean_effect_re, reference.conf_int(use_t=False)[1])
        if reference.tau2 > 0
        else (reference.mean_effect_fe, reference.conf_int(use_t=False)[0])
    )
    assert contrast.logit_difference == pytest.approx(mean, rel=1e-10)
    assert (contrast.logit_difference_ci_low, contrast.logit_difference_ci_high) == pytest.approx(interval, rel=1e-10)
    assert contrast.sentence.startswith("AUC, older vs younger, within 6 sites")


# --- bivariate meta-regression -----------------------------------------------------------------------------------


def test_bivariate_regression_without_covariates_is_the_reitsma_fit() -> None:
    tables = _tables()
    y, v = _pairs(tables)
    fit = bivariate_meta_regression(y, v, np.zeros((len(tables), 0)), [])
    reference = bivariate_random_effects(y, v)
    assert fit.intercept["logit_sensitivity"] == pytest.approx(reference.mean_logit_sensitivity, abs=1e-5)
    assert fit.intercept["logit_specificity"] == pytest.approx(-reference.mean_logit_fpr, abs=1e-5)
    assert fit.tau2_logit_sensitivity == pytest.approx(reference.tau2_logit_sensitivity, abs=1e-5)
    assert fit.tau2_logit_fpr == pytest.approx(reference.tau2_logit_fpr, abs=1e-5)


def test_bivariate_regression_is_statsmodels_gls_at_its_between_site_covariance() -> None:
    # The site shift of the linear predictor is the covariate: a higher shift calls more people positive, so it
    # raises sensitivity and lowers specificity. Given Psi, the coefficients are GLS with block-diagonal
    # sigma = S_i + Psi (statsmodels GLS), their SEs the GLS SEs at a known scale of 1.
    tables = _tables()
    y, v = _pairs(tables)
    shift = np.array(SHIFTS)
    fit = bivariate_meta_regression(y, v, shift, ["linear predictor shift"])
    rho = fit.correlation or 0.0
    s1, s2 = math.sqrt(fit.tau2_logit_sensitivity), math.sqrt(fit.tau2_logit_fpr)
    psi = np.array([[s1 * s1, rho * s1 * s2], [rho * s1 * s2, s2 * s2]])
    k = len(tables)
    design = np.zeros((2 * k, 4))
    sigma = np.zeros((2 * k, 2 * k))
    for i in range(k):
        design[2 * i, :2] = (1.0, shift[i])
        design[2 * i + 1, 2:] = (1.0, shift[i])
        sigma[2 * i : 2 * i + 2, 2 * i : 2 * i + 2] = psi + np.diag(v[i])
    reference = sm.GLS(y.reshape(-1), design, sigma=sigma).fit(cov_type="fixed scale")
    effect = fit.effects[0]
    assert effect.logit_sensitivity == pytest.approx(reference.params[1], rel=1e-8)
    assert effect.logit_specificity == pytest.approx(-reference.params[3], rel=1e-8)
    assert effect.logit_sensitivity_se == pytest.approx(reference.bse[1], rel=1e-8)
    assert effect.logit_sensitivity > 0 and effect.logit_specificity < 0
    assert effect.covariate_test["p"] < 0.05 and effect.covariate_test["df"] == 2
    assert fit.residual_heterogeneity["df"] == 2 * k - 4


def test_bivariate_regression_refuses_too_few_sites() -> None:
    y, v = _pairs(_tables()[:3])
    with pytest.raises(PoolingError, match="needs at least 4 sites"):
        bivariate_meta_regression(y, v, np.array([0.0, 1.0, 2.0]), ["x"])


# --- the bivariate SROC and the Rutter-Gatsonis HSROC model -------------------------------------------------------


def test_sroc_follows_the_rutter_gatsonis_correspondence_on_breast_cancer_sites() -> None:
    # Harbord et al. (2007) Biostatistics 8:239, Table 1 (from memory), written for logit FPR as in mada:
    # mu_Se = (Theta + Lambda/2) e^(-beta/2), mu_FPR = (Theta - Lambda/2) e^(beta/2),
    # var_Se = (s2_theta + s2_alpha/4) e^(-beta), var_FPR = (s2_theta + s2_alpha/4) e^(beta),
    # cov = s2_theta - s2_alpha/4. The HSROC parameters must give back the bivariate fit they came from.
    from scipy import integrate

    fit = reitsma(_tables())
    h = fit.hsroc
    assert h is not None and fit.sroc is not None
    b = h.shape_beta
    assert (h.threshold_theta + h.accuracy_lambda / 2) * math.exp(-b / 2) == pytest.approx(
        fit.mean_logit_sensitivity, rel=1e-10
    )
    assert (h.threshold_theta - h.accuracy_lambda / 2) * math.exp(b / 2) == pytest.approx(fit.mean_logit_fpr, rel=1e-10)
    common = h.var_threshold + h.var_accuracy / 4
    assert common * math.exp(-b) == pytest.approx(fit.tau2_logit_sensitivity, rel=1e-10)
    assert common * math.exp(b) == pytest.approx(fit.tau2_logit_fpr, rel=1e-10)
    covariance = fit.correlation * math.sqrt(fit.tau2_logit_sensitivity * fit.tau2_logit_fpr)
    assert h.var_threshold - h.var_accuracy / 4 == pytest.approx(covariance, rel=1e-8)
    # The SROC curve is the Rutter-Gatsonis curve at mean accuracy; its area over FPR 0 to 1 by scipy's quad.
    curve = lambda fpr: special.expit(h.accuracy_lambda * math.exp(-b / 2) + math.exp(-b) * special.logit(fpr))  # noqa: E731
    assert fit.sroc.sensitivity == pytest.approx([curve(x) for x in fit.sroc.false_positive_rate], rel=1e-12)
    area, _ = integrate.quad(curve, 0, 1, epsabs=1e-12, limit=200)
    assert fit.sroc.area_under_curve == pytest.approx(area, abs=1e-8)
