"""The likelihood-ratio test of a site covariate in the headline model, against an independent implementation
written here: the Chu & Cole (2006) marginal likelihood with a covariate in both means, by a product
Gauss-Hermite rule (numpy.polynomial.hermite.hermgauss) per study centred without a mode search, maximised
with and without the covariate by scipy.optimize (L-BFGS-B, numerical gradient), the p-value from
scipy.stats.chi2. Data: the 14 AUDIT-C studies
(Kriston et al. 2008, R's mada package) with an invented binary covariate."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize, stats

from federation.stats import PoolingError, ReleasedTable
from federation.stats.headline_regression import headline_covariate_test
from tests.stats.chu_cole import chu_cole_log_likelihood
from tests.stats.test_bivariate import AUDITC

INVENTED = np.array([0, 1, 1, 0, 1, 0, 0, 1, 1, 1, 0, 0, 1, 0], dtype=float)  # not a property of the studies


def _log_likelihood(params: np.ndarray, x: np.ndarray | None, points: int = 24) -> float:
    return chu_cole_log_likelihood(params, x, points)


@pytest.fixture(scope="module")
def independent():
    start = np.array([2.0, -1.2, 0.4, -0.5, 0.8])
    options = {"ftol": 1e-13, "gtol": 1e-7}
    without = optimize.minimize(lambda p: -_log_likelihood(p, None), start, method="L-BFGS-B", options=options)
    with_x = optimize.minimize(
        lambda p: -_log_likelihood(p, INVENTED), np.r_[without.x, 0.0, 0.0], method="L-BFGS-B", options=options
    )
    return without, with_x


def test_statistic_and_p_value_match_an_independent_computation(independent) -> None:
    without, with_x = independent
    statistic = 2 * (without.fun - with_x.fun)
    result = headline_covariate_test(AUDITC, INVENTED, ["invented"])
    assert result.df == 2 and result.distribution == "chi-squared"
    assert result.statistic == pytest.approx(statistic, abs=2e-3)
    assert result.p == pytest.approx(stats.chi2.sf(result.statistic, 2), rel=1e-12)
    assert result.log_likelihood_without == pytest.approx(-without.fun, abs=2e-3)
    # slopes per unit of the covariate: on logit sensitivity, and on logit specificity (minus logit FPR)
    assert result.logit_sensitivity[0] == pytest.approx(with_x.x[5], abs=2e-3)
    assert result.logit_specificity[0] == pytest.approx(-with_x.x[6], abs=2e-3)


def test_a_rescaled_covariate_gives_the_same_test(independent) -> None:
    base = headline_covariate_test(AUDITC, INVENTED, ["invented"])
    scaled = headline_covariate_test(AUDITC, 10 * INVENTED + 3, ["invented"])
    assert scaled.statistic == pytest.approx(base.statistic, abs=1e-5)
    assert scaled.logit_sensitivity[0] == pytest.approx(base.logit_sensitivity[0] / 10, abs=1e-5)


def test_covariates_it_cannot_test_are_refused() -> None:
    with pytest.raises(PoolingError, match="the same at every site"):
        headline_covariate_test(AUDITC, np.ones(14), ["constant"])
    few = [ReleasedTable.complete(f"s{i}", 40 + 3 * i, 20 + 2 * i, 8 + i, 150 + 5 * i) for i in range(5)]
    with pytest.raises(PoolingError, match="needs at least 4 usable sites, got 3"):
        headline_covariate_test(few[:3], np.arange(3.0), ["x"])
    with pytest.raises(PoolingError, match=r"2 covariate column\(s\) in the headline model needs at least 5"):
        headline_covariate_test(few[:4], np.column_stack([np.arange(4.0), np.arange(4.0) ** 2]), ["x", "x2"])


def test_withheld_cells_keep_their_sites_in_the_test() -> None:
    tables = list(AUDITC)
    withheld = tables[2]  # TP/FN withheld at k = 10 with their total released: the site stays in both fits
    tables[2] = ReleasedTable(
        withheld.site_id,
        None,
        withheld.fp,
        None,
        withheld.tn,
        positives=withheld.tp + withheld.fn,
        negatives=withheld.fp + withheld.tn,
        analysed=withheld.tp + withheld.fn + withheld.fp + withheld.tn,
        min_cell_size=10,
    )
    result = headline_covariate_test(tables, INVENTED, ["invented"])
    assert result.n_sites == 14 and result.censored_sites == (withheld.site_id,)
    assert result.statistic >= 0 and 0 < result.p <= 1
