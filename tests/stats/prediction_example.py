"""A worked multi-site validation on scikit-learn's bundled breast-cancer data (Wolberg et al., UCI).

Two logistic models are developed on 40% of the records; the rest is split into five "sites". Per site the
module computes what a site releases for discrimination, calibration and paired comparison — with
scikit-learn and statsmodels, independently of federation.stats — so the pooling functions can be checked
against the formulas of Debray et al. (2017) and against statsmodels' meta-analysis.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cache

import numpy as np
import statsmodels.api as sm
from sklearn.datasets import load_breast_cancer
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import roc_auc_score

N_SITES = 5


def delong(scores: np.ndarray, outcome: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """AUCs of the score columns and their DeLong (1988) covariance matrix, from placement values.

    DeLong ER, DeLong DM, Clarke-Pearson DL (1988). Biometrics 44:837-845, section 2: V10 and V01 are the
    structural components; Cov = S10/m + S01/n.
    """
    scores = np.atleast_2d(scores)
    pos, neg = scores[:, outcome == 1], scores[:, outcome == 0]
    m, n = pos.shape[1], neg.shape[1]
    psi = (pos[:, :, None] > neg[:, None, :]) + 0.5 * (pos[:, :, None] == neg[:, None, :])
    v10 = psi.mean(axis=2)  # per positive
    v01 = psi.mean(axis=1)  # per negative
    auc = v10.mean(axis=1)
    cov = np.cov(v10) / m + np.cov(v01) / n
    return auc, np.atleast_2d(cov)


@dataclass(frozen=True)
class SiteSummary:
    site_id: str
    outcome: np.ndarray
    risk: np.ndarray  # model A's predicted risk
    risk_b: np.ndarray  # model B's predicted risk
    auc: float
    auc_se: float
    auc_b: float
    auc_b_se: float
    auc_cov: float
    observed: int
    expected: float
    n: int
    citl: float
    citl_se: float
    slope: float
    slope_se: float


@cache
def sites() -> tuple[SiteSummary, ...]:
    data = load_breast_cancer()
    x, y = data.data, 1 - data.target  # outcome 1 = malignant
    order = np.random.default_rng(2017).permutation(len(y))
    dev, val = order[: int(0.4 * len(y))], order[int(0.4 * len(y)) :]
    model_a = LogisticRegression(max_iter=5000).fit(x[dev][:, :4], y[dev])
    model_b = LogisticRegression(max_iter=5000).fit(x[dev][:, 4:8], y[dev])
    # Sites differ in case mix (the validation records are split in order of one feature not in either model)
    # and in how well the model's baseline risk fits them (an invented shift of the linear predictor per site),
    # so that every measure is heterogeneous across sites, as in a real consortium.
    val = val[np.argsort(x[val, 19], kind="stable")]
    shifts = (-0.8, -0.3, 0.0, 0.4, 0.9)
    out = []
    for i, part in enumerate(np.array_split(val, N_SITES)):
        outcome = y[part]
        lp_a = model_a.decision_function(x[part][:, :4]) + shifts[i]
        risk = np.clip(1 / (1 + np.exp(-lp_a)), 1e-6, 1 - 1e-6)
        risk_b = np.clip(model_b.predict_proba(x[part][:, 4:8])[:, 1], 1e-6, 1 - 1e-6)
        auc, cov = delong(np.vstack([risk, risk_b]), outcome)
        assert math.isclose(auc[0], roc_auc_score(outcome, risk), rel_tol=1e-12)  # DeLong's AUC is Mann-Whitney
        lp = np.log(risk / (1 - risk))
        citl = sm.GLM(outcome, np.ones((len(outcome), 1)), family=sm.families.Binomial(), offset=lp).fit()
        slope = sm.GLM(outcome, sm.add_constant(lp), family=sm.families.Binomial()).fit()
        out.append(
            SiteSummary(
                site_id=f"site-{i + 1}",
                outcome=outcome,
                risk=risk,
                risk_b=risk_b,
                auc=float(auc[0]),
                auc_se=float(math.sqrt(cov[0, 0])),
                auc_b=float(auc[1]),
                auc_b_se=float(math.sqrt(cov[1, 1])),
                auc_cov=float(cov[0, 1]),
                observed=int(outcome.sum()),
                expected=float(risk.sum()),
                n=int(outcome.size),
                citl=float(citl.params[0]),
                citl_se=float(citl.bse[0]),
                slope=float(slope.params[1]),
                slope_se=float(slope.bse[1]),
            )
        )
    return tuple(out)
